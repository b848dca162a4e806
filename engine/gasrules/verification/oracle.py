"""The slow, independent evaluator: simpleeval's own tree walker over every expression.

Used by the tests (and `tools/bench_engine.py`) to check the generated function on thousands of
cases: same values, same rule outcomes, same asserted codes. It follows the plan order and the
semantics written in rulebooks/FORMAT.md, without sharing code with the code generator.
"""

from __future__ import annotations

from typing import Any

from gasrules.core.model import CompiledRulebook
from gasrules.rulebook.codegen import (
    CALC_ERROR,
    COMPUTED,
    ERROR,
    FIRED,
    HALTED,
    MISSING,
    NOT_APPLICABLE,
    NOT_FIRED,
    SKIPPED,
    SUSPENDED,
)
from gasrules.rulebook.expressions import Oracle, finite_float, round_at

_ERRORS = (ArithmeticError, ValueError, TypeError)


def oracle_evaluate(
    rb: CompiledRulebook, inputs: dict[str, Any]
) -> tuple[dict[str, Any], dict[str, int], list[int], set[str]]:
    """(values by name, state by derived name, outcome per rule in plan order, asserted codes)."""
    values: dict[str, Any] = dict(inputs)
    rounded: dict[str, Any] = {}
    for name, spec in rb.inputs.items():
        v = inputs.get(name)
        if spec.kind == "number" and v is not None:
            rounded[name] = round_at(v, 10.0**spec.precision)
    for name, p in rb.parameters.items():
        values[name] = p.value_for(inputs.get(p.by_input)) if p.by_input else p.value
    codes: set[str] = set()
    states: dict[str, int] = {}
    outcomes: list[int] = []
    halted = False
    by_id = {r.id: r for r in rb.rules}
    for kind, name in rb.plan:
        if kind == "derived":
            d = rb.derived[name]
            values[name] = None
            if any(values.get(n) is None for n in d.needs if n not in rb.parameters):
                states[name] = MISSING
                continue
            ev = Oracle(values, rounded, codes)
            if d.when is not None and not ev.run(d.when):
                states[name] = NOT_APPLICABLE
                continue
            try:
                values[name] = finite_float(ev.run(d.expr))
                states[name] = COMPUTED
                rounded[name] = round_at(values[name], 10.0**d.precision)
            except _ERRORS:
                states[name] = CALC_ERROR
            continue
        r = by_id[name]
        if r.status == "suspended":
            outcomes.append(SUSPENDED)
            continue
        if halted and not r.always:
            outcomes.append(HALTED)
            continue
        if any(values.get(n) is None for n in r.needs if n not in rb.parameters):
            outcomes.append(SKIPPED)
            continue
        try:
            fired = True if r.when is None else bool(Oracle(values, rounded, codes).run(r.when))
        except _ERRORS:
            outcomes.append(ERROR)
            continue
        if fired:
            outcomes.append(FIRED)
            codes |= r.asserts
            halted = halted or r.stop
        else:
            outcomes.append(NOT_FIRED)
    return {n: values[n] for n in rb.value_names}, states, outcomes, codes
