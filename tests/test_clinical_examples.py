"""The clinical examples that showed the shipped rulebooks naming disorders that are not there,
each read as a clinician would read the result.

Every gas here is internally consistent by Henderson-Hasselbalch (HCO3 = 0.0307 x PCO2 x
10^(pH - 6.1), NCCLS C46-A / CLSI C46-A2, from memory of the standard). Reference limits quoted
beside a check come from the rulebook's own parameters and their sources: pH 7.35-7.45, PCO2
35-45 mmHg, HCO3 22-26 mmol/L (common practice); anion gap 8-12 mmol/L without K (Kraut & Madias,
Clin J Am Soc Nephrol 2007); critical limits near the survey means of Kost (JAMA 1990, from
memory).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

import gasrules
from conftest import EXAMPLE_SITE, SHIPPED

ARTERIAL = {"sample_type": "arterial"}


def interpret(rb: Any, **case: Any) -> dict[str, Any]:
    return gasrules.interpret(rb, case)


def codes(result: dict[str, Any]) -> set[str]:
    return {f["code"] for f in result["findings"]}


@pytest.fixture(scope="module", params=["adult", "site"])
def any_rb(request: pytest.FixtureRequest) -> Any:
    return gasrules.load_rulebook(SHIPPED if request.param == "adult" else EXAMPLE_SITE)


@pytest.fixture(scope="module")
def rb() -> Any:
    return gasrules.load_rulebook(SHIPPED)


def overlay(tmp_path: Path, parameters: str) -> Any:
    """A site overlay of the shipped rulebook that sets the given parameters."""
    path = tmp_path / "site.yaml"
    path.write_text(
        "format: gasrules/1\n"
        f"extends: {SHIPPED}\n"
        "metadata: {id: test-site, version: 1.0.0, title: Test site, effective_date: 2026-12-01, status: draft}\n"
        f"parameters:\n{parameters}",
        encoding="utf-8",
    )
    return gasrules.load_rulebook(path, cache=False)


# ----------------------------------------------------------------------------- healthy gases


def test_a_healthy_gas_with_a_marginal_gap_names_no_disorder(any_rb: Any) -> None:
    # pH 7.41, PCO2 39, HCO3 24 are inside their intervals; AG 139 - 102 - 24 = 13 is one above
    # the base limit 12 (and two above the site's 11, Sadjadi et al. 2013), with normal albumin.
    r = interpret(any_rb, ph=7.41, pco2=39, hco3=24, na=139, cl=102, albumin=41, **ARTERIAL)
    assert r["status"] == "interpreted"
    assert r["disorders"] == []
    assert "anion_gap.mildly_raised" in codes(r)
    assert r["headline"].startswith("No acid-base disorder identified")


def test_a_normal_albumin_does_not_push_a_normal_gap_over_the_limit(rb: Any) -> None:
    # AG 12 at albumin 36 g/L: inside both intervals (albumin 35-50 g/L, common practice). Figge's
    # correction to 44 g/L would read 12 + 0.25 x 8 = 14 (Figge et al., Crit Care Med 1998).
    r = interpret(rb, ph=7.40, pco2=40, hco3=24.5, na=140, cl=103.5, albumin=36, **ARTERIAL)
    assert r["disorders"] == []
    assert "anion_gap_albumin_corrected" not in r["values"]
    assert "anion_gap.mildly_raised" not in codes(r)


def test_hypoalbuminaemia_still_gets_figges_correction(rb: Any) -> None:
    # AG 8 with albumin 22 g/L: 8 + 0.25 x (44 - 22) = 13.5 (Figge et al., Crit Care Med 1998).
    r = interpret(rb, ph=7.40, pco2=40, hco3=24.5, na=140, cl=107.5, albumin=22, **ARTERIAL)
    assert r["values"]["anion_gap_albumin_corrected"] == pytest.approx(13.5)


def test_a_site_may_choose_figges_correction_at_every_albumin(tmp_path: Path) -> None:
    site = overlay(tmp_path, '  ag_albumin_correction: {value: always, rationale: "test"}\n')
    # 12 + 0.25 x (44 - 36) = 14.0 (Figge et al., Crit Care Med 1998).
    r = interpret(site, ph=7.40, pco2=40, hco3=24.5, na=140, cl=103.5, albumin=36, **ARTERIAL)
    assert r["values"]["anion_gap_albumin_corrected"] == pytest.approx(14.0)


# ----------------------------------------------------------------------------- compensated respiratory disorders


def test_a_chronic_co2_retainer_has_chronic_respiratory_acidosis_only(any_rb: Any) -> None:
    # Expected HCO3 in chronic respiratory acidosis: 24 + 0.35 x (58 - 40) = 30.3 +/- 2
    # (Adrogue & Madias, J Am Soc Nephrol 2010, from memory); HCO3 31 fits. AG 139 - 97 - 31 = 11.
    r = interpret(
        any_rb, ph=7.34, pco2=58, hco3=31, na=139, cl=97, albumin=36, chronicity="chronic", **ARTERIAL
    )
    assert r["disorders"] == ["respiratory_acidosis"]
    assert r["qualifiers"] == {"respiratory_acidosis": "chronic"}


def test_chronic_respiratory_alkalosis_may_bring_the_ph_back_to_normal(rb: Any) -> None:
    # Chronic hypocapnia: HCO3 24 - 0.4 x 10 = 20 +/- 2 expected (Adrogue & Madias 2010, from
    # memory); pH 7.39 lies inside 7.35-7.45 on the acid side of 7.40.
    r = interpret(rb, ph=7.39, pco2=30, hco3=18.0, na=140, cl=112, chronicity="chronic", **ARTERIAL)
    assert r["disorders"] == ["respiratory_alkalosis"]
    assert r["qualifiers"] == {"respiratory_alkalosis": "chronic"}


# ----------------------------------------------------------------------------- delta analysis


def test_a_severe_combined_acidosis_gets_no_invented_metabolic_alkalosis(rb: Any) -> None:
    # pH 6.80, PCO2 70, HCO3 10.8, AG 40 (excess 30 over the normal 10). Against HCO3 24 the
    # ratio would be 30 / 13.2 = 2.27 (above 2: "metabolic alkalosis"); over a baseline from 24 to
    # the HCO3 expected for the respiratory acidosis (27 acute, 34.5 chronic: Adrogue & Madias
    # 2010) the fall is 13.2 to 23.7 and the ratio reaches 29 / 23.7 = 1.22, inside the band
    # 0.8-2 (Rastegar 2007), so no second metabolic disorder is named.
    r = interpret(rb, ph=6.80, pco2=70, hco3=10.8, na=140, cl=89.2, albumin=40, **ARTERIAL)
    assert "metabolic_alkalosis" not in r["disorders"]
    assert set(r["disorders"]) == {"respiratory_acidosis", "metabolic_acidosis_high_anion_gap"}
    assert "delta.ratio_uncomplicated" in codes(r)


def test_delta_analysis_runs_only_beside_a_named_high_gap_acidosis(rb: Any) -> None:
    # A marginal gap (13) on a normal gas names nothing, so there is no delta analysis.
    r = interpret(rb, ph=7.41, pco2=39, hco3=24, na=139, cl=102, albumin=41, **ARTERIAL)
    assert not {c for c in codes(r) if c.startswith("delta.")}
    assert "delta_ratio" not in r["values"] and "delta_gap" not in r["values"]


# ----------------------------------------------------------------------------- missing HCO3


def test_missing_hco3_is_calculated_and_the_acidosis_named(rb: Any) -> None:
    # HCO3 = 0.0307 x 30 x 10^(7.20 - 6.1) = 11.59 (Henderson-Hasselbalch, CLSI C46-A2 form);
    # Winter's formula: 1.5 x 11.6 + 8 = 25.4 +/- 2 (Albert, Dell & Winters, Ann Intern Med 1967).
    r = interpret(rb, ph=7.20, pco2=30, **ARTERIAL)
    assert r["calculated"] == ["hco3"]
    assert r["inputs"]["hco3"] == pytest.approx(11.6)
    assert "metabolic_acidosis" in r["disorders"]
    assert r["values"]["expected_pco2"] == pytest.approx(25.4)
    assert "consistency.hco3_calculated" in codes(r)
    assert "consistency.passed" not in codes(r)
    assert "HCO3 calculated from pH and PCO2" in r["headline"]
    assert "No acid-base disorder" not in r["headline"]
    event = next(e for e in r["trace"] if e["rule"] == "consistency.hco3_calculated")
    assert event["outcome"] == "fired" and event["reads"]["hco3_calculated"] is True


def test_a_measured_hco3_is_not_marked_calculated(rb: Any) -> None:
    r = interpret(rb, ph=7.20, pco2=30, hco3=11.6, **ARTERIAL)
    assert r["calculated"] == []
    assert "consistency.passed" in codes(r)


def test_the_calculated_marker_cannot_be_given_by_a_case(rb: Any) -> None:
    r = interpret(rb, ph=7.20, pco2=30, hco3=11.6, hco3_calculated=True, **ARTERIAL)
    assert r["status"] == "rejected"
    assert [e["field"] for e in r["errors"]] == ["hco3_calculated"]
    assert r["errors"][0]["code"] == "input.engine_set"


def test_no_disorder_is_never_said_beside_an_abnormal_ph(rb: Any) -> None:
    # Venous pH 7.28 is below the venous interval 7.30-7.43; a venous PCO2 cannot judge
    # ventilation and HCO3 26.0 is inside the venous interval 22-30 ('Reference intervals for
    # venous blood gas measurement in adults', Clin Chem Lab Med c. 2021): no primary can be named.
    r = interpret(rb, ph=7.28, pco2=56, hco3=26.0, sample_type="venous")
    assert r["disorders"] == []
    assert r["headline"].startswith("Acidaemia; Cause not identified from the values given")
    assert "No acid-base disorder" not in r["headline"]


# ----------------------------------------------------------------------------- critical values


def test_a_rejected_field_does_not_hide_another_critical_value(any_rb: Any) -> None:
    # pH 6.45 is outside the plausible range 6.5-8.0 (rejected); K 7.5 is above the critical 6.2.
    r = interpret(any_rb, ph=6.45, k=7.5, **ARTERIAL)
    assert r["status"] == "rejected"
    assert [e["field"] for e in r["errors"]] == ["ph"]
    assert codes(r) == {"critical.k_high"}
    assert r["headline"] == "Critical potassium; Input rejected: see errors (ph)"
    assert r["disorders"] == [] and r["values"] == {}
    assert {e["rule"] for e in r["trace"]} <= {rule.id for rule in any_rb.rules if rule.always}


def test_ph_7_15_is_critical_and_heads_the_headline(rb: Any) -> None:
    # Critical low pH 7.20 (Kost, JAMA 1990 survey mean, from memory); HCO3 0.0307 x 30 x 10^1.05 = 10.3.
    r = interpret(rb, ph=7.15, pco2=30, hco3=10.3, **ARTERIAL)
    assert "critical.ph_low" in codes(r)
    assert r["headline"].startswith("Critical pH; Acidaemia")


@pytest.mark.parametrize("k, critical", [(6.2, False), (6.3, True), (6.5, True), (2.8, False), (2.7, True)])
def test_potassium_critical_limits(rb: Any, k: float, critical: bool) -> None:
    # Kost, JAMA 1990: survey mean critical limits for K about 2.8 and 6.2 mmol/L (from memory).
    r = interpret(rb, ph=7.40, pco2=40, hco3=24.5, k=k, **ARTERIAL)
    assert bool(codes(r) & {"critical.k_high", "critical.k_low"}) is critical
    assert r["headline"].startswith("Critical potassium") is critical


def test_a_critical_pf_ratio_reaches_the_headline(rb: Any) -> None:
    # P/F 60 / 0.8 = 75 with PEEP 10: Berlin 'severe' band (ARDS Definition Task Force, JAMA 2012, from memory).
    r = interpret(rb, ph=7.40, pco2=40, hco3=24.5, po2=60, fio2=0.8, peep=10, **ARTERIAL)
    assert r["values"]["pf_ratio"] == 75
    assert r["headline"].startswith("Severe hypoxaemia (P/F in the Berlin severe band)")
    assert "; Hypoxaemia" not in r["headline"]  # not said twice


# ----------------------------------------------------------------------------- plausibility across fields


def test_glucose_in_mg_per_dl_entered_as_mmol_per_l_is_warned(rb: Any) -> None:
    # Calculated osmolality 2 x 140 + 110 + 5 = 395 against measured 290: gap -105, far below the
    # healthy range of about -14 to +10 (Hoffman et al., J Toxicol Clin Toxicol 1993, from memory).
    r = interpret(
        rb, ph=7.40, pco2=40, hco3=24.5, na=140, cl=104, glucose=110, urea=5, osmolality=290, **ARTERIAL
    )
    assert {"plausibility.glucose_units", "osmolal.gap_implausible"} <= codes(r)
    assert "osmolal.gap_normal" not in codes(r)
    assert "check units" in r["headline"]


def test_an_osmolal_gap_of_minus_60_is_not_called_normal(rb: Any) -> None:
    # 2 x 140 + 5 + 5 = 290 calculated, 230 measured: gap -60 (Hoffman et al. 1993, from memory).
    r = interpret(rb, na=140, glucose=5, urea=5, osmolality=230)
    assert r["values"]["osmolal_gap"] == -60
    assert "osmolal.gap_implausible" in codes(r)
    assert "osmolal.gap_normal" not in codes(r)


def test_lactate_beyond_the_excess_gap_is_a_warning_not_a_reassurance(rb: Any) -> None:
    # AG 140 - 108 - 14.5 = 17.5 (excess 7.5 over 10); lactate 9.6 (excess 8.6 over 1.0) is
    # 115 % of the excess: it cannot all be in the gap (lactate adds to the gap one for one,
    # common practice).
    r = interpret(rb, ph=7.30, pco2=30, hco3=14.5, na=140, cl=108, albumin=40, lactate=9.6, **ARTERIAL)
    assert "anion_gap.lactate_exceeds_gap" in codes(r)
    assert "anion_gap.lactate_accounts" not in codes(r)
    warning = next(f for f in r["findings"] if f["code"] == "anion_gap.lactate_exceeds_gap")
    assert warning["severity"] == "warning" and "check" in warning["text"]


# ----------------------------------------------------------------------------- oxygenation and sample type


def test_no_fio2_means_no_aa_gradient_and_no_pf_ratio(rb: Any) -> None:
    r = interpret(rb, ph=7.40, pco2=40, hco3=24.5, po2=70, **ARTERIAL)
    assert "aa_gradient" not in r["values"] and "pf_ratio" not in r["values"]
    assert "oxygenation.fio2_missing" in codes(r)
    assert "oxygenation.aa_normal" not in codes(r) and "oxygenation.aa_widened" not in codes(r)


def test_a_site_may_assume_room_air_with_a_caution(tmp_path: Path) -> None:
    site = overlay(tmp_path, '  fio2_when_missing: {value: room_air, rationale: "test"}\n')
    # Alveolar PO2 on air at sea level: 0.21 x (760 - 47) - 40 / 0.8 = 99.7 mmHg (West, from memory).
    r = interpret(site, ph=7.40, pco2=40, hco3=24.5, po2=70, **ARTERIAL)
    assert r["values"]["aa_gradient"] == pytest.approx(29.73, abs=0.01)
    assert "oxygenation.fio2_assumed" in codes(r)
    assert any("room air" in c for c in r["cautions"][:1])


def test_an_unlabelled_sample_says_so_in_the_headline(rb: Any) -> None:
    # AG 140 - 104 - 14.5 = 21.5: a high-gap acidosis read against arterial intervals.
    r = interpret(rb, ph=7.30, pco2=30, hco3=14.5, na=140, cl=104)
    assert r["disorders"] == ["metabolic_acidosis_high_anion_gap"]
    assert "Sample type not given: read against arterial intervals" in r["headline"]
