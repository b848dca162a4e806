"""Stage 1: read YAML or JSON into plain data plus a position map.

Knows nothing about rules. Every mapping key and value keeps its line and column, so the later
stages can say ``file:line:col`` for anything they find wrong. Duplicate keys are an error
(YAML would silently keep the last one). Uses libyaml's parser when it is available.

Hostile files get a clean error, never a traceback or a hang (:class:`Limits`): a file larger
than ``file_bytes`` (default 10 MB) is not read; bytes that are not UTF-8 (UTF-16 included) are
an error at their line and column; the composed YAML graph is measured before anything is
built, so an alias bomb (more than ``yaml_nodes`` nodes once aliases are expanded, default
1,000,000), a self-referencing alias or nesting deeper than ``MAX_DEPTH`` is refused before
expansion; an impossible date (``2026-13-45``) is an error at its position.
"""

from __future__ import annotations

import datetime as _dt
import os
import stat
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from gasrules.core.errors import Location, Problem

_Loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)

PathKey = tuple[Any, ...]

MAX_DEPTH = 100  # rulebooks nest a few levels; anything deeper is not a rulebook
MAX_INT = 2**63 - 1


@dataclass(frozen=True)
class Limits:
    """What a rulebook file may cost to read. Settings: ``limits.yaml_nodes`` /
    GASRULES_YAML_NODE_BUDGET, ``limits.rulebook_bytes`` / GASRULES_RULEBOOK_MAX_BYTES,
    ``rulebook_roots`` / GASRULES_RULEBOOK_ROOTS (directories, os.pathsep separated): when
    roots are set, every file of an extends chain must lie under one of them."""

    yaml_nodes: int = 1_000_000
    file_bytes: int = 10 * 1024 * 1024
    roots: tuple[Path, ...] = ()

    @classmethod
    def from_env(cls, env: Mapping[str, str] | None = None) -> Limits:
        environ = os.environ if env is None else env
        out: dict[str, Any] = {}
        for var, name in (
            ("GASRULES_YAML_NODE_BUDGET", "yaml_nodes"),
            ("GASRULES_RULEBOOK_MAX_BYTES", "file_bytes"),
        ):
            raw = (environ.get(var) or "").strip()
            if raw.isdigit() and int(raw) > 0:
                out[name] = int(raw)
        roots = [r for r in (environ.get("GASRULES_RULEBOOK_ROOTS") or "").split(os.pathsep) if r.strip()]
        if roots:
            out["roots"] = tuple(Path(r).expanduser().resolve() for r in roots)
        return cls(**out)


def file_problem(path: Path, name: str, limits: Limits) -> Problem | None:
    """Why ``path`` may not be read as a rulebook (not a regular file, too large, outside the
    configured roots), or None. Never reads the file."""
    try:
        st = os.stat(path)
    except OSError as exc:
        return Problem("RB-E003", f"cannot read file: {exc.strerror or exc}", Location(name))
    if stat.S_ISDIR(st.st_mode):
        return Problem("RB-E003", "cannot read file: Is a directory", Location(name))
    if not stat.S_ISREG(st.st_mode):
        return Problem(
            "RB-E005",
            "is not a regular file (a device, FIFO or socket)",
            Location(name),
            "a regular rulebook file",
        )
    if st.st_size > limits.file_bytes:
        return Problem(
            "RB-E006",
            f"is {st.st_size} bytes, more than the limit of {limits.file_bytes}",
            Location(name),
            f"a file of at most {limits.file_bytes} bytes (setting limits.rulebook_bytes)",
        )
    if limits.roots:
        real = Path(path).resolve()
        if not any(real == root or root in real.parents for root in limits.roots):
            return Problem(
                "RB-E007",
                "lies outside the configured rulebook roots",
                Location(name),
                "a file under " + ", ".join(str(r) for r in limits.roots) + " (setting rulebook_roots)",
            )
    return None


@dataclass
class Document:
    """One parsed file: its data, where each part of it stands, and its raw bytes."""

    file: str
    data: Any
    positions: dict[PathKey, tuple[int, int]] = field(default_factory=dict)
    raw: bytes = b""

    def locate(self, path: PathKey) -> Location:
        """The location of ``path``, or of its nearest ancestor that has one."""
        probe = tuple(path)
        while True:
            pos = self.positions.get(probe)
            if pos is not None:
                return Location(self.file, pos[0], pos[1], render_path(path))
            if not probe:
                return Location(self.file, 0, 0, render_path(path))
            probe = probe[:-1]


def render_path(path: PathKey) -> str:
    """``('rules', 3, 'when')`` -> ``rules[3].when``."""
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def load_document(
    path: str | Path, display_name: str | None = None, limits: Limits | None = None
) -> tuple[Document | None, list[Problem]]:
    """Read one YAML/JSON file. Returns the document (None when unreadable) and problems."""
    name = display_name or str(path)
    limits = limits or Limits.from_env()
    refused = file_problem(Path(path), name, limits)
    if refused is not None:
        return None, [refused]
    try:
        with open(path, "rb") as fh:
            raw = fh.read(limits.file_bytes + 1)
    except OSError as exc:
        return None, [Problem("RB-E003", f"cannot read file: {exc.strerror or exc}", Location(name))]
    if len(raw) > limits.file_bytes:
        return None, [
            Problem(
                "RB-E006",
                f"is more than the limit of {limits.file_bytes} bytes",
                Location(name),
                f"a file of at most {limits.file_bytes} bytes (setting limits.rulebook_bytes)",
            )
        ]
    return parse_text(raw, name, limits)


def _decode(raw: bytes, name: str) -> tuple[str | None, Problem | None]:
    """UTF-8 text, or a problem at the line and column of the first byte that is not UTF-8."""
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")) or (len(raw) > 1 and (raw[0] == 0) != (raw[1] == 0)):
        return None, Problem(
            "RB-E008",
            "is UTF-16 (or another encoding with zero bytes), not UTF-8",
            Location(name, 1, 1),
            "a UTF-8 text file",
        )
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        before = raw[: exc.start]
        line = before.count(b"\n") + 1
        col = len(before[before.rfind(b"\n") + 1 :].decode("utf-8", "replace")) + 1
        return None, Problem(
            "RB-E008",
            f"byte 0x{raw[exc.start]:02x} is not UTF-8",
            Location(name, line, col),
            "a UTF-8 text file",
        )
    if text.startswith("\ufeff"):
        text = text[1:]
    return text, None


def parse_text(
    raw: bytes | str, name: str, limits: Limits | None = None
) -> tuple[Document | None, list[Problem]]:
    limits = limits or Limits.from_env()
    if isinstance(raw, bytes):
        text, bad = _decode(raw, name)
        if bad is not None or text is None:
            return None, [bad] if bad else []
    else:
        text = raw
    raw_bytes = raw if isinstance(raw, bytes) else raw.encode("utf-8", "surrogatepass")
    try:
        loader = _Loader(text)
        try:
            node = loader.get_single_node()
            problems: list[Problem] = []
            if node is not None:
                problems = _measure(node, name, limits)
                if problems:
                    return None, problems
            doc = Document(name, None, {}, raw_bytes)
            doc.data = _construct(loader, node, (), doc, problems) if node is not None else None
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark else (0, 0)
        msg = " ".join(str(p) for p in (exc.context, exc.problem) if p)
        return None, [Problem("RB-E001", f"YAML syntax error: {msg}", Location(name, line, col))]
    except (yaml.YAMLError, RecursionError, ValueError, TypeError) as exc:
        return None, [Problem("RB-E001", f"YAML error: {type(exc).__name__}", Location(name))]
    return doc, problems


def _measure(root: Any, name: str, limits: Limits) -> list[Problem]:
    """Refuse, before anything is built, a graph that expands past the node budget, refers to
    itself or nests deeper than MAX_DEPTH. Counts each aliased node as often as it is used."""
    sizes: dict[int, int] = {}
    open_: set[int] = set()

    def where(node: Any) -> Location:
        return Location(name, node.start_mark.line + 1, node.start_mark.column + 1)

    stack: list[tuple[Any, int, bool]] = [(root, 1, False)]
    while stack:
        node, depth, done = stack.pop()
        key = id(node)
        if done:
            children = _children(node)
            sizes[key] = min(1 + sum(sizes[id(c)] for c in children), limits.yaml_nodes + 1)
            open_.discard(key)
            continue
        if key in sizes:
            continue
        if key in open_:
            return [
                Problem(
                    "RB-E009",
                    "an alias refers to the node that contains it (a self-referencing alias)",
                    where(node),
                    "aliases to complete, earlier nodes",
                )
            ]
        if depth > MAX_DEPTH:
            return [
                Problem(
                    "RB-E009",
                    f"nesting deeper than {MAX_DEPTH} levels",
                    where(node),
                    f"at most {MAX_DEPTH} levels of nesting",
                )
            ]
        open_.add(key)
        stack.append((node, depth, True))
        for child in _children(node):
            if id(child) in open_:
                return [
                    Problem(
                        "RB-E009",
                        "an alias refers to the node that contains it (a self-referencing alias)",
                        where(child),
                        "aliases to complete, earlier nodes",
                    )
                ]
            if id(child) not in sizes:
                stack.append((child, depth + 1, False))
    total = sizes.get(id(root), 0)
    if total > limits.yaml_nodes:
        return [
            Problem(
                "RB-E009",
                f"expands to more than {limits.yaml_nodes} YAML nodes once aliases are "
                "followed (an alias bomb?)",
                where(root),
                f"at most {limits.yaml_nodes} nodes (setting limits.yaml_nodes)",
            )
        ]
    return []


def _children(node: Any) -> list[Any]:
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    return []


def _construct(loader: Any, node: Any, path: PathKey, doc: Document, problems: list[Problem]) -> Any:
    doc.positions[path] = (node.start_mark.line + 1, node.start_mark.column + 1)
    if isinstance(node, yaml.MappingNode):
        loader.flatten_mapping(node)
        out: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            key = loader.construct_object(key_node, deep=True)
            if not isinstance(key, (str, int, float, bool)):
                key = str(key)
            if key in out:
                first = doc.positions.get(path + (key,), (0, 0))
                problems.append(
                    Problem(
                        "RB-E002",
                        f"duplicate key '{key}' (first at line {first[0]})",
                        Location(
                            doc.file,
                            key_node.start_mark.line + 1,
                            key_node.start_mark.column + 1,
                            render_path(path + (key,)),
                        ),
                        "each key once per mapping",
                    )
                )
                continue
            out[key] = _construct(loader, value_node, path + (key,), doc, problems)
        return out
    if isinstance(node, yaml.SequenceNode):
        return [_construct(loader, child, path + (i,), doc, problems) for i, child in enumerate(node.value)]
    try:
        value = loader.construct_object(node, deep=True)
    except ValueError as exc:  # e.g. an impossible date 2026-13-45 (the resolver took it for one)
        problems.append(
            Problem(
                "RB-E001",
                f"invalid value {node.value!r}: {exc}",
                Location(doc.file, node.start_mark.line + 1, node.start_mark.column + 1, render_path(path)),
                "a real date (YYYY-MM-DD) or a quoted string",
            )
        )
        return None
    if isinstance(value, (_dt.date, _dt.datetime)):
        return value.isoformat()
    if (isinstance(value, float) and (value != value or value in (float("inf"), float("-inf")))) or (
        isinstance(value, int) and not isinstance(value, bool) and abs(value) > MAX_INT
    ):
        problems.append(
            Problem(
                "RB-E011",
                f"number {node.value[:40]!r} cannot be used (NaN, infinity or an integer too large)",
                Location(doc.file, node.start_mark.line + 1, node.start_mark.column + 1, render_path(path)),
                f"a finite number; integers within \u00b1{MAX_INT}",
            )
        )
        return None
    return value
