"""The decision trace: one typed event per rule, in evaluation order.

Each event says what the rule is, its outcome (fired, not_fired, skipped_missing_input,
halted, suspended, error), what it read (inputs and derived values with their values,
parameters with their value and the file:line that set them), and for every numeric comparison
in its condition the value as compared (at its reported precision), the threshold, the margin
between them, whether the comparison held (None when short-circuit logic never evaluated it)
and whether it was decisive: forcing it alone the other way would change the outcome. Events are plain JSON-ready dicts described by :class:`TraceEvent`;
reading them aloud is :func:`gasrules.evaluation.render.render_trace`'s job.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, TypedDict

from gasrules.core.model import CompiledRulebook, RuleSpec
from gasrules.rulebook.codegen import ERROR, FIRED, HALTED, NOT_FIRED, OUTCOMES, SKIPPED, SUSPENDED
from gasrules.rulebook.expressions import Oracle, round_at


class Comparison(TypedDict):
    quantity: str
    value: float | None  # full value
    compared: float | None  # the value at its reported precision (what the rule compared)
    op: str
    threshold: str  # a parameter name or a literal
    threshold_value: float | None
    margin: float | None  # compared - threshold_value
    holds: bool | None  # the comparison's value; None when it was not evaluated (short-circuit)
    decisive: bool  # forcing this comparison alone the other way would change the outcome


class TraceEvent(TypedDict, total=False):
    rule: str
    step: str
    title: str
    outcome: str  # one of OUTCOMES
    reads: dict[str, Any]  # input and derived names -> value (None when unavailable)
    parameters: dict[str, dict[str, Any]]  # name -> {value, unit, set_by}
    comparisons: list[Comparison]
    missing: list[str]  # skipped_missing_input: the needed names that were unavailable
    reason: str  # suspended: why; error: the calculation error
    asserted: list[str]  # fired: the finding and disorder codes it asserted


@dataclass
class RuleTrace:
    """What the trace needs to know about one rule, computed once per rulebook."""

    rule: RuleSpec
    head: dict[str, str]
    value_reads: tuple[tuple[str, bool], ...]  # (name, is_input)
    needs: tuple[tuple[str, bool], ...]
    parameters: dict[str, dict[str, Any]]
    by_params: tuple[tuple[str, str, Any], ...]  # (param, selecting input, ParamSpec)
    comparisons: tuple[
        tuple[str, bool, float, str, str, str, float, int], ...
    ]  # (quantity, is_input, scale, op, threshold, kind, scale, node)
    asserted: list[str]
    scales: dict[str, float]  # numeric reads -> 10**precision (compared rounded)

    @classmethod
    def of(cls, rule: RuleSpec, rb: CompiledRulebook) -> RuleTrace:
        reads = set(rule.when.reads) if rule.when else set()
        reads |= set(rule.needs)
        value_reads = tuple((n, n in rb.inputs) for n in sorted(reads) if n in rb.inputs or n in rb.derived)
        needs = tuple((n, n in rb.inputs) for n in sorted(rule.needs) if n in rb.inputs or n in rb.derived)
        params: dict[str, dict[str, Any]] = {}
        by_params = []
        for n in sorted(reads):
            p = rb.parameters.get(n)
            if p is None:
                continue
            if p.by_input:
                by_params.append((n, p.by_input, p))
            params[n] = {"value": p.value, "unit": p.unit, "set_by": str(p.set_by)}
        comps = []
        for c in rb.cutpoints:
            if c.owner != rule.id or c.field != "when":
                continue
            comps.append(
                (
                    c.quantity,
                    c.quantity in rb.inputs,
                    _scale(rb, c.quantity),
                    c.op,
                    c.threshold,
                    c.threshold_kind,
                    _scale(rb, c.threshold),
                    c.node,
                )
            )
        head = {"rule": rule.id, "step": rule.step, "title": rule.title}
        scales = {
            n: _scale(rb, n)
            for n, is_input in value_reads
            if (rb.inputs[n].kind == "number" if is_input else True)
        }
        return cls(
            rule,
            head,
            value_reads,
            needs,
            params,
            tuple(by_params),
            tuple(comps),
            sorted(rule.asserts),
            scales,
        )

    def missing(self, inputs: dict[str, Any], vals: tuple[Any, ...], index: dict[str, int]) -> list[str]:
        out = []
        for name, is_input in self.needs:
            v = inputs.get(name) if is_input else vals[index[name]]
            if v is None:
                out.append(name)
        return out


def _scale(rb: CompiledRulebook, name: str) -> float:
    if name in rb.inputs:
        return 10.0 ** rb.inputs[name].precision
    if name in rb.derived:
        return 10.0 ** rb.derived[name].precision
    return 1.0


def _value(
    name: str, is_input: bool, inputs: dict[str, Any], vals: tuple[Any, ...], index: dict[str, int]
) -> Any:
    return inputs.get(name) if is_input else vals[index[name]]


def build_trace(
    traces: list[RuleTrace],
    outcomes: list[int],
    inputs: dict[str, Any],
    vals: tuple[Any, ...],
    index: dict[str, int],
    calc_errors: dict[str, str],
) -> list[TraceEvent]:
    events: list[TraceEvent] = []
    codes: set[str] = set()  # asserted by the rules before this one
    for rt, outcome in zip(traces, outcomes):
        ev: TraceEvent = dict(rt.head)  # type: ignore[assignment]
        ev["outcome"] = OUTCOMES[outcome]
        if outcome == SUSPENDED:
            ev["reason"] = rt.rule.suspended_reason
        if outcome in (SUSPENDED, HALTED):
            events.append(ev)
            continue
        ev["reads"] = {n: _value(n, i, inputs, vals, index) for n, i in rt.value_reads}
        if rt.parameters:
            params = {k: dict(v) for k, v in rt.parameters.items()}  # fresh dicts: results share nothing
            for name, selector, spec in rt.by_params:
                p = dict(params[name])
                p["value"] = spec.value_for(inputs.get(selector))
                p["set_by"] = str(spec.set_by_for(inputs.get(selector)))
                p["selected_by"] = f"{selector}={inputs.get(selector)}"
                params[name] = p
            ev["parameters"] = params
        if outcome == SKIPPED:
            ev["missing"] = rt.missing(inputs, vals, index)
        elif outcome == ERROR:
            ev["reason"] = calc_errors.get(rt.rule.id, "")
        elif outcome in (FIRED, NOT_FIRED) and rt.comparisons:
            ev["comparisons"] = _comparisons(rt, ev, inputs, vals, index, codes, outcome == FIRED)
        if outcome == FIRED:
            ev["asserted"] = rt.asserted
            codes |= set(rt.asserted)
        events.append(ev)
    return events


def _decisions(
    rt: RuleTrace, ev: TraceEvent, codes: set[str], fired: bool
) -> tuple[dict[int, bool], dict[int, bool]]:
    """(value of each evaluated comparison, whether forcing it alone the other way changes the
    outcome), by simpleeval's own evaluator."""
    values: dict[str, Any] = dict(ev.get("reads", {}))
    for name, p in (ev.get("parameters") or {}).items():
        values[name] = p["value"]
    rounded = {n: round_at(v, rt.scales[n]) for n, v in values.items() if n in rt.scales and v is not None}
    first = Oracle(values, rounded, codes)
    try:
        first.run(rt.rule.when)  # type: ignore[arg-type]
    except (ArithmeticError, ValueError, TypeError):
        pass
    seen = dict(first.seen)
    decisive: dict[int, bool] = {}
    for k, value in seen.items():
        try:
            decisive[k] = bool(Oracle(values, rounded, codes, {k: not value}).run(rt.rule.when)) != fired  # type: ignore[arg-type]
        except (ArithmeticError, ValueError, TypeError):
            decisive[k] = False
    return seen, decisive


def _comparisons(
    rt: RuleTrace,
    ev: TraceEvent,
    inputs: dict[str, Any],
    vals: tuple[Any, ...],
    index: dict[str, int],
    codes: set[str],
    fired: bool,
) -> list[Comparison]:
    out: list[Comparison] = []
    params = ev.get("parameters", {})
    seen, decisive = _decisions(rt, ev, codes, fired)
    for quantity, is_input, scale, op, threshold, kind, tscale, node in rt.comparisons:
        v = _value(quantity, is_input, inputs, vals, index)
        if kind == "parameter":
            tvalue = params[threshold]["value"]
        elif kind == "constant":
            tvalue = float(threshold)
        else:
            tv = _value(threshold, kind == "input", inputs, vals, index)
            tvalue = None if tv is None else round_at(tv, tscale)
        compared = None if v is None else round_at(v, scale)
        margin = None if compared is None or tvalue is None else round(compared - tvalue, 9)
        out.append(
            {
                "quantity": quantity,
                "value": v,
                "compared": compared,
                "op": op,
                "threshold": threshold,
                "threshold_value": tvalue,
                "margin": margin,
                "holds": seen.get(node),
                "decisive": decisive.get(node, False),
            }
        )
    return out
