"""Who is who at release time: names compared as a person would read them, and the site roster.

:func:`name_keys` turns a name into comparison keys: Unicode NFKC normalisation, removal of
format characters (zero-width joiners, bidirectional marks, soft hyphens: category Cf), white
space collapsed, case folding, and the confusable *skeleton* of Unicode TS #39 (NFD, each
character replaced by its prototype from the Unicode confusables data, NFD again), taken both
before and after case folding (capital I and small l look alike; capital I and small i do not).
Two names are the same person when their key sets meet.

The confusables data come from the ``confusable_homoglyphs`` package (the Unicode consortium's
confusables.txt as a table of look-alike classes): each character listed with a single
look-alike maps to it; a pair that names only each other maps to the ASCII one (else the lower
code point).

A site roster (setting ``releases.roster`` / ``GASRULES_ROSTER``) lists the people who may author
or approve, each with a stable id::

    people:
      - {id: "staff-0042", name: "A. Reviewer", aliases: ["Alex Reviewer"]}

When a roster is set, ``release`` refuses any author or approver whose name matches no entry
(or more than one), and records the ids in the manifest.
"""

from __future__ import annotations

import functools
import unicodedata
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError

__all__ = ["Roster", "RosterError", "load_roster", "name_keys", "same_person"]


class RosterError(EngineError):
    """The roster file cannot be used (``where`` is file:line:col)."""


@functools.lru_cache(maxsize=1)
def _prototypes() -> dict[str, str]:
    import json
    from importlib import resources

    data = json.loads(
        resources.files("confusable_homoglyphs").joinpath("confusables.json").read_text("utf-8")
    )
    out: dict[str, str] = {}
    for char, entries in data.items():
        if len(char) != 1 or len(entries) != 1:
            continue
        target = entries[0]["c"].replace("\u200e", "")
        if len(target) != 1 or target == char:
            continue
        back = data.get(target) or []
        if len(back) == 1 and back[0]["c"].replace("\u200e", "") == char:  # a pair: who is the prototype?
            if (char.isascii(), -ord(char)) > (target.isascii(), -ord(target)):
                continue
        out[char] = target
    return out


def _skeleton(text: str) -> str:
    table = _prototypes()
    mapped = "".join(table.get(c, c) for c in unicodedata.normalize("NFD", text))
    return unicodedata.normalize("NFD", mapped)


def _clean(name: str) -> str:
    text = unicodedata.normalize("NFKC", name)
    text = "".join(c for c in text if unicodedata.category(c) != "Cf")
    return " ".join(text.split())


def name_keys(name: str) -> frozenset[str]:
    """Comparison keys of a name (see the module docstring); empty for an empty name."""
    text = _clean(name)
    if not text:
        return frozenset()
    folded = text.casefold()
    return frozenset({folded, _skeleton(text).casefold(), _skeleton(folded).casefold()})


def same_person(a: str, b: str) -> bool:
    return bool(name_keys(a) & name_keys(b))


@dataclass(frozen=True)
class Person:
    id: str
    name: str
    aliases: tuple[str, ...] = ()

    def keys(self) -> frozenset[str]:
        out: set[str] = set()
        for n in (self.name, *self.aliases):
            out |= name_keys(n)
        return frozenset(out)


@dataclass(frozen=True)
class Roster:
    people: tuple[Person, ...]
    source: str = ""

    def find(self, name: str) -> list[Person]:
        keys = name_keys(name)
        return [p for p in self.people if keys & p.keys()]


def load_roster(path: str | Path) -> Roster:
    """Read a roster file; RosterError naming file:line:col and the accepted form."""
    from gasrules.rulebook.loader import load_document

    doc, problems = load_document(path)
    form = "a mapping with people: [{id, name, aliases?}]"
    if doc is None or problems:
        first = problems[0] if problems else None
        raise RosterError(
            f"{first.location if first else path}: roster: {first.message if first else 'unreadable'}; "
            f"accepted: {form}"
        )
    data = doc.data
    if not isinstance(data, dict) or not isinstance(data.get("people"), list):
        raise RosterError(f"{doc.locate(())}: roster: no people list; accepted: {form}")
    people: list[Person] = []
    seen: dict[str, Any] = {}
    for i, entry in enumerate(data["people"]):
        where = doc.locate(("people", i))
        if not isinstance(entry, dict) or not all(
            isinstance(entry.get(k), str) and entry[k].strip() for k in ("id", "name")
        ):
            raise RosterError(f"{where}: roster: people[{i}] needs a non-empty id and name; accepted: {form}")
        aliases = entry.get("aliases") or []
        if not isinstance(aliases, list) or not all(isinstance(a, str) for a in aliases):
            raise RosterError(
                f"{where}: roster: people[{i}].aliases must be a list of names; accepted: {form}"
            )
        if entry["id"] in seen:
            raise RosterError(
                f"{where}: roster: id {entry['id']!r} listed twice (first at {seen[entry['id']]})"
            )
        seen[entry["id"]] = where
        people.append(Person(entry["id"].strip(), entry["name"].strip(), tuple(aliases)))
    return Roster(tuple(people), str(path))


def match_all(
    roster: Roster | None, names: Iterable[str], role: str
) -> tuple[dict[str, str], list[tuple[str, str]]]:
    """(name -> roster id, refusal reasons) for every name; no roster: ({}, [])."""
    if roster is None:
        return {}, []
    ids: dict[str, str] = {}
    reasons: list[tuple[str, str]] = []
    for name in names:
        found = roster.find(name)
        if not found:
            reasons.append(
                ("approval.not_on_roster", f"{role} {name!r} is not on the site roster {roster.source}")
            )
        elif len(found) > 1:
            reasons.append(
                (
                    "approval.ambiguous",
                    f"{role} {name!r} matches several people on the roster "
                    f"({', '.join(p.id for p in found)}); use a name only one of them has",
                )
            )
        else:
            ids[name] = found[0].id
    return ids, reasons
