"""Load a rulebook through the pipeline, or from the compiled-rulebook cache.

load -> validate -> resolve overlays -> compile runs only on a cache miss. The cache key is the
sha256 of the Python version, the working directory (locations are shown relative to it), a hash
of the whole package source (every file under gasrules/ and the schemas), and every file of the
`extends` chain and every bibliography file they cite: the chain is followed through the parsed
documents (YAML or JSON, never matched as text) and each file's bytes are hashed (its content and the line of everything in it, which
results and traces show), so an edit to any of them is a miss.

The cache lives in $GASRULES_CACHE_DIR, else $XDG_CACHE_HOME/gasrules, else ~/.cache/gasrules.
A pickle is code: entries are read and written only when that directory is owned by the current
user and writable by no one else (created with mode 0700 when missing); otherwise the cache is
skipped, with one :class:`CacheWarning` per directory and process, and rulebooks are compiled
every time. When the directory cannot be written, rulebooks are simply compiled every time.
"""

from __future__ import annotations

import functools
import hashlib
import os
import pickle
import stat
import sys
import tempfile
import warnings
from pathlib import Path
from typing import Any

from gasrules.core.errors import Problem, RulebookError
from gasrules.core.model import CompiledRulebook
from gasrules.core.resources import default_rulebook_path, schema_path
from gasrules.core.version import __version__
from gasrules.rulebook.codegen import link

__all__ = [
    "CacheWarning",
    "cache_dir",
    "cache_key",
    "cache_usable",
    "check_path",
    "check_rulebook",
    "compile_path",
    "load",
    "load_rulebook",
    "package_source_hash",
]


class CacheWarning(UserWarning):
    """The compiled-rulebook cache is skipped (its directory is not safe to load pickles from)."""


_WARNED: set[str] = set()


def cache_dir() -> Path:
    explicit = os.environ.get("GASRULES_CACHE_DIR")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "gasrules"


@functools.lru_cache(maxsize=1)
def package_source_hash() -> str:
    """sha256 over (relative name, bytes) of every source file of the package and the schemas."""
    here = Path(__file__).resolve().parent.parent  # the whole gasrules package
    h = hashlib.sha256()
    roots = [(here, "gasrules"), (schema_path("rulebook.schema.json").parent, "schemas")]
    for root, label in roots:
        for path in sorted(
            p
            for p in root.rglob("*")
            if p.is_file() and "__pycache__" not in p.parts and p.suffix not in (".pyc", ".pyo")
        ):
            h.update(f"{label}/{path.relative_to(root).as_posix()}\0".encode("utf-8", "surrogateescape"))
            h.update(hashlib.sha256(path.read_bytes()).digest())
    return h.hexdigest()


def _chain_content(path: str | Path, limits: Any) -> list[tuple[str, bytes]] | None:
    """(resolved path, bytes) for every file of the chain, found by parsing each one, base last;
    None when a file cannot be read or parsed (the pipeline will say why). What a file extends
    is a function of its bytes: it is remembered per sha256 of the bytes (a small JSON note in
    the cache directory, never code), so a cache hit does not parse again."""
    from gasrules.rulebook.loader import file_problem

    out: list[tuple[str, bytes]] = []
    current: Path | None = Path(path)
    seen: set[Path] = set()
    while current is not None:
        real = current.resolve()
        if real in seen or file_problem(current, str(current), limits) is not None:
            return None
        seen.add(real)
        raw = current.read_bytes()
        if len(raw) > limits.file_bytes:
            return None
        found, ext, bibs = _extends_of(raw, limits)
        if not found:
            return None
        out.append((str(real), raw))
        for name in bibs:  # the bibliography a file cites is part of its identity
            bib = (current.parent / name).resolve()
            out.append((str(bib), bib.read_bytes() if bib.is_file() else b"(missing)"))
        current = current.parent / ext if ext else None
    return out


def _extends_of(raw: bytes, limits: Any) -> tuple[bool, str | None, list[str]]:
    """(parsed cleanly, the file's extends value or None, the bibliography files it names), from
    the note or by parsing."""
    import json

    from gasrules.rulebook.loader import parse_text

    digest = hashlib.sha256(raw).hexdigest()
    directory = cache_dir()
    note = directory / f"chain-{digest}.json"
    usable = cache_usable(directory)
    if usable and _entry_safe(note):
        try:
            data = json.loads(note.read_text(encoding="utf-8"))
            value, bibs = data.get("extends"), data.get("bibliography")
            if (
                (value is None or isinstance(value, str))
                and isinstance(bibs, list)
                and all(isinstance(b, str) for b in bibs)
            ):
                return True, value, bibs
        except (OSError, ValueError, AttributeError):
            pass
    doc, problems = parse_text(raw, "<key>", limits)
    if doc is None or problems:
        return False, None, []
    data = doc.data if isinstance(doc.data, dict) else {}
    ext = data.get("extends")
    ext = ext if isinstance(ext, str) and ext else None
    bib = data.get("bibliography")
    bibs = [
        b
        for b in ([bib] if isinstance(bib, str) else bib if isinstance(bib, list) else [])
        if isinstance(b, str)
    ]
    if usable:
        try:
            fd, tmp = tempfile.mkstemp(dir=directory, suffix=".tmp")
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                json.dump({"extends": ext, "bibliography": bibs}, fh)
            os.replace(tmp, note)
        except OSError:
            pass
    return True, ext, bibs


def cache_key(path: str | Path, limits: Any = None) -> str | None:
    from gasrules.rulebook.loader import Limits

    limits = limits or Limits.from_env()
    h = hashlib.sha256(
        __version__.encode() + b"\0" + sys.version.encode() + b"\0"
    )  # marshalled code is per Python
    # locations are shown relative to the working directory that compiled the rulebook
    h.update(os.getcwd().encode("utf-8", "surrogateescape") + b"\0")
    try:
        h.update(package_source_hash().encode() + b"\0" + repr(limits).encode() + b"\0")
        chain = _chain_content(path, limits)
    except (OSError, RecursionError):
        return None
    if chain is None:
        return None
    for name, content in chain:
        h.update(name.encode("utf-8", "surrogateescape") + b"\0" + hashlib.sha256(content).digest())
    return h.hexdigest()


def cache_usable(directory: Path) -> bool:
    """True when ``directory`` (created 0700 when missing) is owned by this user and writable
    by no one else; else False, with one CacheWarning per directory and process."""
    try:
        directory.mkdir(mode=0o700, parents=True, exist_ok=True)
        st = os.stat(directory, follow_symlinks=False)
    except OSError:
        return False
    why = ""
    if not stat.S_ISDIR(st.st_mode):
        why = "is not a directory"
    elif hasattr(os, "getuid") and st.st_uid != os.getuid():
        why = f"is owned by user id {st.st_uid}, not by the current user"
    elif st.st_mode & (stat.S_IWGRP | stat.S_IWOTH):
        why = f"is writable by other users (mode {stat.S_IMODE(st.st_mode):o})"
    if not why:
        return True
    if str(directory) not in _WARNED:
        _WARNED.add(str(directory))
        warnings.warn(
            f"gasrules: compiled-rulebook cache skipped: {directory} {why}; rulebooks are compiled "
            "every time (use a directory of your own with mode 0700, e.g. set GASRULES_CACHE_DIR)",
            CacheWarning,
            stacklevel=3,
        )
    return False


def _entry_safe(target: Path) -> bool:
    try:
        st = os.stat(target, follow_symlinks=False)
    except OSError:
        return False
    return (
        stat.S_ISREG(st.st_mode)
        and not (st.st_mode & (stat.S_IWGRP | stat.S_IWOTH))
        and (not hasattr(os, "getuid") or st.st_uid == os.getuid())
    )


def compile_path(path: str | Path, limits: Any = None) -> CompiledRulebook:
    """The full pipeline, no cache. Raises RulebookError with every problem found."""
    from gasrules.rulebook.compiler import build
    from gasrules.rulebook.overlay import load_chain, resolve

    docs, problems = load_chain(path, limits)
    if problems:
        raise RulebookError(problems)
    resolved, problems = resolve(docs)
    try:
        compiled = build(resolved)  # refused overrides are left at the base value; keep checking
    except RulebookError as exc:
        raise RulebookError(problems + exc.problems) from None
    if problems:
        raise RulebookError(problems + list(compiled.warnings))
    return compiled


def check_path(path: str | Path, limits: Any = None) -> list[Problem]:
    """Every problem (errors and warnings), sorted; empty when the rulebook is clean."""
    try:
        compiled = compile_path(path, limits)
    except RulebookError as exc:
        return exc.problems
    return sorted(compiled.warnings, key=Problem.sort_key)


def load(path: str | Path, use_cache: bool = True, limits: Any = None) -> CompiledRulebook:
    key = cache_key(path, limits) if use_cache else None
    directory = cache_dir()
    target = directory / f"{key}.pickle" if key and cache_usable(directory) else None
    if target is not None and _entry_safe(target):
        try:
            with open(target, "rb") as fh:
                compiled = pickle.load(fh)
            if isinstance(compiled, CompiledRulebook):
                link(compiled)  # the generated function is not pickled
                return compiled
        except Exception:  # a damaged cache entry is a miss
            pass
    compiled = compile_path(path) if limits is None else compile_path(path, limits)
    if target is not None:
        _store(target, compiled)
    return compiled


def _store(target: Path, compiled: CompiledRulebook) -> None:
    try:
        fd, tmp = tempfile.mkstemp(dir=target.parent, suffix=".tmp")  # mode 0600
        with os.fdopen(fd, "wb") as fh:
            pickle.dump(compiled, fh, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, target)
    except OSError:
        pass


def load_rulebook(
    path: str | Path | None = None, *, cache: bool = True, limits: Any = None
) -> CompiledRulebook:
    """Load, validate and compile a rulebook once (the shipped default when ``path`` is None).
    Raises RulebookError listing every problem. ``limits``: a
    :class:`gasrules.rulebook.loader.Limits` (default: from GASRULES_* variables)."""
    return load(path if path is not None else default_rulebook_path(), use_cache=cache, limits=limits)


def check_rulebook(path: str | Path) -> list[Problem]:
    """Every problem in a rulebook, with file:line:column (an empty list when it is sound)."""
    return check_path(path)
