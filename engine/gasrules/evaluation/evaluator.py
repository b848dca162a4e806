"""Stage 4: evaluate one case with a compiled rulebook. A pure function of (rulebook, case).

read the input record -> convert units -> check plausibility -> run the generated function
-> assemble the result contract (schemas/result.schema.json) with its trace.
A bad input rejects the whole case with errors naming each field; a missing input only makes
the rules that need it skip; a calculation error only makes that value not assessable.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from gasrules.core import units as U
from gasrules.core.model import CompiledRulebook, reads_closure
from gasrules.evaluation.trace import RuleTrace
from gasrules.rulebook.codegen import FIRED, HALTED, MISSING, PLACEHOLDER, SKIPPED, link
from gasrules.rulebook.expressions import round_at

SCHEMA_VERSION = "1.1"
NOT_ANALYTES = ("case_id", "context")
# A reader that could not parse a row passes {UNREADABLE: "file:line: what was wrong"} (plus
# case_id when known) so that the row becomes a rejected result instead of disappearing.
UNREADABLE = "__unreadable__"
_TRUE = {"true", "yes", "1", "y"}
_STATUS_RANK = {"interpreted": 0, "partial": 1, "inconsistent": 2}
_FALSE = {"false", "no", "0", "n"}


@dataclass
class Static:
    """Per-rulebook tables, built once when the rulebook is linked."""

    blank: dict[str, Any]
    identity: dict[str, str]
    rule_traces: list[RuleTrace]
    value_index: dict[str, int]
    reported: tuple[tuple[int, str, float, str], ...]  # (index, name, scale, unit)
    step_rules: dict[str, list[int]]
    conversions: dict[tuple[str, str], tuple[float, float]]
    known_units: frozenset[str]
    accepted_keys: str
    templates: dict[tuple[str, int], tuple[Any, ...]] = field(default_factory=dict)
    value_needs: tuple[
        tuple[int, str, tuple[str, ...], tuple[str, ...]], ...
    ] = ()  # (index, name, inputs, derived)
    fallbacks: tuple[tuple[str, int, str], ...] = ()  # (input, index of its fallback value, flag it sets)
    always_rules: frozenset[str] = frozenset()  # rules that run whatever else happens (critical values)
    engine_set: dict[str, str] = field(default_factory=dict)  # flag set by the engine -> the input it marks


def prepare(rb: CompiledRulebook) -> Static:
    rule_order = [name for kind, name in rb.plan if kind == "rule"]
    by_id = {r.id: r for r in rb.rules}
    value_index = {n: i for i, n in enumerate(rb.value_names)}
    traces = [RuleTrace.of(by_id[rid], rb) for rid in rule_order]
    reported = tuple(
        (value_index[n], n, 10.0**d.precision, d.unit)
        for n, d in rb.derived.items()
        if d.report and n in value_index
    )
    reported = tuple(sorted(reported))
    step_rules: dict[str, list[int]] = {}
    for i, rid in enumerate(rule_order):
        step_rules.setdefault(by_id[rid].step, []).append(i)
    conversions: dict[tuple[str, str], tuple[float, float]] = {}
    for spec in rb.inputs.values():
        for alt, (factor, offset) in spec.alternatives.items():
            conversions[(spec.unit, alt)] = (factor, offset)
    known = (
        frozenset(U.UCUM_CODES)
        | {s.unit for s in rb.inputs.values()}
        | {a for s in rb.inputs.values() for a in s.alternatives}
    )
    blank = {n: (s.default if s.kind != "number" else None) for n, s in rb.inputs.items()}
    static = Static(
        blank=blank,
        identity=rb.identity,
        rule_traces=traces,
        value_index=value_index,
        reported=reported,
        step_rules=step_rules,
        conversions=conversions,
        known_units=known,
        accepted_keys=", ".join(sorted(rb.inputs)),
    )
    for r in rb.rules:
        for j, f in enumerate(r.findings):
            static.templates[(r.id, j)] = _template(rb, static, f.text)
    static.value_needs = tuple(
        (i, name, tuple(sorted(n for n in reads_closure(name, rb.derived) if n in rb.inputs)), ())
        for i, name, _s, _u in reported
    )
    static.fallbacks = tuple(
        (n, value_index[s.fallback], s.fallback_marks)
        for n, s in rb.inputs.items()
        if s.fallback is not None and s.fallback_marks is not None and s.fallback in value_index
    )
    static.always_rules = frozenset(r.id for r in rb.rules if r.always)
    static.engine_set = {marks: name for name, _i, marks in static.fallbacks}
    return static


def ready(rb: CompiledRulebook) -> Static:
    """The evaluator's tables for ``rb``, linking its generated function first when the rulebook
    arrived without it (unpickled in a worker process)."""
    static: Static | None = rb._static
    if static is None:
        if rb._function is None:
            link(rb)
        static = rb._static = prepare(rb)
    return static


def _template(rb: CompiledRulebook, static: Static, text: str) -> tuple[Any, ...]:
    """A finding text split into literal strings and placeholder renderers, built once.
    A renderer is ("v", index, ...) for a derived value, ("i", name, ...) for an input, or a
    literal string (a parameter without `by`, rendered now)."""
    parts: list[Any] = []
    pos = 0
    for m in PLACEHOLDER.finditer(text):
        parts.append(text[pos : m.start()])
        pos = m.end()
        name = m.group(1)
        if name in static.value_index:
            d = rb.derived[name]
            parts.append(("v", static.value_index[name]) + _display_spec(rb, static, d.unit, d.precision))
        elif name in rb.inputs:
            spec = rb.inputs[name]
            if spec.kind != "number":
                parts.append(("c", name))
            else:
                parts.append(("i", name) + _display_spec(rb, static, spec.unit, spec.precision))
        else:
            p = rb.parameters[name]
            if p.by_input:
                parts.append(("p", p))
            else:
                parts.append(_param_text(rb, static, p, p.value))
    parts.append(text[pos:])
    return tuple(x for x in parts if x != "")


def _display_spec(
    rb: CompiledRulebook, static: Static, unit: str, precision: int
) -> tuple[float, float, float, int, str]:
    """(factor, offset, scale, precision, label) turning a canonical value into displayed text."""
    target = rb.display_units.get(unit)
    factor, offset, to_unit, to_prec = 1.0, 0.0, unit, precision
    if target is not None and (unit, target[0]) in static.conversions:
        factor, offset = static.conversions[(unit, target[0])]
        to_unit = target[0]
        to_prec = target[1] if target[1] is not None else max(0, precision + round(math.log10(abs(factor))))
    lab = U.label(to_unit)
    return (factor, offset, 10.0**to_prec, to_prec, (" " + lab) if lab else "")


def _show(value: float, spec: tuple[float, float, float, int, str]) -> str:
    """A canonical value as displayed: converted, rounded at its precision, with its unit label."""
    factor, offset, scale, prec, lab = spec
    return f"{round_at((value - offset) / factor, scale):.{prec}f}{lab}"


def _param_text(rb: CompiledRulebook, static: Static, p: Any, value: Any) -> str:
    if isinstance(value, str):
        return value.replace("_", " ")
    return _show(value, _display_spec(rb, static, p.unit, _precision_of(value)))


def _render(
    rb: CompiledRulebook, parts: tuple[Any, ...], inputs: dict[str, Any], vals: tuple[Any, ...]
) -> str:
    out = []
    for part in parts:
        if part.__class__ is str:
            out.append(part)
            continue
        kind = part[0]
        if kind == "v" or kind == "i":
            v = vals[part[1]] if kind == "v" else inputs.get(part[1])
            out.append("not available" if v is None else _show(v, part[2:]))
        elif kind == "c":
            v = inputs.get(part[1])
            out.append("not given" if v is None else str(v).replace("_", " "))
        else:
            p = part[1]
            out.append(_param_text(rb, rb._static, p, p.value_for(inputs.get(p.by_input))))
    return "".join(out)


# ----------------------------------------------------------------------------- reading a case


def _error(field_: str, code: str, message: str, accepted: str) -> dict[str, str]:
    return {"field": field_, "code": code, "message": message, "accepted": accepted}


def read_case(rb: CompiledRulebook, case: Any) -> tuple[dict[str, Any], list[dict[str, str]], Any, Any]:
    """(canonical inputs, errors, case_id, context). Inputs not given are None (or their default)."""
    static = ready(rb)
    values = dict(static.blank)
    if not isinstance(case, Mapping):
        return (
            values,
            [
                _error(
                    "",
                    "input.not_an_object",
                    f"a case must be a JSON object, not {type(case).__name__}",
                    "an object of input names to values",
                )
            ],
            None,
            None,
        )
    errors: list[dict[str, str]] = []
    if UNREADABLE in case:
        return (
            values,
            [_error("", "input.unreadable", str(case[UNREADABLE]), "a JSON object per case")],
            case.get("case_id"),
            None,
        )
    case_id = case.get("case_id")
    if case_id is not None and not isinstance(case_id, str):
        errors.append(
            _error(
                "case_id",
                "input.bad_case_id",
                f"case_id must be a string, not {type(case_id).__name__}",
                "a string",
            )
        )
    context = case.get("context")
    if context is not None and not isinstance(context, Mapping):
        errors.append(_error("context", "input.bad_context", "context must be an object", "a JSON object"))
    elif context is not None:
        where = _not_strict_json(context, "context", 1)
        if where is not None:
            errors.append(_error(where[0], "input.not_strict_json", f"{where[0]} {where[1]}", _STRICT_JSON))
            context = None
    for key, raw in case.items():
        if key in NOT_ANALYTES:
            continue
        spec = rb.inputs.get(key)
        if spec is None:
            errors.append(
                _error(
                    str(key),
                    "input.unknown_key",
                    f"'{key}' is not an input of rulebook {rb.id}",
                    "one of " + static.accepted_keys + ", case_id, context",
                )
            )
            continue
        owner = static.engine_set.get(key)
        if owner is not None:
            errors.append(
                _error(
                    key,
                    "input.engine_set",
                    f"{key} is set by the engine when {owner} is calculated",
                    f"leave {key} out; give {owner} when it was measured",
                )
            )
            continue
        if raw is None:
            continue
        if spec.kind == "code":
            text = raw.strip().lower() if isinstance(raw, str) else raw
            if text in spec.codes:
                values[key] = text
            else:
                errors.append(
                    _error(
                        key,
                        "input.unknown_code",
                        f"{key} = {_brief(raw)} is not an accepted code",
                        "one of " + ", ".join(spec.codes),
                    )
                )
            continue
        if spec.kind == "flag":
            flag = _flag(raw)
            if flag is None:
                errors.append(
                    _error(
                        key, "input.bad_flag", f"{key} = {_brief(raw)} is not true or false", "true or false"
                    )
                )
            else:
                values[key] = flag
            continue
        value, err = _number(rb, spec, key, raw)
        if err is not None:
            errors.append(err)
        else:
            values[key] = value
    return values, errors, case_id, context


MAX_CONTEXT_DEPTH = 32
MAX_INT = 2**63 - 1
_STRICT_JSON = (
    f"strict JSON: finite numbers, integers within \u00b1{MAX_INT}, string keys, at most "
    f"{MAX_CONTEXT_DEPTH} levels of nesting"
)


def _brief(raw: Any) -> str:
    """A value for a message: short, and safe for any depth or size."""
    if isinstance(raw, Mapping):
        return "an object"
    if isinstance(raw, (list, tuple)):
        return "a list"
    if isinstance(raw, int) and not isinstance(raw, bool) and abs(raw) > MAX_INT:
        return "an integer too large to read"
    text = repr(raw)
    return text if len(text) <= 60 else text[:57] + "..."


def _not_strict_json(value: Any, path: str, depth: int) -> tuple[str, str] | None:
    """(path, what is wrong) for the first part of ``value`` that strict JSON cannot carry."""
    if depth > MAX_CONTEXT_DEPTH:
        return path, f"nests deeper than {MAX_CONTEXT_DEPTH} levels"
    if isinstance(value, Mapping):
        for k, v in value.items():
            if not isinstance(k, str):
                return path, f"has a key that is not a string ({type(k).__name__})"
            found = _not_strict_json(v, f"{path}.{k}", depth + 1)
            if found is not None:
                return found
        return None
    if isinstance(value, (list, tuple)):
        for i, v in enumerate(value):
            found = _not_strict_json(v, f"{path}[{i}]", depth + 1)
            if found is not None:
                return found
        return None
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return None
    if isinstance(value, int):
        return None if abs(value) <= MAX_INT else (path, "is an integer too large for strict JSON")
    if isinstance(value, float):
        return None if math.isfinite(value) else (path, f"is {value}, not a finite number")
    return path, f"is a {type(value).__name__}, not a JSON value"


def _flag(raw: Any) -> bool | None:
    if isinstance(raw, bool):
        return raw
    if isinstance(raw, (int, float)) and raw in (0, 1):
        return bool(raw)
    if isinstance(raw, str):
        t = raw.strip().lower()
        if t in _TRUE:
            return True
        if t in _FALSE:
            return False
    return None


def _number(
    rb: CompiledRulebook, spec: Any, key: str, raw: Any
) -> tuple[float | None, dict[str, str] | None]:
    cls = raw.__class__
    if cls is float or (cls is int and -MAX_INT <= raw <= MAX_INT):  # the common case: a plain number
        value = float(raw)
        lo, hi = spec.plausible_min, spec.plausible_max
        if (
            value == value
            and (lo is None or value >= lo)
            and (hi is None or value <= hi)
            and value - value == 0
        ):
            return value, None
    static: Static = rb._static
    unit = spec.unit
    accepted_units = ", ".join([spec.unit] + list(spec.alternatives))
    if isinstance(raw, int) and not isinstance(raw, bool) and abs(raw) > MAX_INT:
        return None, _error(
            key, "input.too_large", f"{key} is an integer too large to read", f"a number in {spec.unit}"
        )
    if isinstance(raw, Mapping):
        if "value" not in raw or set(raw) - {"value", "unit"}:
            return None, _error(
                key,
                "input.bad_form",
                f"{key} must be a number or {{value, unit}}",
                f'a number in {spec.unit}, or {{"value": x, "unit": one of {accepted_units}}}',
            )
        given = raw.get("unit")
        raw = raw["value"]
        if given is not None:
            if not isinstance(given, str):
                return None, _error(key, "input.unknown_unit", f"unit of {key} must be text", accepted_units)
            code = U.normalise(given)
            if code is None or (code not in static.known_units):
                return None, _error(
                    key,
                    "input.unknown_unit",
                    f"unit '{given}' of {key} is not a known unit",
                    "one of " + accepted_units,
                )
            if code != spec.unit and code not in spec.alternatives:
                return None, _error(
                    key,
                    "input.unit_mismatch",
                    f"unit '{given}' does not fit {key}",
                    "one of " + accepted_units,
                )
            unit = code
    if isinstance(raw, bool) or not isinstance(raw, (int, float, str)):
        return None, _error(
            key, "input.not_a_number", f"{key} = {_brief(raw)} is not a number", f"a number in {spec.unit}"
        )
    if isinstance(raw, int) and not isinstance(raw, bool) and abs(raw) > MAX_INT:
        return None, _error(
            key, "input.too_large", f"{key} is an integer too large to read", f"a number in {spec.unit}"
        )
    if isinstance(raw, str):
        try:
            raw = float(raw.strip())
        except ValueError:
            return None, _error(
                key,
                "input.not_a_number",
                f"{key} = {_brief(raw)} is not a number",
                f"a number in {spec.unit}",
            )
    value = float(raw)
    if not math.isfinite(value):
        return None, _error(key, "input.not_finite", f"{key} is {value}", "a finite number")
    if unit != spec.unit:
        factor, offset = spec.alternatives[unit]
        value = value * factor + offset
    lo, hi = spec.plausible_min, spec.plausible_max
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        shown = f"{value:g} {U.label(spec.unit)}".strip()
        return None, _error(
            key,
            "input.out_of_range",
            f"{key} = {shown} is outside the plausible range",
            f"{lo:g} to {hi:g} {U.label(spec.unit)}".strip(),
        )
    return value, None


# ----------------------------------------------------------------------------- evaluating


def interpret(rb: CompiledRulebook, case: Any, trace: bool = True) -> dict[str, Any]:
    """The result contract for one case. Never raises for bad input: it is rejected with errors."""
    static = ready(rb)
    inputs, errors, case_id, context = read_case(rb, case)
    result: dict[str, Any] = {
        "schema_version": SCHEMA_VERSION,
        "case_id": case_id if isinstance(case_id, str) else None,
        "context": dict(context) if isinstance(context, Mapping) else {},
        "rulebook": dict(static.identity),
        "engine_version": rb.engine_version,
    }
    if errors:
        return _rejected(rb, result, inputs, errors, trace)
    inputs, calculated = _apply_fallbacks(rb, inputs)
    events: list[Any] | None = [] if trace else None
    vals, states, calc_errors, outcomes, _codes = rb._function(inputs, events)
    return assemble(rb, result, inputs, vals, states, calc_errors, outcomes, events, calculated)


def _apply_fallbacks(rb: CompiledRulebook, inputs: dict[str, Any]) -> tuple[dict[str, Any], list[str]]:
    """Inputs not given but declaring a `fallback` take the fallback's value (computed from the
    other inputs by a first run) when it is available and plausible; the input's marking flag is
    set so that rules can say the value was calculated. Returns (inputs, names calculated)."""
    static: Static = rb._static
    todo = [f for f in static.fallbacks if inputs.get(f[0]) is None]
    if not todo:
        return inputs, []
    vals = rb._function(inputs, None)[0]
    out, calculated = dict(inputs), []
    for name, index, marks in todo:
        value = vals[index]
        spec = rb.inputs[name]
        if value is None or not math.isfinite(value):
            continue
        if (spec.plausible_min is not None and value < spec.plausible_min) or (
            spec.plausible_max is not None and value > spec.plausible_max
        ):
            continue
        out[name], out[marks] = round_at(value, 10.0**spec.precision), True  # as it will be shown
        calculated.append(name)
    return out, calculated


def _rejected(
    rb: CompiledRulebook,
    result: dict[str, Any],
    inputs: dict[str, Any],
    errors: list[dict[str, str]],
    trace: bool,
) -> dict[str, Any]:
    """A rejected case is not interpreted, but the rules that always run (critical values) still
    run on the fields that were read, so that a critical value is never hidden by another field's
    error. Their findings and headline phrases are returned; everything else stays empty."""
    static: Static = rb._static
    pres = rb.presentation
    events: list[Any] | None = [] if trace else None
    vals, _states, _errs, outcomes, _codes = rb._function(inputs, events)
    findings: list[dict[str, Any]] = []
    phrases: list[str] = []
    for i, outcome in enumerate(outcomes):
        rule = static.rule_traces[i].rule
        if outcome != FIRED or rule.id not in static.always_rules:
            continue
        for j, f in enumerate(rule.findings):
            findings.append(_finding(rb, rule, j, f, inputs, vals))
            if f.headline and f.severity == "critical":
                phrases.append(f.headline)
    findings.sort(key=lambda f: 0 if f["severity"] == "critical" else 1)
    rejected = pres.get("headline", {}).get("rejected", "Input rejected")
    named = ", ".join(_unique([e["field"] for e in errors if e["field"]]))
    headline = "; ".join(_unique(phrases + [rejected + (f" ({named})" if named else "")]))
    kept = [e for e in (events or []) if e.get("rule") in static.always_rules]
    result.update(
        status="rejected",
        headline=headline,
        errors=errors,
        inputs={},
        values={},
        units={},
        findings=findings,
        disorders=[],
        qualifiers={},
        not_assessed=[
            {"what": "interpretation", "why": "input rejected: " + "; ".join(e["message"] for e in errors)}
        ],
        cautions=list(pres.get("cautions", [])),
        trace=kept,
        calculated=[],
    )
    return result


def assemble(
    rb: CompiledRulebook,
    result: dict[str, Any],
    inputs: dict[str, Any],
    vals: tuple[Any, ...],
    states: tuple[int, ...],
    calc_errors: dict[str, str],
    outcomes: list[int],
    events: list[Any] | None,
    calculated: list[str] | None = None,
) -> dict[str, Any]:
    static: Static = rb._static
    pres = rb.presentation
    values: dict[str, float] = {}
    units: dict[str, str] = {}
    for i, name, scale, unit in static.reported:
        v = vals[i]
        if v is not None:
            values[name] = round_at(v, scale)
            units[name] = unit
    rule_traces = static.rule_traces
    findings: list[dict[str, Any]] = []
    disorders: list[str] = []
    qualifiers: dict[str, str] = {}
    conflicts: dict[str, list[str]] = {}
    qual_from: dict[str, str] = {}
    qual_where: dict[str, Any] = {}
    headlines: list[tuple[int, str, str]] = []
    caution_texts: list[str] = []
    status = "interpreted"
    for i, outcome in enumerate(outcomes):
        if outcome != FIRED:
            continue
        rt = rule_traces[i]
        rule = rt.rule
        if rule.result_status and _STATUS_RANK[rule.result_status] > _STATUS_RANK[status]:
            status = rule.result_status
        for code in rule.disorders:
            if code not in disorders:
                disorders.append(code)
        for code, qual in rule.qualifiers.items():
            if code in qualifiers and qualifiers[code] != qual:
                conflicts.setdefault(
                    code, [f"{qualifiers[code]} ({qual_from[code]}, {qual_where[code]})"]
                ).append(f"{qual} ({rule.id}, {rule.location})")
            if code not in qualifiers:
                qualifiers[code], qual_from[code], qual_where[code] = qual, rule.id, rule.location
        for j, f in enumerate(rule.findings):
            finding = _finding(rb, rule, j, f, inputs, vals)
            text = finding["text"]
            findings.append(finding)
            if f.headline:
                headlines.append((0 if f.severity == "critical" else 1, f.category, f.headline))
            if f.caution:
                caution_texts.append(text)
    not_assessed = _not_assessed(rb, static, outcomes, states, vals, calc_errors, inputs)
    for code, quals in conflicts.items():
        qualifiers.pop(code, None)
        not_assessed.append(
            {"what": f"qualifier of {code}", "why": "eval.conflict: rules asserted " + " and ".join(quals)}
        )
    if status == "inconsistent":
        disorders, qualifiers = [], {}
    elif status == "interpreted" and any(n.get("core") for n in not_assessed):
        status = "partial"
    core_missing = [n["what"] for n in not_assessed if n.get("core")]
    for n in not_assessed:
        n.pop("core", None)
    findings.sort(key=lambda f: 0 if f["severity"] == "critical" else 1)
    marks = static.engine_set
    result.update(
        status=status,
        headline=_headline(pres, status, disorders, qualifiers, headlines, core_missing),
        errors=[],
        inputs={k: v for k, v in inputs.items() if v is not None and k not in marks},
        values=values,
        units=units,
        findings=findings,
        disorders=disorders,
        qualifiers=qualifiers,
        not_assessed=not_assessed,
        cautions=caution_texts + list(pres.get("cautions", [])),
        trace=events if events is not None else [],
        calculated=list(calculated or ()),
    )
    return result


def _finding(
    rb: CompiledRulebook, rule: Any, j: int, f: Any, inputs: dict[str, Any], vals: tuple[Any, ...]
) -> dict[str, Any]:
    """The result entry of finding ``j`` of a rule that fired, its text rendered."""
    return {
        "code": f.code,
        "category": f.category,
        "severity": f.severity,
        "text": _render(rb, rb._static.templates[(rule.id, j)], inputs, vals),
        "rule": rule.id,
    }


def _precision_of(value: float) -> int:
    text = f"{float(value):.6f}".rstrip("0")
    return len(text.split(".")[1]) if "." in text else 0


def format_quantity(rb: CompiledRulebook, value: Any, unit: str, precision: int) -> str:
    """A canonical value in the rulebook's display units (e.g. mm[Hg] -> kPa), with its unit."""
    if value is None:
        return "not available"
    return _show(float(value), _display_spec(rb, ready(rb), unit, precision))


def _not_assessed(
    rb: CompiledRulebook,
    static: Static,
    outcomes: list[int],
    states: tuple[int, ...],
    vals: tuple[Any, ...],
    calc_errors: dict[str, str],
    inputs: dict[str, Any],
) -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = []
    traces = static.rule_traces
    halted: list[str] = []
    for step, idx in static.step_rules.items():
        if any(outcomes[i] < 2 or outcomes[i] == 5 for i in idx):  # some rule in the step was decided
            continue
        live = [i for i in idx if outcomes[i] != 4]  # suspended rules do not count
        if not live:
            continue
        if all(outcomes[i] == HALTED for i in live):
            halted.append(rb.steps[step].label)
            continue
        if all(outcomes[i] in (SKIPPED, HALTED) for i in live):
            missing = sorted(
                {
                    n
                    for i in live
                    if outcomes[i] == SKIPPED
                    for n in traces[i].missing(inputs, vals, static.value_index)
                }
            )
            out.append(
                {
                    "what": rb.steps[step].label,
                    "why": "needs " + ", ".join(missing),
                    "core": rb.steps[step].core,
                }
            )
    groups: dict[str, list[str]] = {}
    for i, name, need_inputs, need_derived in static.value_needs:
        if states[i] != MISSING:
            continue
        missing = [n for n in need_inputs if inputs.get(n) is None]
        groups.setdefault(", ".join(missing), []).append(name)
    for why, names in groups.items():
        out.append(
            {
                "what": ", ".join(names),
                "core": False,
                "why": "needs " + why if why else "a value it depends on does not apply to this case",
            }
        )
    if halted:
        stoppers = [traces[i].rule.id for i, o in enumerate(outcomes) if o == FIRED and traces[i].rule.stop]
        out.insert(
            0,
            {
                "what": ", ".join(halted),
                "core": False,
                "why": "not evaluated: rule " + ", ".join(stoppers) + " stopped the interpretation",
            },
        )
    for name, err in calc_errors.items():
        what = rb.derived[name].label if name in rb.derived else f"rule {name}"
        out.append({"what": what, "why": f"eval.calculation_error: {err}", "core": False})
    return out


def _headline(
    pres: dict[str, Any],
    status: str,
    disorders: list[str],
    qualifiers: dict[str, str],
    headlines: list[tuple[int, str, str]],
    core_missing: list[str] | None = None,
) -> str:
    """Critical phrases first, then the pH state, the disorders, then other phrases (e.g. hypoxaemia).
    A phrase already said by a disorder's label is not repeated. "No disorder" is never said beside
    an abnormal pH: the headline then says the cause was not identified and what was not assessed."""
    words = pres.get("headline", {})
    critical = [h for s, c, h in headlines if s == 0]
    if status == "inconsistent":
        critical = [h for s, c, h in headlines if s == 0 and c == "critical"]
        return "; ".join(_unique(critical + [words.get("inconsistent", "Values inconsistent")]))
    labels = pres.get("disorder_labels", {})
    qlabels = pres.get("qualifier_labels", {})
    parts = []
    for code in disorders:
        text = labels.get(code, code)
        if code in qualifiers:
            text += f" ({qlabels.get(qualifiers[code], qualifiers[code])})"
        parts.append(text)
    said = set(_words(" ".join(parts + critical)))
    state = [h for s, c, h in headlines if s == 1 and c == "ph_state"]
    others = [h for s, c, h in headlines if s == 1 and c != "ph_state" and not set(_words(h)) <= said]
    if parts:
        main = " + ".join(parts)
    elif state:
        main = words.get("abnormal_ph_unexplained", "cause not identified from the values given")
        if core_missing:
            main += " (not assessed: " + ", ".join(core_missing) + ")"
    else:
        main = words.get("no_disorder", "No acid-base disorder identified")
    return "; ".join(_unique(critical + state + [main] + others))


_WORD = re.compile(r"[a-z0-9]+")


def _words(text: str) -> list[str]:
    return _WORD.findall(text.lower())


def _unique(items: list[str]) -> list[str]:
    seen: set[str] = set()
    return [x for x in items if not (x in seen or seen.add(x))]  # type: ignore[func-returns-value]
