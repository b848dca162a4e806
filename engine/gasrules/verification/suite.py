"""The validation suite: load a rulebook's reference cases, run them, compare, measure coverage.

cases/*.yaml beside a rulebook (schemas/cases.schema.json) -> run every case -> compare what each
case wants with what the engine gave -> rule coverage (every active rule fired and not fired
somewhere) -> threshold coverage (for every cut-point of gasrules.list_cutpoints, cases whose
compared quantity, at its reported precision, lies one step below, at and one step above it,
counted only where that comparison decides its rule) -> probe suggestions found by bisection
over the inputs that feed the compared quantity.

An overlay's suite is its own case files plus the base rulebook's reference cases, minus the
base cases it lists under ``supersedes`` (each with a reason). Threshold probes (case files with
``kind: probes``) are never inherited: an overlay derives its own from its own cut-points.
"""

from __future__ import annotations

import ast
import math
import os
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from gasrules.core.errors import Location, Problem, ProblemsError
from gasrules.core.model import CompiledRulebook
from gasrules.rulebook.expressions import Oracle, round_at
from gasrules.rulebook.loader import load_document
from gasrules.rulebook.schema import validate_document

CASES_SCHEMA = "cases.schema.json"
SIDES = ("below", "at", "above")
EVIDENCE_TAGS = ("S", "SR", "M", "D", "CP", "INV")
# Codes of problems in case files (never reused for another meaning).
CASE_CODES: dict[str, str] = {
    "CS-E001": "case file cannot be read or is not valid YAML",
    "CS-E002": "case file does not match schemas/cases.schema.json",
    "CS-E003": "duplicate case id",
    "CS-E004": "supersedes names a case the base suite does not hold",
    "CS-E005": "case names a rule, disorder, finding or value the rulebook does not declare",
    "CS-E006": "case evidence cites a key the rulebook's bibliography does not declare",
}
_FLIP = {"<": ">", "<=": ">=", ">": "<", ">=": "<=", "==": "==", "!=": "!="}
_OPS = {
    "<": lambda a, b: a < b,
    "<=": lambda a, b: a <= b,
    ">": lambda a, b: a > b,
    ">=": lambda a, b: a >= b,
    "==": lambda a, b: a == b,
    "!=": lambda a, b: a != b,
}
_EPS = 1e-9


class SuiteError(ProblemsError):
    """Case files could not be loaded: carries every problem, sorted by file and line."""

    what = "case file"


# ----------------------------------------------------------------------------- loading


@dataclass(frozen=True)
class Case:
    id: str
    note: str
    evidence: dict[str, str]
    input: dict[str, Any]
    want: dict[str, Any] | None
    want_error_code: str | None
    location: Location
    origin: str  # the rulebook file whose cases/ folder holds it
    probe: dict[str, Any] | None = None
    skip: str | None = None
    refs: tuple[tuple[str, Location], ...] = ()  # bibliography keys its evidence cites, and where


@dataclass
class Suite:
    cases: list[Case]
    superseded: list[dict[str, str]] = field(default_factory=list)  # {case, reason, by}
    files: list[str] = field(default_factory=list)
    unreachable: list[dict[str, Any]] = field(default_factory=list)  # stated coverage exceptions


def rulebook_chain(path: str | Path) -> list[Path]:
    """The rulebook and every rulebook it extends, the given one first."""
    chain: list[Path] = []
    current: Path | None = Path(path)
    while current is not None and current.resolve() not in [p.resolve() for p in chain]:
        chain.append(current)
        with open(current, encoding="utf-8") as fh:
            data = yaml.load(fh, Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader)) or {}
        ext = data.get("extends") if isinstance(data, dict) else None
        current = Path(os.path.normpath(current.parent / ext)) if ext else None
    return chain


def load_case_file(path: Path) -> tuple[dict[str, Any] | None, list[Case], list[Problem]]:
    """One case file: its data, its cases (with locations) and its problems."""
    doc, problems = load_document(path, str(path))
    if doc is None or problems:
        return None, [], [Problem("CS-E001", p.message, p.location, p.expected) for p in problems]
    schema_problems = [
        Problem("CS-E002", p.message, p.location, p.expected) for p in validate_document(doc, CASES_SCHEMA)
    ]
    if schema_problems:
        return None, [], schema_problems
    cases = []
    for i, c in enumerate(doc.data["cases"]):
        cases.append(
            Case(
                id=c["id"],
                note=c["note"],
                evidence=c["evidence"],
                input=c["input"],
                want=c.get("want"),
                want_error_code=c.get("want_error_code"),
                location=doc.locate(("cases", i)),
                origin=str(path),
                probe=c.get("probe"),
                skip=c.get("skip"),
                refs=_evidence_refs(doc, i, c),
            )
        )
    for j, s in enumerate(doc.data.get("supersedes") or []):
        s["_location"] = doc.locate(("supersedes", j))
    return doc.data, cases, []


def _evidence_refs(doc: Any, i: int, case: dict[str, Any]) -> tuple[tuple[str, Location], ...]:
    """The bibliography keys a case's evidence (and its expected values' evidence) cites, with locations."""
    from gasrules.rulebook.bibliography import keys_of

    spots: list[tuple[Any, tuple[Any, ...]]] = [(case.get("evidence"), ("cases", i, "evidence"))]
    for name, v in (((case.get("want") or {}).get("values")) or {}).items():
        spots.append(
            (
                v.get("evidence") if isinstance(v, dict) else None,
                ("cases", i, "want", "values", name, "evidence"),
            )
        )
    out = []
    for ev, path in spots:
        ref = (ev or {}).get("ref")
        for j, key in enumerate(keys_of(ref)):
            out.append((key, doc.locate(path + (("ref",) if isinstance(ref, str) else ("ref", j)))))
    return tuple(out)


def check_refs(rb: CompiledRulebook, suite: Suite) -> list[Problem]:
    """Every bibliography key a case's evidence cites must be declared by the rulebook (CS-E006)."""
    from gasrules.rulebook.bibliography import Bibliography, unknown_key

    bib = rb.bibliography or Bibliography()
    return [
        unknown_key(key, bib, where, "CS-E006")
        for c in suite.cases
        for key, where in c.refs
        if key not in bib
    ]


def unused_entries(rb: CompiledRulebook, suite: Suite) -> list[str]:
    """Bibliography keys nothing cites: no parameter, rule or case of this rulebook and its suite."""
    from gasrules.rulebook.bibliography import keys_of

    if rb.bibliography is None:
        return []
    used = {k for p in rb.parameters.values() for k in keys_of(p.source.get("ref"))}
    used |= {
        item if isinstance(item, str) else (item or {}).get("ref")
        for r in rb.rules
        for item in (r.doc.get("references") or [])
    }
    used |= {key for c in suite.cases for key, _ in c.refs}
    return sorted(k for k in rb.bibliography.entries if k not in used)


def load_suite(rulebook_path: str | Path, cases_dir: str | Path | None = None) -> Suite:
    """Own cases (from cases_dir or cases/ beside the rulebook) plus inherited base reference cases."""
    chain = rulebook_chain(rulebook_path)
    problems: list[Problem] = []
    suite = Suite(cases=[])
    supersedes: list[dict[str, Any]] = []
    own: list[Case] = []
    inherited: list[Case] = []
    for depth, rb_path in enumerate(chain):
        folder = Path(cases_dir) if (depth == 0 and cases_dir is not None) else rb_path.parent / "cases"
        for f in sorted(folder.glob("*.yaml")) if folder.is_dir() else []:
            data, cases, probs = load_case_file(f)
            problems += probs
            if data is None or (depth > 0 and data.get("kind") == "probes"):
                continue
            suite.files.append(str(f))
            if depth == 0:
                supersedes += [dict(s, by=str(f)) for s in data.get("supersedes") or []]
                suite.unreachable += [dict(u, file=str(f)) for u in data.get("unreachable") or []]
                own += cases
            else:
                inherited += cases
    dropped = {s["case"]: s for s in supersedes}
    base_ids = {c.id for c in inherited}
    for s in supersedes:
        if s["case"] not in base_ids:
            problems.append(
                Problem(
                    "CS-E004",
                    f"supersedes names '{s['case']}', which no base case file holds",
                    s["_location"],
                    "the id of a case in the base rulebook's cases/",
                )
            )
    for c in inherited:
        if c.id in dropped:
            if not any(x["case"] == c.id for x in suite.superseded):
                suite.superseded.append(
                    {"case": c.id, "reason": dropped[c.id]["reason"], "by": dropped[c.id]["by"]}
                )
            continue
        own.append(c)
    seen: dict[str, Location] = {}
    for c in own:
        if c.id in seen:
            problems.append(
                Problem(
                    "CS-E003",
                    f"duplicate case id '{c.id}' (first at {seen[c.id]})",
                    c.location,
                    "a unique id (an overlay replaces a base case by superseding it)",
                )
            )
        seen.setdefault(c.id, c.location)
    suite.cases = own
    if problems:
        raise SuiteError(problems)
    return suite


def check_names(rb: CompiledRulebook, suite: Suite) -> list[Problem]:
    """Every rule, disorder, finding and value a case names must exist in the rulebook."""
    from gasrules.rulebook.compiler import DISORDER_CODES

    rules = {r.id for r in rb.rules}
    findings = {f.code for r in rb.rules for f in r.findings}
    values = {n for n, d in rb.derived.items() if d.report}
    out = []
    for c in suite.cases:
        w = c.want or {}
        bad = [
            f"rule '{x}'" for k in ("rules_fired", "rules_not_fired") for x in w.get(k, []) if x not in rules
        ]
        bad += [
            f"disorder '{x}'"
            for k in ("disorders", "disorders_include", "disorders_exclude")
            for x in w.get(k, [])
            if x not in DISORDER_CODES
        ]
        bad += [
            f"finding '{x}'"
            for k in ("findings_include", "findings_exclude")
            for x in w.get(k, [])
            if x not in findings
        ]
        bad += [f"value '{x}'" for x in list(w.get("values", {})) if x not in values]
        bad += [
            f"value '{x}'"
            for k in ("values_present", "values_absent")
            for x in w.get(k, [])
            if x not in rb.derived
        ]
        for b in bad:
            out.append(
                Problem(
                    "CS-E005",
                    f"case '{c.id}' names unknown {b}",
                    c.location,
                    f"a name declared by rulebook {rb.id}",
                )
            )
    return out + check_refs(rb, suite)


# ----------------------------------------------------------------------------- running and comparing


@dataclass
class Failure:
    what: str
    expected: Any
    got: Any
    rules: list[str] = field(default_factory=list)  # the rules whose trace explains it


@dataclass
class CaseResult:
    case: Case
    outcome: str  # passed | failed | skipped
    failures: list[Failure]
    result: dict[str, Any] | None


def case_input(case: Case) -> dict[str, Any]:
    return dict(case.input, case_id=case.id)


def run_suite(rb: CompiledRulebook, suite: Suite) -> list[CaseResult]:
    from gasrules.evaluation.evaluator import interpret

    out = []
    for c in suite.cases:
        if c.skip:
            out.append(CaseResult(c, "skipped", [], None))
            continue
        result = interpret(rb, case_input(c))
        failures = compare(rb, c, result)
        out.append(CaseResult(c, "failed" if failures else "passed", failures, result))
    return out


def _asserting(rb: CompiledRulebook, code: str) -> list[str]:
    return [r.id for r in rb.rules if code in r.asserts]


def compare(rb: CompiledRulebook, case: Case, result: dict[str, Any]) -> list[Failure]:
    """Every way the result differs from what the case wants."""
    fails: list[Failure] = []
    if case.want_error_code is not None:
        codes = [e["code"] for e in result["errors"]]
        if result["status"] != "rejected" or case.want_error_code not in codes:
            fails.append(Failure("error code", case.want_error_code, codes or result["status"]))
        return fails
    w = case.want or {}
    if "status" in w and result["status"] != w["status"]:
        stoppers = [r.id for r in rb.rules if r.stop or r.result_status]
        fails.append(Failure("status", w["status"], result["status"], stoppers))
    got = set(result["disorders"])
    if "disorders" in w and got != set(w["disorders"]):
        diff = got ^ set(w["disorders"])
        fails.append(
            Failure(
                "disorders",
                sorted(w["disorders"]),
                sorted(got),
                [r for d in sorted(diff) for r in _asserting(rb, d)],
            )
        )
    for d in w.get("disorders_include", []):
        if d not in got:
            fails.append(Failure(f"disorder {d}", "present", "absent", _asserting(rb, d)))
    for d in w.get("disorders_exclude", []):
        if d in got:
            fails.append(Failure(f"disorder {d}", "absent", "present", _asserting(rb, d)))
    codes = {f["code"] for f in result["findings"]}
    for f in w.get("findings_include", []):
        if f not in codes:
            fails.append(Failure(f"finding {f}", "present", "absent", _asserting(rb, f)))
    for f in w.get("findings_exclude", []):
        if f in codes:
            fails.append(Failure(f"finding {f}", "absent", "present", _asserting(rb, f)))
    for d, q in (w.get("qualifiers") or {}).items():
        if result["qualifiers"].get(d) != q:
            fails.append(
                Failure(
                    f"qualifier of {d}",
                    q,
                    result["qualifiers"].get(d),
                    [r.id for r in rb.rules if d in r.qualifiers],
                )
            )
    for name, spec in (w.get("values") or {}).items():
        v = result["values"].get(name)
        if v is None or abs(v - spec["value"]) > spec["tolerance"] + _EPS:
            fails.append(
                Failure(f"value {name}", f"{spec['value']} +/- {spec['tolerance']}", v, _readers(rb, name))
            )
    for name in w.get("values_present", []):
        if name not in result["values"]:
            fails.append(Failure(f"value {name}", "computed", "not computed", _readers(rb, name)))
    for name in w.get("values_absent", []):
        if name in result["values"]:
            fails.append(Failure(f"value {name}", "not computed", result["values"][name], _readers(rb, name)))
    outcomes = {e["rule"]: e["outcome"] for e in result["trace"]}
    for rid in w.get("rules_fired", []):
        if outcomes.get(rid) != "fired":
            fails.append(Failure(f"rule {rid}", "fired", outcomes.get(rid, "absent"), [rid]))
    for rid in w.get("rules_not_fired", []):
        if outcomes.get(rid) == "fired":
            fails.append(Failure(f"rule {rid}", "not fired", "fired", [rid]))
    return fails


def _readers(rb: CompiledRulebook, name: str) -> list[str]:
    return [r.id for r in rb.rules if r.when is not None and name in r.when.reads][:4]


# ----------------------------------------------------------------------------- rule coverage


def rule_coverage(
    rb: CompiledRulebook, results: list[CaseResult], unreachable: Iterable[dict[str, Any]] = ()
) -> dict[str, Any]:
    counts = {r.id: {"fired": 0, "not_fired": 0} for r in rb.rules if r.status == "active"}
    for cr in results:
        for ev in (cr.result or {}).get("trace", []):
            c = counts.get(ev["rule"])
            if c is not None and ev["outcome"] in c:
                c[ev["outcome"]] += 1
    excuses = {(u["rule"], u["outcome"]): u["reason"] for u in unreachable if "rule" in u}
    missing = [(r, o) for r, c in counts.items() for o in ("fired", "not_fired") if not c[o]]
    excused = [{"rule": r, "outcome": o, "reason": excuses[(r, o)]} for r, o in missing if (r, o) in excuses]
    stale = [{"rule": r, "outcome": o} for (r, o) in excuses if (r, o) not in missing]
    missing = [(r, o) for r, o in missing if (r, o) not in excuses]
    full = sum(1 for r, c in counts.items() if all(c[o] or (r, o) in excuses for o in c))
    covered = sum(1 for c in counts.values() if all(c[o] for o in c))
    return {
        "rules": len(counts),
        "both": full,
        "percent": _pct(full, len(counts)),
        "covered": covered,
        "declared_unreachable": full - covered,
        "summary": f"{covered} covered + {full - covered} declared unreachable of {len(counts)}",
        "never_fired": sorted(r for r, o in missing if o == "fired"),
        "never_not_fired": sorted(r for r, o in missing if o == "not_fired"),
        "excused": excused,
        "stale_excuses": stale,
        "suspended": sorted(r.id for r in rb.rules if r.status == "suspended"),
        "counts": counts,
    }


def _pct(n: int, d: int) -> float:
    return round(100.0 * n / d, 1) if d else 100.0


# ----------------------------------------------------------------------------- threshold coverage


def cutpoint_key(cp: dict[str, Any]) -> str:
    return f"{cp['owner']}: {cp['quantity']} {cp['op']} {cp['threshold']}"


def unique_cutpoints(rb: CompiledRulebook) -> list[dict[str, Any]]:
    from gasrules.rulebook.compiler import list_cutpoints

    seen: dict[str, dict[str, Any]] = {}
    for cp in list_cutpoints(rb):
        seen.setdefault(cutpoint_key(cp), cp)
    return list(seen.values())


def _precision(rb: CompiledRulebook, name: str) -> int | None:
    if name in rb.inputs:
        return rb.inputs[name].precision
    if name in rb.derived:
        return rb.derived[name].precision
    return None


def step_of(rb: CompiledRulebook, cp: dict[str, Any]) -> float:
    """One step of the compared quantity's reported precision (the coarser side if both are values)."""
    precs = [p for p in (_precision(rb, cp["quantity"]), _precision(rb, cp["threshold"])) if p is not None]
    return 10.0 ** -min(precs) if precs else 1.0


def side_of(margin: float | None, threshold: float | None, step: float) -> str | None:
    if margin is None or threshold is None:
        return None
    grid = round_at(threshold, 1 / step)  # the threshold on the quantity's grid
    d = round(margin + threshold - grid, 9)
    for side, k in zip(SIDES, (-1, 0, 1)):
        if abs(d - k * step) < step * 1e-6:
            return side
    return None


def op_truth(op: str, side: str) -> bool:
    """Whether `quantity op threshold` holds one step below, at, or one step above the threshold."""
    return _OPS[op]({"below": -1, "at": 0, "above": 1}[side], 0)


class _Forced(Oracle):
    """The oracle with one comparison (quantity op threshold) forced true or false."""

    def __init__(
        self,
        values: dict[str, Any],
        rounded: dict[str, Any],
        codes: set[str],
        target: tuple[str, str, str],
        forced: bool,
    ):
        super().__init__(values, rounded, codes)
        self._target, self._forced = target, forced

    def _eval_compare(self, node: ast.Compare) -> Any:
        left_node, result = node.left, True
        right = self._operand(left_node)
        for op, comp in zip(node.ops, node.comparators):
            if not result:
                break
            left, right = right, self._operand(comp)
            sym = type(op).__name__
            text = {"Lt": "<", "LtE": "<=", "Gt": ">", "GtE": ">=", "Eq": "==", "NotEq": "!="}[sym]
            if self._is_target(left_node, text, comp):
                result = self._forced
            else:
                result = _OPS[text](left, right)
            left_node = comp
        return result

    def _is_target(self, left: ast.AST, op: str, right: ast.AST) -> bool:
        q, top, t = self._target
        return (_ident(left) == q and op == top and _ident(right) == t) or (
            _ident(right) == q and _FLIP[op] == top and _ident(left) == t
        )


def _ident(node: ast.AST) -> str | None:
    if isinstance(node, ast.Name):
        return node.id
    if (
        isinstance(node, ast.Constant)
        and isinstance(node.value, (int, float))
        and not isinstance(node.value, bool)
    ):
        return repr(float(node.value))
    if (
        isinstance(node, ast.UnaryOp)
        and isinstance(node.op, ast.USub)
        and isinstance(node.operand, ast.Constant)
    ):
        return repr(-float(node.operand.value))
    return None


def decisive(
    rb: CompiledRulebook, result: dict[str, Any], cp: dict[str, Any]
) -> tuple[bool, bool | None, bool | None]:
    """(live, fires_if_true, fires_if_false): does this comparison decide its rule in this case?"""
    if cp["owner"] not in _rule_index(rb):
        return True, True, False  # a derived value's condition: it is the whole test
    rule = _rule_index(rb)[cp["owner"]]
    codes: set[str] = set()
    for ev in result["trace"]:
        if ev["rule"] == rule.id:
            break
        codes.update(ev.get("asserted", []))
    else:
        return False, None, None
    if ev["outcome"] not in ("fired", "not_fired") or rule.when is None:
        return False, None, None
    values: dict[str, Any] = {n: result["inputs"].get(n) for n in rb.inputs}
    values.update(ev.get("reads", {}))
    values.update({n: p["value"] for n, p in ev.get("parameters", {}).items()})
    rounded = {
        n: round_at(v, 10.0 ** _precision(rb, n))
        for n, v in values.items()  # type: ignore[operator]
        if _precision(rb, n) is not None and isinstance(v, (int, float)) and not isinstance(v, bool)
    }
    outs = []
    for forced in (True, False):
        try:
            outs.append(
                bool(
                    _Forced(values, rounded, codes, (cp["quantity"], cp["op"], cp["threshold"]), forced).run(
                        rule.when
                    )
                )
            )
        except Exception:
            return False, None, None
    return outs[0] != outs[1], outs[0], outs[1]


_RULES: dict[int, dict[str, Any]] = {}


def _rule_index(rb: CompiledRulebook) -> dict[str, Any]:
    idx = _RULES.get(id(rb))
    if idx is None or next(iter(idx.values()), None) not in rb.rules:
        idx = _RULES[id(rb)] = {r.id: r for r in rb.rules}
    return idx


def position(
    rb: CompiledRulebook, result: dict[str, Any], cp: dict[str, Any]
) -> tuple[float | None, float | None]:
    """(margin, threshold value) of a cut-point in one result, or (None, None)."""
    if result.get("status") == "rejected":
        return None, None
    if cp["owner"] in _rule_index(rb):
        for ev in result["trace"]:
            if ev["rule"] == cp["owner"]:
                for c in ev.get("comparisons", []):
                    if (c["quantity"], c["op"], c["threshold"]) == (
                        cp["quantity"],
                        cp["op"],
                        cp["threshold"],
                    ):
                        return c["margin"], c["threshold_value"]
        return None, None
    q = _known_value(rb, result, cp["quantity"])
    t = cp["value"]
    if cp["threshold_kind"] == "parameter":
        p = rb.parameters[cp["threshold"]]
        t = p.value_for(result["inputs"].get(p.by_input)) if p.by_input else p.value
    elif cp["threshold_kind"] in ("derived", "input"):
        t = _known_value(rb, result, cp["threshold"])
    if q is None or t is None:
        return None, None
    return round(q - t, 9), t


def _known_value(rb: CompiledRulebook, result: dict[str, Any], name: str) -> float | None:
    if name in result["inputs"]:
        return result["inputs"][name]
    if name in result["values"]:
        return result["values"][name]
    for ev in result["trace"]:
        v = (ev.get("reads") or {}).get(name)
        if v is not None:
            return round_at(v, 10.0 ** (_precision(rb, name) or 0))
    return None


def threshold_coverage(
    rb: CompiledRulebook, results: list[CaseResult], unreachable: Iterable[dict[str, Any]] = ()
) -> dict[str, Any]:
    excuses = {
        (u["cutpoint"], side): u["reason"] for u in unreachable if "cutpoint" in u for side in u["sides"]
    }
    rows = []
    for cp in unique_cutpoints(rb):
        step = step_of(rb, cp)
        found: dict[str, list[str]] = {s: [] for s in SIDES}
        for cr in results:
            if cr.result is None:
                continue
            margin, tval = position(rb, cr.result, cp)
            side = side_of(margin, tval, step)
            if side is not None and decisive(rb, cr.result, cp)[0]:
                found[side].append(cr.case.id)
        key = cutpoint_key(cp)
        rows.append(
            {
                "cutpoint": key,
                "owner": cp["owner"],
                "quantity": cp["quantity"],
                "op": cp["op"],
                "threshold": cp["threshold"],
                "threshold_kind": cp["threshold_kind"],
                "value": cp["value"],
                "step": step,
                "cases": found,
                "missing": [s for s in SIDES if not found[s] and (key, s) not in excuses],
                "excused": [s for s in SIDES if not found[s] and (key, s) in excuses],
            }
        )
    keys = {r["cutpoint"]: r for r in rows}
    excused = [
        {"cutpoint": k, "side": s, "reason": why}
        for (k, s), why in excuses.items()
        if k in keys and s in keys[k]["excused"]
    ]
    stale = [{"cutpoint": k, "side": s} for (k, s) in excuses if k not in keys or s not in keys[k]["excused"]]
    needed = 3 * len(rows) - len(excused)
    have = sum(3 - len(r["missing"]) - len(r["excused"]) for r in rows)
    return {
        "cutpoints": len(rows),
        "probes_needed": needed,
        "probes_found": have,
        "percent": _pct(have, needed),
        "declared_unreachable": len(excused),
        "summary": f"{have} covered + {len(excused)} declared unreachable of {3 * len(rows)}",
        "rows": rows,
        "excused": excused,
        "stale_excuses": stale,
        "missing": [{"cutpoint": r["cutpoint"], "sides": r["missing"]} for r in rows if r["missing"]],
    }


# ----------------------------------------------------------------------------- probe suggestion


def input_sources(rb: CompiledRulebook, name: str, _seen: frozenset[str] = frozenset()) -> list[str]:
    """The numeric inputs a name is computed from (itself for an input), in first-use order."""
    if name in rb.inputs:
        return [name] if rb.inputs[name].kind == "number" else []
    d = rb.derived.get(name)
    if d is None or name in _seen:
        return []
    out: list[str] = []
    exprs = [d.expr] + ([d.when] if d.when is not None else [])
    for e in exprs:
        for n in sorted(e.reads, key=lambda x: e.text.find(x)):
            for i in input_sources(rb, n, _seen | {name}):
                if i not in out:
                    out.append(i)
    return out


def _stop_inputs(rb: CompiledRulebook) -> set[str]:
    out: set[str] = set()
    for r in rb.rules:
        if r.stop and r.when is not None:
            for n in r.when.reads:
                out.update(input_sources(rb, n))
    return out


@dataclass
class Probe:
    cutpoint: dict[str, Any]
    side: str
    input: dict[str, Any]
    seed: str
    varied: str
    compared: float
    threshold_value: float
    fires: bool | None  # expected outcome of the owning rule (None: a derived value's condition)
    engine_agrees: bool


class _Search:
    """Bisection over one input of a seed case until the cut-point sits on the wanted side."""

    def __init__(self, rb: CompiledRulebook, cp: dict[str, Any], side: str, budget: int):
        self.rb, self.cp, self.side, self.budget = rb, cp, side, budget
        self.step = step_of(rb, cp)
        self.k = {"below": -1, "at": 0, "above": 1}[side]
        self.stoppers = {r.id for r in rb.rules if r.stop}
        self.preferred: str | None = None  # the repair input that worked last

    def run(self, inp: dict[str, Any]) -> dict[str, Any] | None:
        from gasrules.evaluation.evaluator import interpret

        if self.budget <= 0:
            return None
        self.budget -= 1
        return interpret(self.rb, inp)

    def distance(self, result: dict[str, Any] | None) -> float | None:
        """Signed distance, in reporting steps, from the wanted side (0 when on it)."""
        if result is None:
            return None
        margin, t = position(self.rb, result, self.cp)
        if margin is None or t is None:
            return None
        grid = round_at(t, 1 / self.step)
        return round((margin + t - grid) / self.step - self.k, 6)

    def halted(self, result: dict[str, Any]) -> bool:
        return any(e["rule"] in self.stoppers and e["outcome"] == "fired" for e in result["trace"])

    def repair(self, inp: dict[str, Any], fixed: set[str]) -> tuple[dict[str, Any], dict[str, Any] | None]:
        """Move one other input that a stopping rule reads, as little as possible, until no stop fires."""
        result = self.run(inp)
        if result is None or not self.halted(result):
            return inp, result
        for b in sorted(_stop_inputs(self.rb) - fixed, key=lambda n: (n != self.preferred, n)):
            b0 = inp.get(b)
            if not isinstance(b0, (int, float)) or isinstance(b0, bool):
                continue
            unit = 10.0 ** -self.rb.inputs[b].precision
            n = min(100, max(10, int(abs(b0) * 0.4 / unit)))
            for j in sorted(range(-n, n + 1), key=abs)[1:]:
                trial = dict(inp, **{b: round(b0 + j * unit, 6)})
                r = self.run(trial)
                if r is None:
                    return inp, None
                if r["status"] != "rejected" and not self.halted(r):
                    self.preferred = b
                    return trial, r
        return inp, result

    def measure(
        self, inp: dict[str, Any], a: str, x: float, fixed: set[str]
    ) -> tuple[float | None, dict[str, Any]]:
        trial = dict(inp, **{a: x})
        trial, result = self.repair(trial, fixed | {a})
        return self.distance(result), trial

    def solve(self, inp: dict[str, Any], a: str, fixed: set[str]) -> dict[str, Any] | None:
        spec = self.rb.inputs[a]
        x0 = float(inp[a])
        lo = spec.plausible_min if spec.plausible_min is not None else x0 - 10 * abs(x0) - 10
        hi = spec.plausible_max if spec.plausible_max is not None else x0 + 10 * abs(x0) + 10
        d0, t0 = self.measure(inp, a, x0, fixed)
        if d0 is None:
            return None
        if d0 == 0:
            return t0
        unit = 10.0**-spec.precision
        for sign in (1.0, -1.0):
            prev, dprev, delta = x0, d0, unit
            while self.budget > 0:
                x = x0 + sign * delta
                if not lo <= x <= hi:
                    break
                d, t = self.measure(inp, a, x, fixed)
                if d is not None and d == 0:
                    return self.neaten(inp, a, x, fixed) or t
                if d is not None and (d > 0) != (d0 > 0):
                    return self.bisect(inp, a, (prev, dprev), (x, d), fixed)
                if d is not None:
                    prev, dprev = x, d
                delta *= 2
        return None

    def bisect(
        self, inp: dict[str, Any], a: str, lo: tuple[float, float], hi: tuple[float, float], fixed: set[str]
    ) -> dict[str, Any] | None:
        for _ in range(48):
            mid = (lo[0] + hi[0]) / 2
            d, t = self.measure(inp, a, mid, fixed)
            if d is None:
                return None
            if d == 0:
                return self.neaten(inp, a, mid, fixed) or t
            if (d > 0) == (lo[1] > 0):
                lo = (mid, d)
            else:
                hi = (mid, d)
        return None

    def neaten(self, inp: dict[str, Any], a: str, x: float, fixed: set[str]) -> dict[str, Any] | None:
        """The same probe with the varied value rounded to as few decimals as still work."""
        for places in range(self.rb.inputs[a].precision, self.rb.inputs[a].precision + 6):
            d, t = self.measure(inp, a, round(x, places), fixed)
            if d == 0:
                return t
        return None


def suggest_probes(
    rb: CompiledRulebook,
    results: list[CaseResult],
    coverage: dict[str, Any],
    budget: int = 6000,
    max_seeds: int = 6,
) -> tuple[list[Probe], list[dict[str, Any]]]:
    """Probes for every missing side of every cut-point, found by bisection; and those not found."""
    cps = {cutpoint_key(cp): cp for cp in unique_cutpoints(rb)}
    stop_inputs = _stop_inputs(rb)
    probes: list[Probe] = []
    not_found: list[dict[str, Any]] = []
    usable = [cr for cr in results if cr.result is not None and cr.result["status"] != "rejected"]
    for row in coverage["rows"]:
        if not row["missing"]:
            continue
        cp = cps[row["cutpoint"]]
        sources = input_sources(rb, cp["quantity"])
        if cp["threshold_kind"] in ("derived", "input"):
            sources += [s for s in input_sources(rb, cp["threshold"]) if s not in sources]
        sources.sort(key=lambda s: s in stop_inputs)
        for side in row["missing"]:
            found = _find(rb, cp, side, usable, sources, budget, max_seeds)
            if found is None:
                not_found.append(
                    {
                        "cutpoint": row["cutpoint"],
                        "side": side,
                        "why": "no seed case and input found by bisection"
                        if sources
                        else "the compared quantity depends on no numeric input",
                    }
                )
            else:
                probes.append(found)
    return probes, not_found


def _find(
    rb: CompiledRulebook,
    cp: dict[str, Any],
    side: str,
    usable: list[CaseResult],
    sources: list[str],
    budget: int,
    max_seeds: int,
) -> Probe | None:
    search = _Search(rb, cp, side, budget)
    ranked = []
    for cr in usable:
        d = search.distance(cr.result)
        if d is not None:
            ranked.append((not decisive(rb, cr.result, cp)[0], abs(d), cr.case.id, cr))  # type: ignore[arg-type]
    ranked.sort(key=lambda t: t[:3])
    for _, _, _, cr in ranked[:max_seeds]:
        inp = {k: v for k, v in cr.case.input.items()}
        if any(isinstance(v, dict) for v in inp.values()):
            inp = {k: v for k, v in cr.result["inputs"].items()}  # type: ignore[index]
        for a in sources:
            if not isinstance(inp.get(a), (int, float)) or isinstance(inp.get(a), bool):
                continue
            trial = search.solve(inp, a, set(sources) - {a} if len(sources) > 1 else set())
            if trial is None:
                continue
            probe = _confirm(rb, cp, side, trial, cr.case.id, a)
            if probe is not None:
                return probe
            if search.budget <= 0:
                return None
    return None


def _confirm(
    rb: CompiledRulebook, cp: dict[str, Any], side: str, inp: dict[str, Any], seed: str, varied: str
) -> Probe | None:
    from gasrules.evaluation.evaluator import interpret

    result = interpret(rb, inp)
    margin, t = position(rb, result, cp)
    if side_of(margin, t, step_of(rb, cp)) != side:
        return None
    live, if_true, if_false = decisive(rb, result, cp)
    if not live:
        return None
    truth = op_truth(cp["op"], side)
    owner_is_rule = cp["owner"] in _rule_index(rb)
    if owner_is_rule:
        fires = if_true if truth else if_false
        actual = any(e["rule"] == cp["owner"] and e["outcome"] == "fired" for e in result["trace"])
    else:
        fires = truth
        actual = cp["owner"] in result["values"] or _known_value(rb, result, cp["owner"]) is not None
    return Probe(
        cp,
        side,
        inp,
        seed,
        varied,
        round(margin + t, 9),
        t,  # type: ignore[operator]
        fires,
        bool(actual) == bool(fires),
    )


def probe_evidence(rb: CompiledRulebook, cp: dict[str, Any], value: float | None = None) -> dict[str, Any]:
    """Evidence of a probe: the threshold's own source (D when published, CP for common practice)."""
    from gasrules.rulebook.bibliography import keys_of

    name = cp["threshold"]
    if cp["threshold_kind"] == "parameter":
        p = rb.parameters[name]
        tag = "CP" if p.source.get("evidence") == "CP" else "D"
        shown = p.value if value is None else value
        chosen = f" (value chosen by {p.by_input})" if p.by_input and shown != p.value else ""
        note = f"Cut-point {name} = {shown:g} {p.unit}{chosen}" + (
            f": {p.source['note']}" if p.source.get("note") else ""
        )
        return _evidence(tag, keys_of(p.source.get("ref")), note)
    if cp["threshold_kind"] == "derived":
        params = sorted({n for n in _param_names(rb, name)})
        keys = list(dict.fromkeys(k for n in params for k in keys_of(rb.parameters[n].source.get("ref"))))
        return _evidence("D", keys, f"Cut-point {name} = {rb.derived[name].expr.text}"[:600])
    return {
        "tag": "CP",
        "note": f"Cut-point {cp['quantity']} {cp['op']} {name} as written in rule {cp['owner']}",
    }


def _evidence(tag: str, keys: list[str], note: str) -> dict[str, Any]:
    out: dict[str, Any] = {"tag": tag}
    if keys:
        out["ref"] = keys[0] if len(keys) == 1 else keys
    out["note"] = note
    return out


def _param_names(rb: CompiledRulebook, name: str, seen: frozenset[str] = frozenset()) -> set[str]:
    if name in rb.parameters:
        return {name} if rb.parameters[name].choices is None else set()
    d = rb.derived.get(name)
    if d is None or name in seen:
        return set()
    out: set[str] = set()
    for e in [d.expr] + ([d.when] if d.when is not None else []):
        for n in e.reads:
            out |= _param_names(rb, n, seen | {name})
    return out


_OPWORD = {"<": "lt", "<=": "le", ">": "gt", ">=": "ge", "==": "eq", "!=": "ne"}


def probe_case(rb: CompiledRulebook, probe: Probe) -> dict[str, Any]:
    cp = probe.cutpoint
    ident = f"probe-{cp['owner']}-{cp['quantity']}-{_OPWORD[cp['op']]}-{cp['threshold']}-{probe.side}"
    ident = "".join(ch if ch.isalnum() or ch in "_.:+-" else "-" for ch in ident)[:120]
    owner_rule = cp["owner"] in _rule_index(rb)
    verb = "fires" if probe.fires else "does not fire"
    want: dict[str, Any]
    if owner_rule:
        want = {"rules_fired" if probe.fires else "rules_not_fired": [cp["owner"]]}
    else:
        verb = "is computed" if probe.fires else "is not computed"
        want = {"values_present" if probe.fires else "values_absent": [cp["owner"]]}
    note = (
        f"{cp['quantity']} {probe.compared:g} against {cp['threshold']} {probe.threshold_value:g} "
        f"(one reporting step {probe.side} it)"
        if probe.side != "at"
        else f"{cp['quantity']} {probe.compared:g} exactly at {cp['threshold']} {probe.threshold_value:g}"
    )
    note += f": {cp['owner']} {verb}. Seed case {probe.seed}, {probe.varied} moved."
    return {
        "id": ident,
        "note": note,
        "evidence": probe_evidence(rb, cp, probe.threshold_value),
        "input": probe.input,
        "want": want,
        "probe": {
            "owner": cp["owner"],
            "quantity": cp["quantity"],
            "op": cp["op"],
            "threshold": cp["threshold"],
            "side": probe.side,
            "compared": probe.compared,
            "threshold_value": probe.threshold_value,
        },
    }


class _FlowDumper(yaml.SafeDumper):
    pass


def _represent_dict(dumper: yaml.SafeDumper, data: dict[str, Any]) -> Any:
    flow = all(not isinstance(v, (dict, list)) for v in data.values()) and len(data) > 0
    return dumper.represent_mapping("tag:yaml.org,2002:map", data.items(), flow_style=flow)


def _represent_list(dumper: yaml.SafeDumper, data: list[Any]) -> Any:
    return dumper.represent_sequence(
        "tag:yaml.org,2002:seq", data, flow_style=all(not isinstance(v, (dict, list)) for v in data)
    )


_FlowDumper.add_representer(dict, _represent_dict)
_FlowDumper.add_representer(list, _represent_list)


def write_probes(path: str | Path, rb: CompiledRulebook, probes: list[Probe]) -> int:
    """Write (or extend) a `kind: probes` case file; returns the number of cases in it."""
    target = Path(path)
    existing: list[dict[str, Any]] = []
    if target.exists():
        with open(target, encoding="utf-8") as fh:
            data = yaml.safe_load(fh) or {}
        existing = list(data.get("cases") or [])
    new = [probe_case(rb, p) for p in probes]
    ids = {c["id"] for c in new}
    cases = [c for c in existing if c.get("id") not in ids] + new
    header = (
        f"# Threshold probes for rulebook {rb.id} {rb.version}, generated by `gasrules verify --suggest "
        "--write-probes`.\n# Each case sits one reporting step below, at or above one cut-point of "
        "gasrules.list_cutpoints, where\n# that comparison decides its rule; the expectation follows from "
        "the rule's definition on that side.\n"
    )
    body = yaml.dump(
        {"kind": "probes", "cases": cases}, Dumper=_FlowDumper, sort_keys=False, width=160, allow_unicode=True
    )
    target.write_text(header + body, encoding="utf-8")
    return len(cases)


def summary(suite: Suite, results: list[CaseResult]) -> dict[str, Any]:
    by_tag = {t: 0 for t in EVIDENCE_TAGS}
    for c in suite.cases:
        by_tag[c.evidence["tag"]] = by_tag.get(c.evidence["tag"], 0) + 1
    counts = {k: sum(1 for r in results if r.outcome == k) for k in ("passed", "failed", "skipped")}
    return {
        "cases": len(suite.cases),
        **counts,
        "by_evidence": by_tag,
        "superseded": len(suite.superseded),
        "probes": sum(1 for c in suite.cases if c.probe is not None),
    }


def finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x)
