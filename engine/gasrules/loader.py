"""Stage 1: read YAML or JSON into plain data plus a position map.

Knows nothing about rules. Every mapping key and value keeps its line and column, so the later
stages can say ``file:line:col`` for anything they find wrong. Duplicate keys are an error
(YAML would silently keep the last one). Uses libyaml's parser when it is available.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from .errors import Location, Problem

_Loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)

PathKey = tuple[Any, ...]


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


def load_document(path: str | Path, display_name: str | None = None) -> tuple[Document | None, list[Problem]]:
    """Read one YAML/JSON file. Returns the document (None when unreadable) and problems."""
    name = display_name or str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        return None, [Problem("RB-E003", f"cannot read file: {exc.strerror or exc}", Location(name))]
    doc, problems = parse_text(raw, name)
    return doc, problems


def parse_text(raw: bytes | str, name: str) -> tuple[Document | None, list[Problem]]:
    text = raw.decode("utf-8") if isinstance(raw, bytes) else raw
    raw_bytes = raw if isinstance(raw, bytes) else raw.encode("utf-8")
    try:
        loader = _Loader(text)
        try:
            node = loader.get_single_node()
            problems: list[Problem] = []
            doc = Document(name, None, {}, raw_bytes)
            doc.data = _construct(loader, node, (), doc, problems) if node is not None else None
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark else (0, 0)
        msg = " ".join(str(p) for p in (exc.context, exc.problem) if p)
        return None, [Problem("RB-E001", f"YAML syntax error: {msg}", Location(name, line, col))]
    except yaml.YAMLError as exc:  # pragma: no cover - libyaml raises marked errors
        return None, [Problem("RB-E001", f"YAML syntax error: {exc}", Location(name))]
    return doc, problems


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
                problems.append(Problem(
                    "RB-E002",
                    f"duplicate key '{key}' (first at line {first[0]})",
                    Location(doc.file, key_node.start_mark.line + 1, key_node.start_mark.column + 1,
                             render_path(path + (key,))),
                    "each key once per mapping",
                ))
                continue
            out[key] = _construct(loader, value_node, path + (key,), doc, problems)
        return out
    if isinstance(node, yaml.SequenceNode):
        return [_construct(loader, child, path + (i,), doc, problems) for i, child in enumerate(node.value)]
    value = loader.construct_object(node, deep=True)
    if isinstance(value, (_dt.date, _dt.datetime)):
        return value.isoformat()
    return value
