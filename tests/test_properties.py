"""Hypothesis properties of interpretation, drawn from each rulebook's own input declarations.

Any case made of a random subset of the declared inputs, each within its plausible range, in
its canonical unit or in a random accepted alternative (with a random accepted spelling),
gives a schema-valid result, never an exception and never a rejection; the same case always
gives the same result; the batch API equals a loop. Example counts are kept modest for CI.
"""

from __future__ import annotations

import copy
import json
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import gasrules
from conftest import MINI
from gasrules.core import units as U

# integers a context may carry (strict JSON: larger ones reject the case, tests/test_case_fuzz.py)
JSON_INTS = st.integers(min_value=-(2**63 - 1), max_value=2**63 - 1)
SETTINGS = settings(
    max_examples=40,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# How each UCUM code may be typed: the code itself and every alias the engine maps to it.
SPELLINGS: dict[str, list[str]] = {}
for _typed, _code in U._ALIASES.items():
    SPELLINGS.setdefault(_code, [_code]).append(_typed)


def _shrink(lo: float, hi: float) -> tuple[float, float]:
    """Keep clear of the edges by a hair, so that unit conversion cannot round past them."""
    pad = (hi - lo) * 1e-9
    return lo + pad, hi - pad


def number(spec: Any) -> st.SearchStrategy[Any]:
    lo, hi = float(spec.plausible_min), float(spec.plausible_max)
    options = [st.floats(lo, hi, allow_nan=False, allow_infinity=False)]
    options.append(
        st.builds(
            lambda v, u: {"value": v, "unit": u},
            st.floats(lo, hi, allow_nan=False, allow_infinity=False),
            st.sampled_from(SPELLINGS.get(spec.unit, [spec.unit])),
        )
    )
    for unit, (factor, offset) in spec.alternatives.items():
        a, b = sorted(((lo - offset) / factor, (hi - offset) / factor))
        a, b = _shrink(a, b)
        options.append(
            st.builds(
                lambda v, u: {"value": v, "unit": u},
                st.floats(a, b, allow_nan=False, allow_infinity=False),
                st.sampled_from(SPELLINGS.get(unit, [unit])),
            )
        )
    return st.one_of(options)


def value_strategy(spec: Any) -> st.SearchStrategy[Any]:
    if spec.kind == "code":
        return st.sampled_from(spec.codes).flatmap(lambda c: st.sampled_from([c, c.upper(), f" {c} "]))
    if spec.kind == "flag":
        return st.one_of(st.booleans(), st.sampled_from(["yes", "no", "true", "false"]))
    return number(spec)


def cases(rb: Any) -> st.SearchStrategy[dict[str, Any]]:
    engine_set = {spec.fallback_marks for spec in rb.inputs.values() if spec.fallback_marks}
    optional = {name: value_strategy(spec) for name, spec in rb.inputs.items() if name not in engine_set}
    optional["case_id"] = st.text(max_size=12)
    optional["context"] = st.dictionaries(
        st.text(max_size=5), st.one_of(JSON_INTS, st.text(max_size=5)), max_size=3
    )
    return st.fixed_dictionaries({}, optional=optional)


def check_result(rb: Any, case: dict[str, Any], validate: Any) -> dict[str, Any]:
    before = copy.deepcopy(case)
    result = gasrules.interpret(rb, case)
    assert case == before
    assert result["status"] in ("interpreted", "partial", "inconsistent"), result["errors"]
    assert validate(result) == []
    json.dumps(result, allow_nan=False)  # no NaN or infinity anywhere: plain JSON
    if result["status"] == "inconsistent":
        assert result["disorders"] == [] and result["qualifiers"] == {}
    if result["status"] == "partial":
        assert result["not_assessed"]
    return result


# The rulebook is needed to build the strategies at import, so these properties load it
# themselves (the compiled-rulebook cache makes that cheap) instead of taking a fixture.
SHIPPED = gasrules.load_rulebook()
MINI_RB = gasrules.load_rulebook(MINI)


@SETTINGS
@given(case=cases(SHIPPED))
def test_shipped_any_plausible_case_is_interpreted(case: dict[str, Any], result_validator: Any) -> None:
    check_result(SHIPPED, case, result_validator)


@settings(max_examples=80, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(case=cases(MINI_RB))
def test_mini_any_plausible_case_is_interpreted(case: dict[str, Any], result_validator: Any) -> None:
    check_result(MINI_RB, case, result_validator)


@SETTINGS
@given(case=cases(SHIPPED))
def test_same_input_same_result(case: dict[str, Any]) -> None:
    first = gasrules.interpret(SHIPPED, case)
    again = gasrules.interpret(SHIPPED, copy.deepcopy(case))
    assert first == again
    # the same case after a trip through JSON (how cases arrive) gives the same result
    assert gasrules.interpret(SHIPPED, json.loads(json.dumps(case))) == first


@settings(max_examples=15, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(batch=st.lists(cases(SHIPPED), max_size=8))
def test_interpret_many_equals_a_loop(batch: list[dict[str, Any]]) -> None:
    looped = [gasrules.interpret(SHIPPED, c) for c in batch]
    assert list(gasrules.interpret_many(SHIPPED, batch, workers=1)) == looped
    assert list(gasrules.interpret_many(SHIPPED, iter(batch), workers=1, trace=False)) == [
        gasrules.interpret(SHIPPED, c, trace=False) for c in batch
    ]


@settings(max_examples=60, deadline=None, derandomize=True)
@given(data=st.data())
def test_out_of_range_value_rejects_the_case_naming_the_field(data: st.DataObject) -> None:
    numeric = [n for n, s in SHIPPED.inputs.items() if s.kind == "number"]
    name = data.draw(st.sampled_from(numeric))
    spec = SHIPPED.inputs[name]
    span = spec.plausible_max - spec.plausible_min
    value = data.draw(
        st.one_of(
            st.floats(spec.plausible_max + span * 1e-6, spec.plausible_max + 10 * span + 1, allow_nan=False),
            st.floats(spec.plausible_min - 10 * span - 1, spec.plausible_min - span * 1e-6, allow_nan=False),
        )
    )
    result = gasrules.interpret(SHIPPED, {"ph": 7.40, name: value})
    assert result["status"] == "rejected"
    assert [(e["field"], e["code"]) for e in result["errors"]] == [(name, "input.out_of_range")]


@settings(max_examples=40, deadline=None, derandomize=True)
@given(
    case=cases(MINI_RB), case_id=st.text(max_size=10), context=st.dictionaries(st.text(max_size=4), JSON_INTS)
)
def test_case_id_and_context_change_nothing_else(
    case: dict[str, Any], case_id: str, context: dict[str, int]
) -> None:
    plain = {k: v for k, v in case.items() if k not in ("case_id", "context")}
    a = gasrules.interpret(MINI_RB, plain)
    b = gasrules.interpret(MINI_RB, dict(plain, case_id=case_id, context=context))
    assert (b["case_id"], b["context"]) == (case_id, context)
    strip = ("case_id", "context")
    assert {k: v for k, v in a.items() if k not in strip} == {k: v for k, v in b.items() if k not in strip}


@pytest.mark.slow
def test_interpret_many_with_worker_processes_equals_a_loop() -> None:
    # The compiled rulebook pickles into spawned workers and comes back with the same results, in order.
    from gasrules.verification.casegen import generate_cases

    batch = list(generate_cases(60, seed=9)) + [{"ph": "bad"}, [1, 2], {}]
    looped = [gasrules.interpret(SHIPPED, c) for c in batch]
    assert list(gasrules.interpret_many(SHIPPED, batch, workers=2, chunksize=7)) == looped
