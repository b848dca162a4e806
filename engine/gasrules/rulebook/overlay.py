"""Stage 2b: resolve the `extends` chain into one rulebook, guarding the base's bounds.

A site overlay may override parameter values (inside the base's guard-rail bounds, or among
its choices), add inputs, parameters, derived values and rules with new ids, suspend base rules
with a reason, and set display units and presentation entries. Every item remembers which file
(and where in it) defined it, and every parameter which file set its value.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import Location, Problem, RulebookError
from gasrules.rulebook.loader import Document, Limits, load_document
from gasrules.rulebook.schema import validate_document


@dataclass(frozen=True)
class Ref:
    """A place in a loaded document."""

    doc: Document
    path: tuple[Any, ...]

    def loc(self, *sub: Any) -> Location:
        return self.doc.locate(self.path + sub)


@dataclass
class Resolved:
    metadata: dict[str, Any]
    metadata_ref: Ref
    inputs: dict[str, tuple[dict[str, Any], Ref]] = field(default_factory=dict)
    parameters: dict[str, tuple[dict[str, Any], Ref]] = field(default_factory=dict)
    param_set_by: dict[str, Ref] = field(default_factory=dict)  # where `value` was set
    param_by_set_by: dict[str, dict[str, Ref]] = field(
        default_factory=dict
    )  # code -> where by.values[code] was set
    derived: dict[str, tuple[dict[str, Any], Ref]] = field(default_factory=dict)
    rules: list[tuple[dict[str, Any], Ref]] = field(default_factory=list)
    steps: dict[str, tuple[dict[str, Any], Ref]] = field(default_factory=dict)
    presentation: dict[str, Any] = field(default_factory=dict)
    display_units: dict[str, Any] = field(default_factory=dict)
    suspensions: list[tuple[str, str, Ref]] = field(default_factory=list)
    constraints: list[tuple[dict[str, Any], Ref]] = field(default_factory=list)
    documents: list[Document] = field(default_factory=list)
    base_ids: list[str] = field(default_factory=list)
    bibliography: Any = None  # gasrules.rulebook.bibliography.Bibliography, loaded by the compiler
    bibliography_problems: list[Problem] = field(default_factory=list)


def load_chain(path: str | Path, limits: Limits | None = None) -> tuple[list[Document], list[Problem]]:
    """Load a rulebook and everything it extends, base first. Each is schema-checked.

    A file reached through ``extends`` that is not a rulebook (not a regular file, too large,
    outside the configured roots, not YAML, not a rulebook mapping) is refused at the ``extends``
    that names it, and nothing of its content is echoed."""
    limits = limits or Limits.from_env()
    docs: list[Document] = []
    problems: list[Problem] = []
    seen: set[Path] = set()
    current: Path | None = Path(path)
    referrer: Location | None = None
    while current is not None:
        real = current.resolve()
        if real in seen:
            problems.append(
                Problem(
                    "RB-E004",
                    f"extends cycle back to {current}",
                    referrer or Location(str(current)),
                    "a chain of overlays ending in a base rulebook",
                )
            )
            break
        seen.add(real)
        doc, probs = load_document(current, _display(current), limits)
        if doc is None and referrer is not None and probs and probs[0].code == "RB-E003":
            problems.append(
                Problem(
                    "RB-E004",
                    f"extends names a file that cannot be read: {current}",
                    referrer,
                    "a path relative to the overlay file",
                )
            )
        elif referrer is not None and (probs or doc is None or not _looks_like_rulebook(doc.data)):
            why = probs[0] if probs else None
            reason = (
                f"{why.code} {why.message}" + (f" at line {why.location.line}" if why.location.line else "")
                if why
                else "it is not a rulebook (no format/metadata mapping)"
            )
            problems.append(
                Problem(
                    "RB-E004",
                    f"extends names {current}, which cannot be used: {reason}",
                    referrer,
                    "a path relative to the overlay file, to a regular rulebook file",
                )
            )
            break
        problems.extend(probs)
        if doc is None or probs:
            break
        schema_problems = validate_document(doc)
        problems.extend(schema_problems)
        docs.append(doc)
        if schema_problems and isinstance(doc.data, dict) and isinstance(doc.data.get("extends"), str):
            problems.extend(
                _partial_unknown_entries(
                    doc, schema_problems, current.parent / doc.data["extends"], limits, seen
                )
            )
        if schema_problems or not isinstance(doc.data, dict):
            break
        ext = doc.data.get("extends")
        if ext:
            referrer = doc.locate(("extends",))
            current = current.parent / ext
        else:
            current = None
    docs.reverse()
    return docs, problems


def resolve_path(path: str | Path, limits: Limits | None = None) -> Resolved:
    """The resolved rulebook at ``path``: its extends chain loaded and merged. Raises
    RulebookError with every problem of the first stage that has any (loading, then resolving)."""
    docs, problems = load_chain(path, limits)
    if problems:
        raise RulebookError(problems)
    res, problems = resolve(docs)
    if problems:
        raise RulebookError(problems)
    return res


def _partial_unknown_entries(
    doc: Document, schema_problems: list[Problem], base: Path, limits: Limits, seen: set[Path]
) -> list[Problem]:
    """An overlay's input or rule that is not a full definition (the schema says what it lacks)
    and whose name the base does not have: most likely a misspelt override. Say so, with the
    closest base name."""
    if base.resolve() in seen:
        return []
    base_docs, base_problems = load_chain(base, limits)
    if base_problems:
        return []
    inputs = {n for d in base_docs for n in (d.data.get("inputs") or {})}
    rules = {str(r.get("id")) for d in base_docs for r in (d.data.get("rules") or []) if isinstance(r, dict)}
    broken = {p.location.path for p in schema_problems}

    def flagged(prefix: str) -> bool:
        return any(b == prefix or b.startswith(prefix + ".") or b.startswith(prefix + "[") for b in broken)

    out = []
    for name in doc.data.get("inputs") or {}:
        if name not in inputs and flagged(f"inputs.{name}"):
            out.append(
                Problem(
                    "RB-E047",
                    f"overlay overrides input '{name}', which the base does not declare"
                    f"{did_you_mean(name, sorted(inputs))}",
                    doc.locate(("inputs", name)),
                    "the name of a base input (inputs cannot be overridden), or a full definition",
                )
            )
    for i, rule in enumerate(doc.data.get("rules") or []):
        rid = rule.get("id") if isinstance(rule, dict) else None
        if isinstance(rid, str) and rid not in rules and flagged(f"rules[{i}]"):
            out.append(
                Problem(
                    "RB-E047",
                    f"overlay rule '{rid}' is not a full definition and the base has no rule "
                    f"of that id{did_you_mean(rid, sorted(rules))}",
                    doc.locate(("rules", i, "id")),
                    "a full rule (status, step, findings), or suspend the base rule",
                )
            )
    return out


def _looks_like_rulebook(data: Any) -> bool:
    return (
        isinstance(data, dict)
        and isinstance(data.get("format"), str)
        and isinstance(data.get("metadata"), dict)
    )


def _display(path: Path) -> str:
    try:
        return str(path.resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(path)


def resolve(docs: list[Document]) -> tuple[Resolved, list[Problem]]:
    base = docs[0]
    problems: list[Problem] = []
    res = Resolved(metadata=copy.deepcopy(base.data["metadata"]), metadata_ref=Ref(base, ("metadata",)))
    res.documents = list(docs)
    _take_base(res, base)
    for overlay in docs[1:]:
        res.base_ids.append(f"{res.metadata['id']}@{res.metadata['version']}")
        problems.extend(_apply_overlay(res, overlay))
    return res, problems


def _take_base(res: Resolved, doc: Document) -> None:
    data = doc.data
    for section in ("inputs", "parameters", "derived", "steps"):
        target = getattr(res, section)
        for name, body in (data.get(section) or {}).items():
            target[name] = (copy.deepcopy(body), Ref(doc, (section, name)))
    for name, (body, _ref) in res.parameters.items():
        res.param_set_by[name] = Ref(doc, ("parameters", name))
        for code in (body.get("by") or {}).get("values") or {}:
            res.param_by_set_by.setdefault(name, {})[code] = Ref(
                doc, ("parameters", name, "by", "values", code)
            )
    for i, rule in enumerate(data.get("rules") or []):
        res.rules.append((copy.deepcopy(rule), Ref(doc, ("rules", i))))
    res.presentation = copy.deepcopy(data.get("presentation") or {})
    res.display_units = copy.deepcopy(data.get("display_units") or {})
    for i, s in enumerate(data.get("suspend") or []):
        res.suspensions.append((s["rule"], s["reason"], Ref(doc, ("suspend", i))))
    _take_constraints(res, doc)


def _take_constraints(res: Resolved, doc: Document) -> None:
    for i, body in enumerate(doc.data.get("constraints") or []):
        res.constraints.append((copy.deepcopy(body), Ref(doc, ("constraints", i))))


def _apply_overlay(res: Resolved, doc: Document) -> list[Problem]:
    data = doc.data
    problems: list[Problem] = []
    res.metadata = copy.deepcopy(data["metadata"])
    res.metadata_ref = Ref(doc, ("metadata",))
    for section in ("inputs", "derived", "steps"):
        target = getattr(res, section)
        for name, body in (data.get(section) or {}).items():
            if name in target:
                problems.append(
                    Problem(
                        "RB-E044",
                        f"overlay redefines base {section[:-1] if section != 'derived' else 'derived value'} '{name}'",
                        doc.locate((section, name)),
                        "a new name; only parameters can be overridden",
                    )
                )
                continue
            target[name] = (copy.deepcopy(body), Ref(doc, (section, name)))
    for name, body in (data.get("parameters") or {}).items():
        ref = Ref(doc, ("parameters", name))
        if name not in res.parameters and not _full_parameter(body):
            problems.append(
                Problem(
                    "RB-E047",
                    f"overlay overrides parameter '{name}', which the base does not "
                    f"declare{did_you_mean(name, res.parameters)}",
                    ref.loc(),
                    "the name of a base parameter, or a full definition (unit and bounds or "
                    "choices) to add a new one",
                )
            )
            continue
        if name not in res.parameters:
            res.parameters[name] = (copy.deepcopy(body), ref)
            res.param_set_by[name] = ref
            for code in (body.get("by") or {}).get("values") or {}:
                res.param_by_set_by.setdefault(name, {})[code] = Ref(
                    doc, ("parameters", name, "by", "values", code)
                )
            continue
        problems.extend(_override(res, name, body, ref))
    base_ids = {r.get("id") for r, _ in res.rules}
    for i, rule in enumerate(data.get("rules") or []):
        if rule.get("id") in base_ids:
            problems.append(
                Problem(
                    "RB-E044",
                    f"overlay redefines base rule '{rule['id']}'",
                    doc.locate(("rules", i, "id")),
                    "a new rule id (suspend the base rule instead)",
                )
            )
            continue
        res.rules.append((copy.deepcopy(rule), Ref(doc, ("rules", i))))
    for i, s in enumerate(data.get("suspend") or []):
        res.suspensions.append((s["rule"], s["reason"], Ref(doc, ("suspend", i))))
    for key, value in (data.get("presentation") or {}).items():
        if isinstance(value, dict):
            res.presentation.setdefault(key, {}).update(value)
        else:
            res.presentation[key] = value
    res.display_units.update(data.get("display_units") or {})
    _take_constraints(res, doc)
    return problems


def _full_parameter(body: Any) -> bool:
    return isinstance(body, dict) and "unit" in body and ("bounds" in body or "choices" in body)


def did_you_mean(name: str, known: Any) -> str:
    """ "; did you mean 'x'?" for the closest known name, or ""."""
    import difflib

    close = difflib.get_close_matches(str(name), [str(k) for k in known], n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


def _override(res: Resolved, name: str, body: dict[str, Any], ref: Ref) -> list[Problem]:
    base, base_ref = res.parameters[name]
    problems: list[Problem] = []
    for key in ("unit", "bounds", "choices"):
        if key in body and body[key] != base.get(key):
            problems.append(
                Problem(
                    "RB-E041",
                    f"overlay may not change the {key} of parameter '{name}'",
                    ref.loc(key),
                    f"{key} as in the base ({base.get(key)})",
                )
            )
    if "by" in body and body["by"].get("input") != (base.get("by") or {}).get("input"):
        problems.append(
            Problem(
                "RB-E041",
                f"overlay may not change which input selects parameter '{name}'",
                ref.loc("by", "input"),
                f"by.input {((base.get('by') or {}).get('input'))}",
            )
        )
    merged = copy.deepcopy(base)
    if "value" in body:
        problems.extend(_guard(name, body["value"], base, base_ref, ref.loc("value")))
        merged["value"] = body["value"]
    if "by" in body:
        for key, value in (body["by"].get("values") or {}).items():
            problems.extend(_guard(name, value, base, base_ref, ref.loc("by", "values", key)))
        merged.setdefault("by", {"input": body["by"]["input"], "values": {}})
        merged["by"]["values"].update(body["by"].get("values") or {})
    for key in ("rationale", "source", "label"):
        if key in body:
            merged[key] = body[key]
    if not problems:
        res.parameters[name] = (merged, base_ref)
        if "value" in body or "by" not in body:
            res.param_set_by[name] = ref
        for code in (body.get("by") or {}).get("values") or {}:
            res.param_by_set_by.setdefault(name, {})[code] = Ref(ref.doc, ref.path + ("by", "values", code))
    return problems


def _guard(name: str, value: Any, base: dict[str, Any], base_ref: Ref, where: Location) -> list[Problem]:
    if "choices" in base:
        if value not in base["choices"]:
            return [
                Problem(
                    "RB-E042",
                    f"'{value}' is not a choice of parameter '{name}'",
                    where,
                    "one of " + ", ".join(base["choices"]),
                )
            ]
        return []
    bounds = base.get("bounds")
    if isinstance(value, str) or isinstance(value, bool):
        return [Problem("RB-E041", f"parameter '{name}' takes a number, not {value!r}", where, "a number")]
    if bounds and not bounds["min"] <= value <= bounds["max"]:
        bl = base_ref.loc("bounds")
        return [
            Problem(
                "RB-E040",
                f"override of '{name}' to {value:g} is outside the base guard rails "
                f"[{bounds['min']:g}, {bounds['max']:g}] set at {bl}",
                where,
                f"a value from {bounds['min']:g} to {bounds['max']:g}",
            )
        ]
    return []
