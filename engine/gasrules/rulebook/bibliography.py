"""Bibliographies: the publications a rulebook and its validation cases cite, one key each.

A rulebook names its bibliography file(s) with a top-level ``bibliography:`` (relative to the
rulebook); an overlay inherits its base's and may add its own. Each file is checked against
``schemas/bibliography.schema.json``. Parameters (``source.ref``), rules (``doc.references``) and
validation cases (``evidence.ref``) cite entries by key; an unknown key is an error at its
file:line:column with the nearest known keys. The entries' content is part of the rulebook
identity (it is shown to users), through :func:`bibliography_digest`.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import os
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import Location, Problem
from gasrules.rulebook.loader import Document, load_document
from gasrules.rulebook.schema import validate_document

SCHEMA = "bibliography.schema.json"


@dataclass
class Bibliography:
    """Entries by key, and where each was declared."""

    entries: dict[str, dict[str, Any]] = field(default_factory=dict)
    where: dict[str, Location] = field(default_factory=dict)
    files: list[str] = field(default_factory=list)

    def __contains__(self, key: str) -> bool:
        return key in self.entries


def declared_files(doc: Document) -> list[tuple[Path, Location]]:
    """The bibliography files one rulebook document names, resolved against its own folder."""
    data = doc.data if isinstance(doc.data, dict) else {}
    raw = data.get("bibliography")
    names = [raw] if isinstance(raw, str) else list(raw or [])
    base = Path(doc.file).parent
    return [
        (
            Path(os.path.normpath(base / n)),
            doc.locate(("bibliography",) if isinstance(raw, str) else ("bibliography", i)),
        )
        for i, n in enumerate(names)
    ]


def load_bibliographies(docs: Iterable[Document]) -> tuple[Bibliography, list[Problem]]:
    """Every bibliography the chain of rulebook documents names, base first, merged by key."""
    bib = Bibliography()
    problems: list[Problem] = []
    seen: set[Path] = set()
    for doc in docs:
        for path, referrer in declared_files(doc):
            real = path.resolve()
            if real in seen:
                continue
            seen.add(real)
            problems += _load_one(path, referrer, bib)
    return bib, problems


def _load_one(path: Path, referrer: Location, bib: Bibliography) -> list[Problem]:
    doc, problems = load_document(path, str(path))
    if doc is None:
        return [
            Problem(
                "RB-E050",
                f"bibliography file cannot be read: {path}",
                referrer,
                "a path to a bibliography YAML file, relative to the rulebook",
            )
        ]
    if problems:
        return problems
    schema = [Problem("RB-E050", p.message, p.location, p.expected) for p in validate_document(doc, SCHEMA)]
    if schema:
        return schema
    bib.files.append(str(path))
    out = []
    for key, entry in doc.data["entries"].items():
        if key in bib.entries:
            out.append(
                Problem(
                    "RB-E052",
                    f"bibliography key '{key}' is declared twice (first at {bib.where[key]})",
                    doc.locate(("entries", key)),
                    "one entry per key across a rulebook's bibliographies",
                )
            )
            continue
        bib.entries[key] = entry
        bib.where[key] = doc.locate(("entries", key))
    return out


def suggest(key: str, known: Iterable[str]) -> str:
    """' (did you mean a, b?)' for the nearest known keys, or ''."""
    close = difflib.get_close_matches(key, list(known), n=3, cutoff=0.6)
    return f" (did you mean {', '.join(close)}?)" if close else ""


def keys_of(ref: Any) -> list[str]:
    """A `ref` value (one key or a list of keys) as a list."""
    if ref is None:
        return []
    return [ref] if isinstance(ref, str) else [k for k in ref if isinstance(k, str)]


def unknown_key(key: str, bib: Bibliography, where: Location, code: str = "RB-E051") -> Problem:
    return Problem(
        code,
        f"unknown bibliography key '{key}'{suggest(key, bib.entries)}",
        where,
        "a key of "
        + (", ".join(bib.files) or "the rulebook's bibliography (declare one with `bibliography:`)"),
    )


def check_rulebook_refs(
    bib: Bibliography,
    params: Iterable[tuple[str, dict[str, Any], Location]],
    rules: Iterable[tuple[str, list[Any], Location]],
) -> tuple[list[Problem], set[str]]:
    """Unknown keys cited by parameters' `source.ref` and rules' `doc.references`; and the keys used.

    ``params``: (name, source, location of the source); ``rules``: (id, references, location)."""
    out: list[Problem] = []
    used: set[str] = set()
    for _name, source, where in params:
        for key in keys_of(source.get("ref")):
            used.add(key)
            if key not in bib:
                out.append(unknown_key(key, bib, where))
    for _rid, refs, where in rules:
        for item in refs:
            key = item if isinstance(item, str) else (item or {}).get("ref")
            if key is None:
                continue
            used.add(key)
            if key not in bib:
                out.append(unknown_key(key, bib, where))
    return out, used


def describe(entry: dict[str, Any]) -> str:
    """One line for a reader: authors. Title. Journal or book year;volume(issue):pages. [how known]"""
    authors = entry.get("authors") or []
    who = ", ".join(authors[:3]) + (", et al." if len(authors) > 3 else "")
    where = entry.get("journal") or entry.get("book") or entry.get("publisher") or ""
    if entry.get("edition"):
        where += f", {entry['edition']}"
    cite = str(entry.get("year", ""))
    if entry.get("volume"):
        cite += f";{entry['volume']}"
        if entry.get("issue"):
            cite += f"({entry['issue']})"
    if entry.get("pages"):
        cite += f":{entry['pages']}"
    parts = [p for p in (who, entry["title"], " ".join(x for x in (where, cite) if x)) if p]
    known = "details read" if entry["details"] == "read" else "details from memory"
    return ". ".join(p.rstrip(".") for p in parts) + f". [{known}]"


def bibliography_digest(bib: Bibliography | None) -> str:
    """A digest of the entries' content (key order and file layout do not matter)."""
    if bib is None or not bib.entries:
        return ""
    text = json.dumps(bib.entries, sort_keys=True, separators=(",", ":"), ensure_ascii=False, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def with_bibliography(sha: str, bib: Bibliography | None) -> str:
    """The rulebook identity including the cited bibliography: unchanged when there is none."""
    digest = bibliography_digest(bib)
    return sha if not digest else hashlib.sha256(f"{sha}+bibliography:{digest}".encode("ascii")).hexdigest()
