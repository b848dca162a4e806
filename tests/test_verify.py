"""gasrules.verification.suite and `gasrules verify`: loading case files, comparing, coverage, probes, the CLI.

Rulebook numbers used below are the shipped adult defaults: ph_low 7.35 (common practice),
ag_high 12 (Klaestrup et al., Clin Chem Lab Med 2011; Kraut & Madias 2007), Winter's formula
1.5 x HCO3 + 8 +/- 2 (Albert, Dell & Winters 1967, as universally quoted).
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import pytest
from typer.testing import CliRunner

import gasrules
from gasrules.cli.commands import verify as V
from gasrules.verification import suite as S

ROOT = Path(__file__).resolve().parent.parent
ADULT = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
runner = CliRunner()


@pytest.fixture(scope="module")
def rb():
    return gasrules.load_rulebook(ADULT)


def _cases(tmp_path: Path, text: str, name: str = "cases.yaml") -> Path:
    folder = tmp_path / "cases"
    folder.mkdir(exist_ok=True)
    (folder / name).write_text(textwrap.dedent(text), encoding="utf-8")
    return folder


GOOD = """\
cases:
  - id: e29-gas
    note: "Diarrhoea: normal-gap acidosis (reconstructed teaching case)."
    evidence: {tag: CP, note: "Reconstructed teaching case (no single source)"}
    input: {sample_type: arterial, ph: 7.30, pco2: 29, hco3: 14, na: 138, cl: 115}
    want:
      disorders: [metabolic_acidosis_normal_anion_gap]
      values:
        expected_pco2: {value: 29.0, tolerance: 0.05, evidence: {tag: D, ref: albert1967, note: "1.5 x 14 + 8 (Winter)"}}
"""


# ----------------------------------------------------------------------------- loading


def test_schema_error_names_file_line_and_column(tmp_path):
    folder = _cases(
        tmp_path,
        """\
        cases:
          - id: no-evidence
            note: "missing its evidence"
            input: {ph: 7.4}
            want: {disorders: []}
        """,
    )
    with pytest.raises(S.SuiteError) as exc:
        S.load_suite(ADULT, folder)
    p = exc.value.problems[0]
    assert p.code == "CS-E002"
    assert p.location.file.endswith("cases.yaml") and p.location.line == 2 and p.location.col == 5
    assert "evidence" in p.message


def test_duplicate_ids_and_unknown_supersedes(tmp_path):
    folder = _cases(tmp_path, GOOD + GOOD.split("cases:\n", 1)[1])
    with pytest.raises(S.SuiteError) as exc:
        S.load_suite(ADULT, folder)
    assert [p.code for p in exc.value.problems] == ["CS-E003"]
    folder = _cases(tmp_path, "supersedes: [{case: no-such-case, reason: 'because of a test'}]\n" + GOOD)
    with pytest.raises(S.SuiteError) as exc:
        S.load_suite(ADULT, folder)
    assert "CS-E004" in [p.code for p in exc.value.problems]


def test_unknown_names_are_reported(tmp_path, rb):
    folder = _cases(
        tmp_path,
        GOOD.replace("disorders: [metabolic_acidosis_normal_anion_gap]", "rules_fired: [no.such.rule]"),
    )
    problems = S.check_names(rb, S.load_suite(ADULT, folder))
    assert [p.code for p in problems] == ["CS-E005"] and "no.such.rule" in problems[0].message


# ----------------------------------------------------------------------------- comparing


def test_passing_and_failing_expectations(tmp_path, rb):
    wrong = GOOD.replace("value: 29.0", "value: 31.0").replace(
        "metabolic_acidosis_normal_anion_gap]", "metabolic_acidosis_high_anion_gap]"
    )
    ok = S.run_suite(rb, S.load_suite(ADULT, _cases(tmp_path, GOOD)))
    assert [r.outcome for r in ok] == ["passed"]
    bad = S.run_suite(rb, S.load_suite(ADULT, _cases(tmp_path, wrong)))[0]
    assert bad.outcome == "failed"
    whats = {f.what: (f.expected, f.got) for f in bad.failures}
    assert whats["value expected_pco2"] == ("31.0 +/- 0.05", 29.0)
    assert whats["disorders"] == (
        ["metabolic_acidosis_high_anion_gap"],
        ["metabolic_acidosis_normal_anion_gap"],
    )
    # the failure points at the rules that assert the disorders in question
    assert "anion_gap.high_gap_acidosis" in bad.failures[0].rules


def test_error_code_expectation(rb):
    case = S.Case(
        id="x",
        note="pH as text",
        evidence={"tag": "INV", "note": "malformed input"},
        input={"ph": "seven"},
        want=None,
        want_error_code="input.not_a_number",
        location=gasrules.core.errors.Location(),
        origin="",
    )
    assert S.compare(rb, case, gasrules.interpret(rb, case.input)) == []


# ----------------------------------------------------------------------------- coverage pieces


@pytest.mark.parametrize(
    "margin,threshold,step,side",
    [
        (-0.01, 7.35, 0.01, "below"),  # pH 7.34 against ph_low 7.35 (precision 2)
        (0.0, 7.35, 0.01, "at"),
        (0.01, 7.35, 0.01, "above"),
        (0.02, 7.35, 0.01, None),  # two steps away: not a probe
        (0.1, 12.0, 0.1, "above"),  # AG 12.1 against ag_high 12 (precision 1)
    ],
)
def test_side_of(margin, threshold, step, side):
    assert S.side_of(margin, threshold, step) == side


@pytest.mark.parametrize(
    "op,below,at,above",
    [
        ("<", True, False, False),
        ("<=", True, True, False),
        (">", False, False, True),
        (">=", False, True, True),
        ("==", False, True, False),
    ],
)
def test_op_truth(op, below, at, above):
    assert [S.op_truth(op, s) for s in S.SIDES] == [below, at, above]


def _cp(rb, owner, quantity, threshold):
    return next(
        cp
        for cp in S.unique_cutpoints(rb)
        if (cp["owner"], cp["quantity"], cp["threshold"]) == (owner, quantity, threshold)
    )


def test_decisive_comparison(rb):
    acid = _cp(rb, "ph_state.acidaemia", "ph", "ph_low")
    res = gasrules.interpret(rb, {"sample_type": "arterial", "ph": 7.34, "pco2": 40, "hco3": 21})
    assert S.decisive(rb, res, acid) == (True, True, False)
    # Winter's band is not decisive for the acidosis rule when no metabolic acidosis was named
    # (a metabolic alkalosis: HCO3 33, PCO2 46, DuBose E3-like gas).
    winter = _cp(rb, "compensation.metabolic_acidosis.pco2_high", "pco2_vent", "expected_pco2_high")
    res = gasrules.interpret(rb, {"sample_type": "arterial", "ph": 7.47, "pco2": 46, "hco3": 33})
    assert S.position(rb, res, winter)[0] is not None
    assert S.decisive(rb, res, winter)[0] is False


def test_rule_coverage_with_a_stated_exception(rb, tmp_path):
    results = S.run_suite(rb, S.load_suite(ADULT, _cases(tmp_path, GOOD)))
    plain = S.rule_coverage(rb, results)
    assert "critical.ph_low" in plain["never_fired"]
    excused = S.rule_coverage(
        rb, results, [{"rule": "critical.ph_low", "outcome": "fired", "reason": "a test"}]
    )
    assert (
        "critical.ph_low" not in excused["never_fired"] and excused["excused"][0]["rule"] == "critical.ph_low"
    )
    stale = S.rule_coverage(
        rb,
        results,
        [{"rule": "anion_gap.normal_gap_acidosis", "outcome": "fired", "reason": "wrongly stated"}],
    )
    assert stale["stale_excuses"] == [{"rule": "anion_gap.normal_gap_acidosis", "outcome": "fired"}]


# ----------------------------------------------------------------------------- probes


def test_probe_found_by_bisection_over_chloride(rb, tmp_path):
    """AG = Na - Cl - HCO3 against ag_high 12: the probe moves Cl until the gap is 12.1."""
    results = S.run_suite(rb, S.load_suite(ADULT, _cases(tmp_path, GOOD)))
    cov = S.threshold_coverage(rb, results)
    row = next(r for r in cov["rows"] if r["cutpoint"] == "anion_gap.high_gap_acidosis: ag_used > ag_high")
    probes, not_found = S.suggest_probes(rb, results, {"rows": [dict(row, missing=["above", "at"])]})
    assert not_found == []
    by_side = {p.side: p for p in probes}
    assert by_side["above"].compared == pytest.approx(12.1) and by_side["above"].fires is True
    assert by_side["at"].compared == pytest.approx(12.0) and by_side["at"].fires is False
    assert all(p.engine_agrees for p in probes)
    case = S.probe_case(rb, by_side["above"])
    assert case["want"] == {"rules_fired": ["anion_gap.high_gap_acidosis"]}
    assert case["evidence"]["tag"] == "D" and "klaestrup2011" in case["evidence"]["ref"]
    target = tmp_path / "probes.yaml"
    assert S.write_probes(target, rb, probes) == 2
    written = S.load_case_file(target)
    assert written[2] == [] and written[0]["kind"] == "probes"
    rerun = S.run_suite(rb, S.Suite(cases=written[1]))
    assert [r.outcome for r in rerun] == ["passed", "passed"]


# ----------------------------------------------------------------------------- the command


def test_cli_failure_output_and_exit_code(tmp_path):
    folder = _cases(tmp_path, GOOD.replace("value: 29.0", "value: 31.0"))
    out = runner.invoke(V.app, [str(ADULT), "--cases", str(folder)])
    assert out.exit_code == 1
    assert "FAIL e29-gas" in out.output
    assert "value expected_pco2: expected 31.0 +/- 0.05, got 29.0" in out.output
    assert "Trace (every rule, in evaluation order):" in out.output
    assert "Decision support only" in out.output


def test_cli_json_and_coverage_minimums(tmp_path):
    folder = _cases(tmp_path, GOOD)
    out = runner.invoke(V.app, [str(ADULT), "--cases", str(folder), "--json"])
    assert out.exit_code == 0
    report = json.loads(out.output)
    assert report["summary"]["passed"] == 1 and report["summary"]["by_evidence"]["CP"] == 1
    assert report["rule_coverage"]["percent"] < 100
    out = runner.invoke(V.app, [str(ADULT), "--cases", str(folder), "--min-rule-coverage", "90"])
    assert out.exit_code == 1
    out = runner.invoke(V.app, [str(ADULT), "--cases", str(folder), "--min-threshold-coverage", "0"])
    assert out.exit_code == 0


def test_cli_bad_case_file_exit_code(tmp_path):
    folder = _cases(tmp_path, "cases: [{id: x}]\n")
    out = runner.invoke(V.app, [str(ADULT), "--cases", str(folder)])
    assert out.exit_code == 1 and "CS-E002" in out.output


def test_dispatcher_runs_verify(tmp_path, capsys):
    from gasrules.cli import main

    assert main(["verify", str(ADULT), "--cases", str(_cases(tmp_path, GOOD))]) == 0
    assert "Cases: 1 (1 passed" in capsys.readouterr().out
