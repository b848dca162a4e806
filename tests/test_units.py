"""Units and the input record: UCUM codes, the spellings people type, conversions, bad values.

Conversions are read through the shipped rulebook (which holds the factors), with the
reference value computed here from its definition and compared with a relative tolerance of
1e-5 unless a looser one is stated with its reason.
"""

from __future__ import annotations

import math
from typing import Any

import pytest

import gasrules
from gasrules.core.units import UCUM_CODES, label, normalise
from gasrules.evaluation.evaluator import format_quantity, read_case

# 1 mmHg = 133.322387415 Pa (conventional millimetre of mercury: BIPM SI Brochure, ISO 80000-4)
PA_PER_MMHG = 133.322387415
MMHG_PER_KPA = 1000 / PA_PER_MMHG  # 7.500616827...
REL = 1e-5

# The UCUM codes a case may use (engine issue, "Fixed contracts: Input").
ISSUE_CODES = [
    "mm[Hg]",
    "kPa",
    "mmol/L",
    "meq/L",
    "g/dL",
    "g/L",
    "mg/dL",
    "umol/L",
    "mosm/kg",
    "[pH]",
    "1",
    "%",
    "Cel",
    "a",
    "L/min",
    "kg",
    "cm[H2O]",
]

# Spellings people type -> UCUM code (common practice).
ALIASES = [
    ("mmHg", "mm[Hg]"),
    ("mm Hg", "mm[Hg]"),
    ("MMHG", "mm[Hg]"),
    ("mmhg", "mm[Hg]"),
    ("torr", "mm[Hg]"),
    ("kpa", "kPa"),
    ("KPa", "kPa"),
    ("mmol/l", "mmol/L"),
    ("mmol/L", "mmol/L"),
    ("MMOL/L", "mmol/L"),
    ("mEq/L", "meq/L"),
    ("mEq/l", "meq/L"),
    ("meq/l", "meq/L"),
    ("MEQ/L", "meq/L"),
    ("g/dl", "g/dL"),
    ("G/DL", "g/dL"),
    ("g/l", "g/L"),
    ("mg/dl", "mg/dL"),
    ("umol/l", "umol/L"),
    ("\u00b5mol/L", "umol/L"),
    ("\u03bcmol/L", "umol/L"),
    ("mOsm/kg", "mosm/kg"),
    ("mOsm/kg H2O", "mosm/kg"),
    ("mosmol/kg", "mosm/kg"),
    ("pH", "[pH]"),
    ("fraction", "1"),
    ("percent", "%"),
    ("\u00b0C", "Cel"),
    ("degC", "Cel"),
    ("celsius", "Cel"),
    ("\u00b0F", "[degF]"),
    ("years", "a"),
    ("yr", "a"),
    ("l/min", "L/min"),
    ("cmH2O", "cm[H2O]"),
    ("cm H2O", "cm[H2O]"),
]


@pytest.mark.parametrize("code", ISSUE_CODES)
def test_every_ucum_code_is_known(code: str) -> None:
    assert code in UCUM_CODES
    assert normalise(code) == code


@pytest.mark.parametrize("typed, code", ALIASES)
def test_common_spellings(typed: str, code: str) -> None:
    assert normalise(typed) == code


@pytest.mark.parametrize("typed", ["furlongs", "mmHg2", "", "   ", "mg", "kPa/s", "mmol"[:-1]])
def test_unknown_spellings(typed: str) -> None:
    assert normalise(typed) is None


def test_labels_for_readers() -> None:
    assert (label("mm[Hg]"), label("meq/L"), label("[pH]"), label("1"), label("Cel"), label("kPa")) == (
        "mmHg",
        "mEq/L",
        "",
        "",
        "\u00b0C",
        "kPa",
    )


# ----------------------------------------------------------------------------- conversions


def canonical(rb: Any, name: str, value: Any) -> float:
    values, errors, _, _ = read_case(rb, {name: value})
    assert errors == [], errors
    return values[name]


def test_kpa_to_mmhg(shipped_rb: Any) -> None:
    # 1 kPa = 1000 / 133.322387415 = 7.50062 mmHg (BIPM SI Brochure / ISO 80000-4)
    factor = shipped_rb.inputs["pco2"].alternatives["kPa"][0]
    assert math.isclose(factor, MMHG_PER_KPA, rel_tol=REL)
    assert math.isclose(canonical(shipped_rb, "pco2", {"value": 1, "unit": "kPa"}), MMHG_PER_KPA, rel_tol=REL)
    assert math.isclose(
        canonical(shipped_rb, "pco2", {"value": 8.7, "unit": "kPa"}), 8.7 * MMHG_PER_KPA, rel_tol=REL
    )
    assert math.isclose(
        canonical(shipped_rb, "po2", {"value": 13.3, "unit": "kpa"}), 13.3 * MMHG_PER_KPA, rel_tol=REL
    )
    for name in ("pco2", "po2", "etco2", "barometric_pressure"):
        assert math.isclose(shipped_rb.inputs[name].alternatives["kPa"][0], MMHG_PER_KPA, rel_tol=REL), name


@pytest.mark.parametrize("typed", ["mmHg", "mm Hg", "mm[Hg]", "torr"])
def test_mmhg_spellings_are_canonical(shipped_rb: Any, typed: str) -> None:
    assert canonical(shipped_rb, "pco2", {"value": 40, "unit": typed}) == 40.0


def test_mmhg_to_kpa_for_display(site_rb: Any) -> None:
    # 40 mmHg x 0.133322387415 = 5.33 kPa (BIPM SI Brochure / ISO 80000-4)
    assert format_quantity(site_rb, 40.0, "mm[Hg]", 1) == "5.33 kPa"
    assert math.isclose(40.0 * PA_PER_MMHG / 1000, 5.33289, rel_tol=REL)


def test_albumin_g_per_dl_to_g_per_l(shipped_rb: Any) -> None:
    # 1 dL = 0.1 L (SI definition): 3.1 g/dL = 31 g/L
    assert math.isclose(canonical(shipped_rb, "albumin", {"value": 3.1, "unit": "g/dL"}), 31.0, rel_tol=REL)
    assert math.isclose(canonical(shipped_rb, "albumin", {"value": 3.1, "unit": "g/dl"}), 31.0, rel_tol=REL)
    # and haemoglobin the other way: 135 g/L = 13.5 g/dL
    assert math.isclose(canonical(shipped_rb, "hb", {"value": 135, "unit": "g/L"}), 13.5, rel_tol=REL)


def test_percent_to_fraction(shipped_rb: Any) -> None:
    # 1 % = 0.01 (SI Brochure, dimensionless quantities)
    assert math.isclose(canonical(shipped_rb, "fio2", {"value": 40, "unit": "%"}), 0.40, rel_tol=REL)
    assert math.isclose(canonical(shipped_rb, "fio2", {"value": 21, "unit": "percent"}), 0.21, rel_tol=REL)
    assert math.isclose(canonical(shipped_rb, "so2", {"value": 97, "unit": "%"}), 0.97, rel_tol=REL)
    assert canonical(shipped_rb, "fio2", 0.4) == 0.4


def test_fahrenheit_to_celsius(shipped_rb: Any) -> None:
    # t(degC) = (t(degF) - 32) x 5/9 (definition of the Fahrenheit scale): 98.6 F = 37 C, 104 F = 40 C
    assert math.isclose(
        canonical(shipped_rb, "temperature", {"value": 98.6, "unit": "\u00b0F"}), 37.0, rel_tol=REL
    )
    assert math.isclose(
        canonical(shipped_rb, "temperature", {"value": 104, "unit": "[degF]"}), 40.0, rel_tol=REL
    )


@pytest.mark.parametrize(
    "name, value, unit, expected, rel, source",
    [
        # molar masses: IUPAC standard atomic weights; mmol/L = mg/dL x 10 / (g/mol)
        ("glucose", 180.16, "mg/dL", 10.0, REL, "glucose 180.16 g/mol (IUPAC atomic weights)"),
        ("lactate", 9.008, "mg/dL", 1.0, REL, "lactic acid 90.08 g/mol (IUPAC atomic weights)"),
        ("urea", 60.06, "mg/dL", 10.0, REL, "urea 60.06 g/mol (IUPAC atomic weights)"),
        # creatinine 113.12 g/mol gives 88.40; the rulebook uses the common factor 88.42 (common practice),
        # 2.3e-4 apart: compared with 1e-3.
        (
            "creatinine",
            1.0,
            "mg/dL",
            10000 / 113.12,
            1e-3,
            "creatinine 113.12 g/mol; factor 88.4 common practice",
        ),
        ("na", 140, "mEq/L", 140.0, REL, "monovalent ion: 1 mEq = 1 mmol (common practice)"),
        ("hco3", 24, "meq/l", 24.0, REL, "monovalent ion: 1 mEq = 1 mmol (common practice)"),
    ],
)
def test_chemistry_conversions(
    shipped_rb: Any, name: str, value: float, unit: str, expected: float, rel: float, source: str
) -> None:
    assert math.isclose(canonical(shipped_rb, name, {"value": value, "unit": unit}), expected, rel_tol=rel), (
        source
    )


def test_value_without_unit_is_canonical(shipped_rb: Any) -> None:
    assert canonical(shipped_rb, "pco2", {"value": 40}) == 40.0
    assert canonical(shipped_rb, "pco2", 40) == 40.0
    assert canonical(shipped_rb, "pco2", 40.0) == 40.0


# ----------------------------------------------------------------------------- rejected values


def rejected(rb: Any, case: dict[str, Any]) -> list[dict[str, str]]:
    result = gasrules.interpret(rb, case)
    assert result["status"] == "rejected"
    # never half-read: nothing of the case is used
    assert (result["inputs"], result["values"], result["findings"], result["disorders"]) == ({}, {}, [], [])
    # no critical value among the fields read: the headline names the rejected fields only
    fields = list(dict.fromkeys(e["field"] for e in result["errors"] if e["field"]))
    assert result["headline"] == "Input rejected: see errors" + (f" ({', '.join(fields)})" if fields else "")
    for e in result["errors"]:
        assert set(e) == {"field", "code", "message", "accepted"} and e["message"] and e["accepted"]
    return result["errors"]


GOOD = {"ph": 7.40, "pco2": 40, "hco3": 24}


@pytest.mark.parametrize(
    "field, value, code, accepted",
    [
        ("pco2", {"value": 40, "unit": "furlongs"}, "input.unknown_unit", "one of mm[Hg], kPa"),
        ("pco2", {"value": 40, "unit": ""}, "input.unknown_unit", "one of mm[Hg], kPa"),
        ("pco2", {"value": 40, "unit": 7}, "input.unknown_unit", "mm[Hg], kPa"),
        ("albumin", {"value": 3.1, "unit": "mmol/L"}, "input.unit_mismatch", "one of g/L, g/dL"),
        ("hco3", {"value": 22, "unit": "kPa"}, "input.unit_mismatch", "one of mmol/L, meq/L"),
        ("pco2", {"value": 41, "unit": "mg/dL"}, "input.unit_mismatch", "one of mm[Hg], kPa"),
        ("ph", float("nan"), "input.not_finite", "a finite number"),
        ("ph", "NaN", "input.not_finite", "a finite number"),
        ("pco2", float("inf"), "input.not_finite", "a finite number"),
        ("pco2", float("-inf"), "input.not_finite", "a finite number"),
        ("pco2", {"value": float("inf"), "unit": "kPa"}, "input.not_finite", "a finite number"),
        ("ph", "seven", "input.not_a_number", "a number in [pH]"),
        ("ph", "7.3O", "input.not_a_number", "a number in [pH]"),
        ("ph", "7,40", "input.not_a_number", "a number in [pH]"),
        ("ph", "", "input.not_a_number", "a number in [pH]"),
        ("ph", True, "input.not_a_number", "a number in [pH]"),
        ("ph", False, "input.not_a_number", "a number in [pH]"),
        ("ph", [7.4], "input.not_a_number", "a number in [pH]"),
        ("pco2", {"value": "forty", "unit": "mmHg"}, "input.not_a_number", "a number in mm[Hg]"),
        ("pco2", {"value": True, "unit": "mmHg"}, "input.not_a_number", "a number in mm[Hg]"),
        (
            "pco2",
            {"unit": "kPa"},
            "input.bad_form",
            'a number in mm[Hg], or {"value": x, "unit": one of mm[Hg], kPa}',
        ),
        (
            "pco2",
            {"value": 40, "unit": "mmHg", "note": "arterial"},
            "input.bad_form",
            'a number in mm[Hg], or {"value": x, "unit": one of mm[Hg], kPa}',
        ),
        # negative sodium: not plausible (plausible range of the shipped rulebook)
        ("na", -5, "input.out_of_range", "90 to 200 mmol/L"),
        ("na", 1390, "input.out_of_range", "90 to 200 mmol/L"),
        ("ph", 73.4, "input.out_of_range", "6.5 to 8"),
        ("pco2", {"value": 40, "unit": "kPa"}, "input.out_of_range", "5 to 250 mmHg"),
        ("fio2", {"value": 0.4, "unit": "%"}, "input.out_of_range", "0.18 to 1"),
        (
            "sample_type",
            "arterialised",
            "input.unknown_code",
            "one of arterial, venous, capillary, mixed_venous, unknown",
        ),
        ("sample_type", 3, "input.unknown_code", "one of arterial, venous, capillary, mixed_venous, unknown"),
        ("pregnant", "maybe", "input.bad_flag", "true or false"),
        ("pregnant", 2, "input.bad_flag", "true or false"),
    ],
)
def test_bad_value_rejected_with_field_code_and_accepted_form(
    shipped_rb: Any, field: str, value: Any, code: str, accepted: str
) -> None:
    case = dict(GOOD)
    case[field] = value
    errors = rejected(shipped_rb, case)
    assert [(e["field"], e["code"]) for e in errors] == [(field, code)]
    assert errors[0]["accepted"] == accepted
    assert field in errors[0]["message"]


def test_out_of_range_message_names_the_value_in_canonical_unit(shipped_rb: Any) -> None:
    errors = rejected(shipped_rb, dict(GOOD, pco2={"value": 40, "unit": "kPa"}))
    # 40 kPa x 7.50062 = 300.025 mmHg (BIPM SI Brochure / ISO 80000-4)
    assert errors[0]["message"] == "pco2 = 300.025 mmHg is outside the plausible range"


def test_every_bad_field_is_reported(shipped_rb: Any) -> None:
    errors = rejected(shipped_rb, {"ph": "seven", "pco2": 40, "hco3": -1, "paco2": 41, "na": float("nan")})
    assert [(e["field"], e["code"]) for e in errors] == [
        ("ph", "input.not_a_number"),
        ("hco3", "input.out_of_range"),
        ("paco2", "input.unknown_key"),
        ("na", "input.not_finite"),
    ]
    unknown = errors[2]
    assert unknown["accepted"].startswith("one of ") and unknown["accepted"].endswith(", case_id, context")
    assert "pco2" in unknown["accepted"] and "sample_type" in unknown["accepted"]


@pytest.mark.parametrize(
    "case, field, code",
    [
        ([7.4, 40, 24], "", "input.not_an_object"),
        ("ph=7.4", "", "input.not_an_object"),
        (None, "", "input.not_an_object"),
        ({"case_id": 17, "ph": 7.4}, "case_id", "input.bad_case_id"),
        ({"context": "ICU", "ph": 7.4}, "context", "input.bad_context"),
    ],
)
def test_bad_case_shapes(shipped_rb: Any, case: Any, field: str, code: str) -> None:
    result = gasrules.interpret(shipped_rb, case)
    assert result["status"] == "rejected"
    assert [(e["field"], e["code"]) for e in result["errors"]] == [(field, code)]


@pytest.mark.parametrize(
    "field, value, source",
    [
        ("base_excess", -12, "a base deficit is a negative base excess (Siggaard-Andersen; common practice)"),
        ("base_excess", -30, "severe metabolic acidosis (common practice)"),
        ("ph", 6.8, "pH 6.8 is published in survivors of severe acidosis (engine issue #2; from memory)"),
        ("na", 90, "lower plausible limit itself is accepted (closed interval; common practice)"),
        ("lactate", 0, "lactate 0 mmol/L is a reportable result (common practice)"),
    ],
)
def test_extreme_but_plausible_values_accepted(
    shipped_rb: Any, field: str, value: float, source: str
) -> None:
    values, errors, _, _ = read_case(shipped_rb, {field: value})
    assert errors == [], source
    assert values[field] == float(value)


def test_hco3_above_80_accepted(shipped_rb: Any) -> None:
    # HCO3 above 80 mmol/L is published in case reports of extreme metabolic alkalosis (engine issue #2; from memory)
    values, errors, _, _ = read_case(shipped_rb, {"hco3": 85})
    assert errors == [] and values["hco3"] == 85.0


def test_coded_and_flag_inputs(shipped_rb: Any) -> None:
    values, errors, _, _ = read_case(
        shipped_rb, {"sample_type": " Arterial ", "pregnant": "no", "chronicity": "chronic"}
    )
    assert errors == []
    assert (values["sample_type"], values["pregnant"], values["chronicity"]) == ("arterial", False, "chronic")
    values, _, _, _ = read_case(shipped_rb, {})
    # defaults of the shipped rulebook
    assert (values["sample_type"], values["pregnant"], values["chronicity"], values["ph"]) == (
        "unknown",
        False,
        "unknown",
        None,
    )


def test_null_value_is_missing_not_an_error(shipped_rb: Any) -> None:
    values, errors, _, _ = read_case(shipped_rb, {"ph": 7.4, "albumin": None})
    assert errors == [] and values["albumin"] is None
