"""Evaluation: missing inputs, calculation errors, thresholds at reported precision, the
inconsistent sample, the result contract, and the two trace builders agreeing.

Clinical values asserted here name their source beside them.
"""

from __future__ import annotations

import copy
import itertools
import json
from pathlib import Path
from typing import Any

import pytest

import gasrules
from conftest import MINI, portable
from gasrules.evaluation.evaluator import read_case
from gasrules.evaluation.render import render_trace
from gasrules.evaluation.trace import build_trace
from gasrules.rulebook.codegen import CALC_ERROR
from gasrules.verification.casegen import generate_cases

# DuBose, Acidosis and alkalosis, Harrison's (table of mixed disorders), example 1.
DUBOSE_E1 = {"ph": 7.39, "pco2": 24, "hco3": 14, "na": 140, "cl": 106}
# A high anion gap with HCO3 exactly at the normal 24 (Na 140, Cl 96: gap 20; Kraut & Madias 2007
# limit 12): the delta ratio (gap excess / fall in HCO3; Rastegar 2007, from memory) divides by zero.
GAP_WITH_NORMAL_HCO3 = {"ph": 7.40, "pco2": 40, "hco3": 24, "na": 140, "cl": 96}


COMPARISON_KEYS = ("quantity", "value", "compared", "op", "threshold", "threshold_value", "margin")


def core(comparisons: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The contract keys of trace comparisons (the engine may add more, e.g. whether one decided)."""
    return [{k: c[k] for k in COMPARISON_KEYS} for c in comparisons]


def events(result: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {e["rule"]: e for e in result["trace"]}


def whys(result: dict[str, Any]) -> dict[str, str]:
    return {n["what"]: n["why"] for n in result["not_assessed"]}


# ----------------------------------------------------------------------------- missing inputs


def test_empty_case_never_crashes(mini_rb: Any, result_validator: Any) -> None:
    result = gasrules.interpret(mini_rb, {})
    assert result["status"] == "partial"
    assert result_validator(result) == []
    assert result["disorders"] == [] and result["values"] == {}
    outcomes = {e["outcome"] for e in result["trace"]}
    assert outcomes <= {"skipped_missing_input", "not_fired"}
    assert whys(result)["Primary disorder"] == "needs hco3, pco2, ph"


def test_skipped_rules_name_what_is_missing(mini_rb: Any) -> None:
    result = gasrules.interpret(mini_rb, {"ph": 7.30})
    ev = events(result)
    assert ev["ph_state.acidaemia"]["outcome"] == "fired"  # pH 7.30 < 7.35 (common practice)
    assert ev["primary.metabolic_acidosis"]["outcome"] == "skipped_missing_input"
    assert ev["primary.metabolic_acidosis"]["missing"] == ["hco3"]
    assert ev["primary.respiratory_acidosis"]["missing"] == ["hco3", "pco2"]
    assert ev["consistency.failed"]["missing"] == ["calculated_hco3", "hco3"]
    # every skipped event names only inputs not given or derived values not computed
    for e in result["trace"]:
        if e["outcome"] == "skipped_missing_input":
            assert e["missing"], e
            assert all(e["reads"].get(n) is None for n in e["missing"]), e
    # a core step that could not be assessed makes the result partial
    assert result["status"] == "partial"
    assert whys(result)["Primary disorder"] == "needs hco3, pco2"
    assert whys(result)["Sample consistency"] == "needs calculated_hco3, hco3"


def test_core_steps_complete_is_interpreted(mini_rb: Any) -> None:
    # DuBose E1 without PO2/FiO2: oxygenation (not core) cannot be judged; the result stays interpreted
    result = gasrules.interpret(mini_rb, DUBOSE_E1)
    assert result["status"] == "interpreted"
    assert result["disorders"] == ["metabolic_acidosis_high_anion_gap", "respiratory_alkalosis"]
    assert result["values"]["anion_gap"] == 20.0  # 140 - (106 + 14) (DuBose: AG 20)
    assert result["values"]["expected_pco2"] == 29.0  # 1.5 x 14 + 8 (Albert, Dell & Winters 1967)


def test_shipped_rulebook_missing_optional_inputs(shipped_rb: Any) -> None:
    # DuBose E1 with K 4.0: electrolytes and gas only. Non-core steps (oxygenation, osmolality...)
    # lack inputs; the interpretation is still complete.
    result = gasrules.interpret(shipped_rb, dict(DUBOSE_E1, k=4.0))
    assert result["status"] == "interpreted"
    assert set(result["disorders"]) == {"metabolic_acidosis_high_anion_gap", "respiratory_alkalosis"}
    assert any("po2" in n["why"] for n in result["not_assessed"])


ALL_KEYS = ("ph", "pco2", "hco3", "na", "cl", "albumin", "po2", "fio2")
FULL = dict(DUBOSE_E1, albumin=30, po2=70, fio2=0.4, sample_type="arterial")


@pytest.mark.parametrize("size", range(len(ALL_KEYS) + 1))
def test_every_subset_of_inputs(size: int, mini_rb: Any, shipped_rb: Any, result_validator: Any) -> None:
    # Any subset of a real case's inputs gives a valid result, never an exception or a rejection.
    # (schema validation of a shipped result with its trace takes ~50 ms: every 5th one is validated)
    for i, keys in enumerate(itertools.combinations(ALL_KEYS, size)):
        case = {k: FULL[k] for k in keys}
        for rb in (mini_rb, shipped_rb):
            result = gasrules.interpret(rb, case)
            assert result["status"] in ("interpreted", "partial", "inconsistent"), (keys, result["errors"])
            if rb is mini_rb or i % 5 == 0:
                assert result_validator(result) == [], keys
            if result["status"] == "partial":
                assert result["not_assessed"], keys


# ----------------------------------------------------------------------------- calculation errors


def test_calculation_error_makes_only_that_value_not_assessable(mini_rb: Any) -> None:
    result = gasrules.interpret(mini_rb, GAP_WITH_NORMAL_HCO3)
    assert result["status"] == "interpreted"
    assert "delta_ratio" not in result["values"]
    # the other values are there: gap 140 - (96 + 24) = 20; HH HCO3 0.0307 x 40 x 10^1.3 = 24.50 (NCCLS form)
    assert result["values"]["anion_gap"] == 20.0
    assert result["values"]["calculated_hco3"] == 24.5
    assert {"what": "Delta ratio", "why": "eval.calculation_error: division by zero"} in result[
        "not_assessed"
    ]
    # the rule that reads it sees an unavailable value, nothing more
    assert events(result)["delta.ratio"]["outcome"] == "not_fired"
    # inside the generated function: that value's state is a calculation error
    inputs, errors, _, _ = read_case(mini_rb, GAP_WITH_NORMAL_HCO3)
    vals, states, calc_errors, _, _ = mini_rb._function(inputs, None)
    assert states[mini_rb.value_names.index("delta_ratio")] == CALC_ERROR
    assert calc_errors == {"delta_ratio": "division by zero"}


def test_calculation_error_in_a_condition(tmp_path: Path) -> None:
    text = portable(MINI.read_text(encoding="utf-8"), MINI).replace(
        "presentation:\n",
        "  - id: delta.ratio_high\n"
        "    status: active\n"
        "    step: delta\n"
        "    title: Delta ratio high\n"
        "    when: (ag_used - ag_normal) / (hco3_normal - hco3) > winter_slope\n"
        "    findings:\n"
        '      - {code: delta.ratio_high, category: delta, severity: info, text: "High delta ratio."}\n'
        "\npresentation:\n",
        1,
    )
    path = tmp_path / "rb.yaml"
    path.write_text(text, encoding="utf-8")
    rb = gasrules.load_rulebook(path, cache=False)
    result = gasrules.interpret(rb, GAP_WITH_NORMAL_HCO3)
    ev = events(result)["delta.ratio_high"]
    assert (ev["outcome"], ev["reason"]) == ("error", "division by zero")
    assert {"what": "rule delta.ratio_high", "why": "eval.calculation_error: division by zero"} in result[
        "not_assessed"
    ]
    assert result["status"] == "interpreted"
    assert "ERROR" in render_trace(result["trace"]) and "reason: division by zero" in render_trace(
        result["trace"]
    )


# ----------------------------------------------------------------------------- thresholds at reported precision

PF_CASE = {"ph": 7.40, "pco2": 40, "hco3": 24.5, "po2": 56, "fio2": 0.28, "sample_type": "arterial"}


def test_ieee_double_misjudges_the_threshold() -> None:
    # The motivating fact (engine issue #2; IEEE 754 binary64): 56 / 0.28 is not 200 in a double.
    assert 56 / 0.28 == 199.99999999999997
    assert 56 / 0.28 < 200


def test_threshold_compared_at_reported_precision(mini_rb: Any) -> None:
    # P/F 56 / 0.28 reads as 200 on screen (precision 0): "P/F < 200" (Berlin moderate limit,
    # ARDS Definition Task Force, JAMA 2012) must not fire.
    result = gasrules.interpret(mini_rb, PF_CASE)
    assert result["values"]["pf_ratio"] == 200.0
    ev = events(result)["oxygenation.pf_moderate"]
    assert ev["outcome"] == "not_fired"
    assert ev["reads"]["pf_ratio"] == 199.99999999999997
    assert core(ev["comparisons"]) == [
        {
            "quantity": "pf_ratio",
            "value": 199.99999999999997,
            "compared": 200.0,
            "op": "<",
            "threshold": "pf_moderate",
            "threshold_value": 200.0,
            "margin": 0.0,
        }
    ]
    assert "oxygenation.pf_low" not in [f["code"] for f in result["findings"]]


@pytest.mark.parametrize(
    "po2, shown, fires",
    [
        (55.9, 200.0, False),  # 199.64 -> 200 on screen
        (55.8, 199.0, True),  # 199.29 -> 199
        (55.86, 200.0, False),  # 199.50 -> 200 (half away from zero)
        (56.2, 201.0, False),  # 200.71 -> 201
    ],
)
def test_threshold_neighbours(mini_rb: Any, po2: float, shown: float, fires: bool) -> None:
    # Rounding half away from zero at precision 0 (common practice for reported results)
    result = gasrules.interpret(mini_rb, dict(PF_CASE, po2=po2))
    assert result["values"]["pf_ratio"] == shown
    ev = events(result)["oxygenation.pf_moderate"]
    assert ev["outcome"] == ("fired" if fires else "not_fired")
    assert ev["comparisons"][0]["compared"] == shown
    assert ev["comparisons"][0]["margin"] == shown - 200.0


def test_trace_text_shows_compared_and_full_value(mini_rb: Any) -> None:
    text = render_trace(gasrules.interpret(mini_rb, dict(PF_CASE, po2=55.9))["trace"])
    [line] = [ln for ln in text.splitlines() if "compare pf_ratio" in ln]
    # the compared value, the full value, the threshold and the margin (other words may follow the colon)
    assert line.strip().startswith("compare pf_ratio 200 (full value 199.643) < pf_moderate 200:")
    assert line.endswith("margin 0")


def test_inputs_compared_at_their_precision(mini_rb: Any) -> None:
    # pH 7.3549 shows as 7.35 (precision 2) and is not below 7.35 (common practice limit)
    result = gasrules.interpret(mini_rb, {"ph": 7.3549})
    ev = events(result)["ph_state.acidaemia"]
    assert ev["outcome"] == "not_fired"
    assert ev["comparisons"][0]["value"] == 7.3549 and ev["comparisons"][0]["compared"] == 7.35
    assert events(result)["ph_state.normal"]["outcome"] == "fired"


# ----------------------------------------------------------------------------- inconsistent sample


def test_inconsistent_sample(shipped_rb: Any, result_validator: Any) -> None:
    # pH 7.40, PCO2 40, HCO3 30: HH HCO3 0.0307 x 40 x 10^(7.40 - 6.1) = 24.50
    # (NCCLS form with S 0.0307), 5.5 from the reported 30; Henderson [H+] 24 x 40 / 30 = 32.0 vs
    # 39.8 from the pH (Kassirer & Bleich, N Engl J Med 1965, from memory): -19.6 %.
    result = gasrules.interpret(shipped_rb, {"ph": 7.40, "pco2": 40, "hco3": 30, "case_id": "C28"})
    assert result["status"] == "inconsistent"
    assert result["disorders"] == [] and result["qualifiers"] == {}
    assert result["values"]["calculated_hco3"] == 24.5
    assert result["values"]["h_calculated"] == 32.0
    assert result["values"]["h_difference_percent"] == -19.6
    assert "consistency.hh_ph" in [f["code"] for f in result["findings"]]
    assert "inconsistent" in result["headline"].lower()
    assert any("stopped the interpretation" in n["why"] for n in result["not_assessed"])
    assert result_validator(result) == []
    halted = [e for e in result["trace"] if e["outcome"] == "halted"]
    assert halted and all(set(e) == {"rule", "step", "title", "outcome"} for e in halted)


def test_critical_values_survive_a_stop(shipped_rb: Any) -> None:
    # Critical values are never suppressed (common practice): pH 6.95 is below
    # the critical 7.10 and K 7.0 above the critical 6.5 (common practice limits), and the sample is
    # also inconsistent (HH HCO3 0.0307 x 40 x 10^0.85 = 8.7 vs 30, NCCLS form).
    result = gasrules.interpret(shipped_rb, {"ph": 6.95, "pco2": 40, "hco3": 30, "k": 7.0})
    assert result["status"] == "inconsistent" and result["disorders"] == []
    critical = [f["code"] for f in result["findings"] if f["severity"] == "critical"]
    assert {"critical.ph_low", "critical.k_high", "consistency.hh_ph"} <= set(critical)
    assert result["findings"][0]["severity"] == "critical"  # critical findings come first
    assert result["headline"].startswith("Critical pH")


def test_inconsistent_sample_in_the_mini_rulebook(mini_rb: Any) -> None:
    result = gasrules.interpret(mini_rb, {"ph": 7.40, "pco2": 40, "hco3": 30, "na": 140, "cl": 100})
    assert (result["status"], result["disorders"], result["headline"]) == (
        "inconsistent",
        [],
        "Values inconsistent: please recheck",
    )
    assert result["values"]["calculated_hco3"] == 24.5  # as above (NCCLS form)


# ----------------------------------------------------------------------------- the result contract


def test_result_contract(mini_rb: Any, result_validator: Any) -> None:
    case = dict(DUBOSE_E1, case_id="E1", context={"ward": "ICU", "nested": {"a": [1, 2]}})
    before = copy.deepcopy(case)
    result = gasrules.interpret(mini_rb, case)
    assert case == before  # the case is not modified
    assert result_validator(result) == []
    assert result["case_id"] == "E1" and result["context"] == {"ward": "ICU", "nested": {"a": [1, 2]}}
    assert result["rulebook"] == mini_rb.identity
    assert result["engine_version"] == gasrules.__version__
    assert result["inputs"] == {
        "ph": 7.39,
        "pco2": 24.0,
        "hco3": 14.0,
        "na": 140.0,
        "cl": 106.0,
        "sample_type": "unknown",
    }
    assert result["units"]["anion_gap"] == "mmol/L" and result["units"]["expected_pco2"] == "mm[Hg]"
    assert "ag_used" not in result["values"]  # report: false
    assert result["cautions"] == [
        "Decision support only: supports, never replaces, clinical judgement.",
        "Local laboratory ranges and protocols prevail.",
    ]
    assert json.loads(json.dumps(result)) == result  # plain JSON data


def test_findings_and_texts(mini_rb: Any) -> None:
    result = gasrules.interpret(mini_rb, DUBOSE_E1)
    texts = {f["code"]: f["text"] for f in result["findings"]}
    # placeholders render at precision with units: Winter 1.5 x 14 + 8 = 29 (Albert, Dell & Winters 1967)
    assert (
        texts["compensation.pco2_below_expected"]
        == "PaCO2 24.0 mmHg is below the expected 29.0 mmHg (Winter): respiratory alkalosis as well."
    )
    assert (
        texts["anion_gap.high"]
        == "Anion gap 20.0 mmol/L is above 12 mmol/L: high anion gap metabolic acidosis."
    )
    assert all(f["rule"] and f["severity"] in ("info", "warning", "critical") for f in result["findings"])


def test_trace_off(mini_rb: Any) -> None:
    with_trace = gasrules.interpret(mini_rb, DUBOSE_E1)
    without = gasrules.interpret(mini_rb, DUBOSE_E1, trace=False)
    assert without["trace"] == []
    assert {k: v for k, v in with_trace.items() if k != "trace"} == {
        k: v for k, v in without.items() if k != "trace"
    }


@pytest.mark.parametrize(
    "case",
    [
        {},
        DUBOSE_E1,
        GAP_WITH_NORMAL_HCO3,
        PF_CASE,
        {"ph": "x"},
        {"ph": 7.40, "pco2": 40, "hco3": 30},
        {"ph": 7.1, "pco2": 70, "hco3": 21, "sample_type": "venous"},
        [1],
        {"unknown": 1},
    ],
)
def test_results_validate_against_schema(
    case: Any, mini_rb: Any, shipped_rb: Any, site_rb: Any, result_validator: Any
) -> None:
    for rb in (mini_rb, shipped_rb, site_rb):
        result = gasrules.interpret(rb, case)
        assert result_validator(result) == [], (rb.id, case)


def test_generated_cases_validate(shipped_rb: Any, result_validator: Any) -> None:
    statuses = set()
    for case in generate_cases(80, seed=11):
        result = gasrules.interpret(shipped_rb, case)
        assert result_validator(result) == [], case["case_id"]
        statuses.add(result["status"])
    assert {"interpreted", "inconsistent"} <= statuses


# ----------------------------------------------------------------------------- reference trace builder


def project(rb: Any, case: dict[str, Any]) -> dict[str, Any]:
    """The part of a generated case this rulebook declares."""
    return {k: v for k, v in case.items() if k in rb.inputs or k in ("case_id", "context")}


def reference_trace(rb: Any, case: dict[str, Any]) -> list[dict[str, Any]]:
    inputs, errors, _, _ = read_case(rb, case)
    assert errors == []
    vals, _states, calc_errors, outcomes, _codes = rb._function(inputs, None)
    static = rb._static
    return build_trace(static.rule_traces, outcomes, inputs, vals, static.value_index, calc_errors)


@pytest.mark.parametrize("which", ["mini_rb", "shipped_rb", "site_rb"])
def test_reference_trace_equals_generated_trace(which: str, request: pytest.FixtureRequest) -> None:
    rb = request.getfixturevalue(which)
    compared = 0
    for case in itertools.chain(generate_cases(400, seed=5), [DUBOSE_E1, GAP_WITH_NORMAL_HCO3, PF_CASE, {}]):
        case = project(rb, case)
        result = gasrules.interpret(rb, case)
        if result["status"] == "rejected":
            continue
        assert result["trace"] == reference_trace(rb, case), case.get("case_id")
        compared += 1
    assert compared >= 350


def test_results_share_no_mutable_parts(shipped_rb: Any) -> None:
    # An integrator may edit a result it received; the next result must not change with it.
    case = {"ph": 7.30, "pco2": 30, "hco3": 15}  # invented values (demo)
    first = gasrules.interpret(shipped_rb, case)
    for event in first["trace"]:
        for entry in (event.get("parameters") or {}).values():
            entry["value"] = 99.0
        for comparison in event.get("comparisons") or []:
            comparison["threshold_value"] = 99.0
    second = gasrules.interpret(shipped_rb, case)
    assert second == gasrules.interpret(shipped_rb, case)
    assert all(e["value"] != 99.0 for ev in second["trace"] for e in (ev.get("parameters") or {}).values())
