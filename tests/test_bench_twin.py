"""The benchmark rulebook and its hand-written twin agree, result for result, trace included.

tools/bench/twin.py is a plain Python interpretation written by hand for tools/bench/rulebook.yaml;
tools/bench_engine.py times the engine against it. Here it doubles as a differential test of the
generated code, the trace builder and the result assembly: any divergence is reported with the
first differing field.
"""

from __future__ import annotations

import importlib.util
import json
import random
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.verification.casegen import generate_cases, malformed_cases

ROOT = Path(__file__).resolve().parents[1]
RULEBOOK = ROOT / "tools" / "bench" / "rulebook.yaml"


def _load_twin() -> Any:
    spec = importlib.util.spec_from_file_location("bench_twin", ROOT / "tools" / "bench" / "twin.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


twin_module = _load_twin()


@pytest.fixture(scope="module")
def rb() -> Any:
    return gasrules.load_rulebook(RULEBOOK, cache=False)


@pytest.fixture(scope="module")
def twin(rb: Any) -> Any:
    return twin_module.Twin(rb)


def _first_difference(a: dict[str, Any], b: dict[str, Any]) -> str:
    for key in sorted(set(a) | set(b)):
        if a.get(key) == b.get(key):
            continue
        if key == "trace" and isinstance(a.get(key), list) and isinstance(b.get(key), list):
            for i, (ea, eb) in enumerate(zip(a[key], b[key])):
                if ea != eb:
                    return f"trace[{i}]\n engine: {json.dumps(ea)}\n twin:   {json.dumps(eb)}"
            return f"trace length engine {len(a[key])} twin {len(b[key])}"
        return f"{key}\n engine: {a.get(key)!r}\n twin:   {b.get(key)!r}"
    return ""


def _assert_same(rb: Any, twin: Any, cases: list[dict[str, Any]], trace: bool = True) -> Counter[str]:
    outcomes: Counter[str] = Counter()
    for case in cases:
        engine = gasrules.interpret(rb, case, trace=trace)
        hand = twin.interpret(case, trace=trace)
        if engine != hand:
            pytest.fail(
                f"case {case.get('case_id')}: {json.dumps(case, default=str)}\n"
                + _first_difference(engine, hand)
            )
        outcomes[engine["status"]] += 1
        for ev in engine["trace"]:
            if ev["outcome"] == "fired":
                outcomes["fired:" + ev["rule"]] += 1
    return outcomes


def test_benchmark_rulebook_checks_clean() -> None:
    assert gasrules.check_rulebook(RULEBOOK) == []


def test_rule_order_and_parameters_match_the_twin(rb: Any) -> None:
    """The twin hard-codes the evaluation order and every parameter value: both must still hold."""
    plan_rules = [name for kind, name in rb.plan if kind == "rule"]
    assert plan_rules == [r.id for r in rb.rules]
    assert len(plan_rules) == 63
    assert plan_rules[13:] == [rid for rid, _step, _title in twin_module.AFTER_STOP]
    for name, (value, unit) in twin_module.PARAMS.items():
        p = rb.parameters[name]
        assert (p.value, p.unit, p.by_input) == (value, unit, None), name
    for name, (default, by_values, unit) in twin_module.BY_SAMPLE.items():
        p = rb.parameters[name]
        assert (p.value, p.unit, p.by_input, p.by_values) == (default, unit, "sample_type", by_values), name
    assert set(rb.parameters) == set(twin_module.PARAMS) | set(twin_module.BY_SAMPLE)


def test_twin_equals_engine_on_generated_cases(rb: Any, twin: Any) -> None:
    outcomes = _assert_same(rb, twin, list(generate_cases(4000, seed=20260301)))
    # Not vacuous: inconsistent samples and most rules are exercised.
    assert outcomes["inconsistent"] > 0 and outcomes["interpreted"] > 0
    fired = {k for k in outcomes if k.startswith("fired:")}
    assert len(fired) >= 55, sorted(fired)


def test_twin_equals_engine_without_trace(rb: Any, twin: Any) -> None:
    _assert_same(rb, twin, list(generate_cases(500, seed=7)), trace=False)


def test_twin_equals_engine_with_inputs_missing_and_other_samples(rb: Any, twin: Any) -> None:
    """Dropped inputs (skipped rules, not-assessed values, partial status) and sample types the
    generator does not write (capillary, unknown, mixed venous)."""
    rng = random.Random(41)
    droppable = [
        "ph",
        "pco2",
        "hco3",
        "na",
        "cl",
        "albumin",
        "sample_type",
        "po2",
        "fio2",
        "k",
        "lactate",
        "age",
        "chronicity",
        "pregnant",
    ]
    cases = []
    for case in generate_cases(1500, seed=99):
        for key in rng.sample(droppable, rng.randint(1, 4)):
            case.pop(key, None)
        if rng.random() < 0.3:
            case["sample_type"] = rng.choice(["capillary", "unknown", "mixed_venous"])
        if rng.random() < 0.1:
            case["chronicity"] = "unknown"
        cases.append(case)
    outcomes = _assert_same(rb, twin, cases)
    assert outcomes["partial"] > 0


def test_twin_equals_engine_on_rejected_cases(rb: Any, twin: Any) -> None:
    broken = list(malformed_cases(200, seed=5))
    outcomes = _assert_same(rb, twin, [case for _kind, _field, case in broken])
    # every malformation is rejected except a value given as null, which reads as "not given"
    assert outcomes["rejected"] == sum(case[field] is not None for _kind, field, case in broken)


def test_winter_anchor_case(rb: Any, twin: Any) -> None:
    """A metabolic acidosis with the expected respiratory response, checked on both sides.
    Check values: Winter's formula 1.5 x 10 + 8 = 23 mmHg, band 21-25 (Albert, Dell & Winters,
    Ann Intern Med 1967; +/- 2 as universally quoted); anion gap 140 - (104 + 10) = 26 mmol/L
    (Na - (Cl + HCO3), Kraut & Madias, Clin J Am Soc Nephrol 2007)."""
    case = {
        "case_id": "anchor",
        "ph": 7.26,
        "pco2": 23,
        "hco3": 10,
        "na": 140,
        "cl": 104,
        "sample_type": "arterial",
    }
    result = gasrules.interpret(rb, case)
    assert result == twin.interpret(case)
    assert result["values"]["expected_pco2"] == 23.0
    assert (result["values"]["expected_pco2_low"], result["values"]["expected_pco2_high"]) == (21.0, 25.0)
    assert result["values"]["anion_gap"] == 26.0
    assert result["disorders"] == ["metabolic_acidosis_high_anion_gap"]
    fired = {ev["rule"] for ev in result["trace"] if ev["outcome"] == "fired"}
    assert "compensation.metabolic_acidosis.appropriate" in fired
