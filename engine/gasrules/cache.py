"""Load a rulebook through the pipeline, or from the compiled-rulebook cache.

load -> validate -> resolve overlays -> compile runs only on a cache miss. The cache key is
the sha256 of the engine version, the engine modules that shape a compiled rulebook, the
schema, and the raw bytes of every file in the `extends` chain, so any edit to any of them is a
miss. The cache lives in $GASRULES_CACHE_DIR, else $XDG_CACHE_HOME/gasrules, else
~/.cache/gasrules; when it cannot be written, rulebooks are simply compiled every time.
"""

from __future__ import annotations

import hashlib
import os
import pickle
import re
import sys
import tempfile
from pathlib import Path

from . import __version__
from .errors import Problem, RulebookError
from .model import CompiledRulebook
from .resources import schema_path

_EXTENDS = re.compile(rb"^extends:\s*['\"]?([^'\"\s#]+)", re.M)
_BIBLIOGRAPHY = re.compile(rb"^bibliography:[ \t]*(.+)$", re.M)
_SHAPERS = ("compiler.py", "codegen.py", "expressions.py", "model.py", "evaluator.py", "trace.py", "overlay.py", "units.py",
            "bibliography.py")


def cache_dir() -> Path:
    explicit = os.environ.get("GASRULES_CACHE_DIR")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "gasrules"


def cache_key(path: str | Path) -> str | None:
    h = hashlib.sha256(__version__.encode() + sys.version.encode())  # marshalled code is per Python
    # locations are shown relative to the working directory that compiled the rulebook
    h.update(os.getcwd().encode("utf-8", "surrogateescape") + b"\0")
    here = Path(__file__).resolve().parent
    try:
        for name in _SHAPERS:
            h.update((here / name).read_bytes())
        h.update(schema_path("rulebook.schema.json").read_bytes())
        h.update(schema_path("bibliography.schema.json").read_bytes())
        current: Path | None = Path(path).resolve()
        seen: set[Path] = set()
        while current is not None and current not in seen:
            seen.add(current)
            raw = current.read_bytes()
            h.update(str(current).encode() + b"\0" + raw)
            for bib in _bibliography_files(current, raw):     # the cited bibliography is part of the identity
                h.update(str(bib).encode() + b"\0" + (bib.read_bytes() if bib.is_file() else b"(missing)"))
            m = _EXTENDS.search(raw)
            current = (current.parent / m.group(1).decode()).resolve() if m else None
    except OSError:
        return None
    return h.hexdigest()


def _bibliography_files(rulebook: Path, raw: bytes) -> list[Path]:
    """The bibliography files a rulebook's top-level `bibliography:` names (one path or a flow list)."""
    m = _BIBLIOGRAPHY.search(raw)
    if not m:
        return []
    text = m.group(1).split(b"#")[0].strip().strip(b"[]")
    names = [n.strip().strip(b"'\"") for n in text.split(b",") if n.strip()]
    return [(rulebook.parent / n.decode("utf-8", "surrogateescape")).resolve() for n in names]


def compile_path(path: str | Path) -> CompiledRulebook:
    """The full pipeline, no cache. Raises RulebookError with every problem found."""
    from .compiler import build
    from .overlay import load_chain, resolve

    docs, problems = load_chain(path)
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


def check_path(path: str | Path) -> list[Problem]:
    """Every problem (errors and warnings), sorted; empty when the rulebook is clean."""
    try:
        compiled = compile_path(path)
    except RulebookError as exc:
        return exc.problems
    return sorted(compiled.warnings, key=Problem.sort_key)


def load(path: str | Path, use_cache: bool = True) -> CompiledRulebook:
    key = cache_key(path) if use_cache else None
    target = cache_dir() / f"{key}.pickle" if key else None
    if target is not None and target.is_file():
        try:
            with open(target, "rb") as fh:
                compiled = pickle.load(fh)  # noqa: S301 - our own cache, keyed by content hash
            if isinstance(compiled, CompiledRulebook):
                return compiled
        except Exception:  # a damaged cache entry is a miss
            pass
    compiled = compile_path(path)
    if target is not None:
        _store(target, compiled)
    return compiled


def _store(target: Path, compiled: CompiledRulebook) -> None:
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=target.parent, suffix=".tmp")
        with os.fdopen(fd, "wb") as fh:
            pickle.dump(compiled, fh, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, target)
    except OSError:
        pass
