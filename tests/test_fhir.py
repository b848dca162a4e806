"""FHIR R4 adapter: reading blood gas Observations into a case, writing the interpretation.

All patients and values in tests/data/fhir are invented (demo data). The panels were made
consistent by Henderson-Hasselbalch, pH = 6.1 + log10(HCO3 / (0.0307 x PCO2)) (nccls1994),
to within 0.01; the reader itself checks no clinical number: it maps codes and units.

The tests use a small stand-in input catalogue (``CATALOG``) shaped like the rulebook's
``InputSpec`` so the adapter is tested on its own; the tests at the end read the shipped rulebook
through ``gasrules.load_rulebook`` when the engine is present.
"""

from __future__ import annotations

import copy
import functools
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from gasrules.integration.fhir import FINDING_CS, case_from_fhir, result_to_fhir
from gasrules.integration.standard_codes import Issue

DATA = Path(__file__).parent / "data" / "fhir"
DEMO = Path(__file__).parents[1] / "tools" / "demo" / "fhir"


@dataclass(frozen=True)
class FakeInput:
    """The fields of gasrules InputSpec that the adapters read."""

    name: str
    unit: str = ""
    kind: str = "number"
    loinc: tuple[str, ...] = ()
    alternatives: dict[str, tuple[float, float]] = field(default_factory=dict)
    codes: tuple[str, ...] = ()


_KPA = {"kPa": (7.50062, 0.0)}  # kPa -> mm[Hg] factor as in rulebooks/adult (UCUM m[Hg])
CATALOG: dict[str, FakeInput] = {
    i.name: i
    for i in (
        FakeInput("ph", "[pH]", loinc=("2744-1", "2746-6", "2745-8", "11558-4", "19213-8")),
        FakeInput("pco2", "mm[Hg]", loinc=("2019-8", "2021-4", "2020-6", "11557-6"), alternatives=_KPA),
        FakeInput("po2", "mm[Hg]", loinc=("2703-7", "2705-2", "2704-5", "11556-8"), alternatives=_KPA),
        FakeInput(
            "hco3",
            "mmol/L",
            loinc=("1960-4", "14627-4", "1961-2", "1959-6", "19229-4"),
            alternatives={"meq/L": (1.0, 0.0)},
        ),
        FakeInput("base_excess", "mmol/L", loinc=("1925-7", "1927-3", "1926-5", "11555-0")),
        FakeInput(
            "na",
            "mmol/L",
            loinc=("2951-2", "2947-0", "32717-1", "39791-9"),
            alternatives={"meq/L": (1.0, 0.0)},
        ),
        FakeInput("k", "mmol/L", loinc=("2823-3", "6298-4", "32713-0", "39789-3")),
        FakeInput("cl", "mmol/L", loinc=("2075-0", "2069-3", "41650-3", "41649-5")),
        FakeInput("lactate", "mmol/L", loinc=("2524-7", "32693-4", "2518-9", "2519-7")),
        FakeInput("fio2", "1", loinc=("3150-0", "19994-3"), alternatives={"%": (0.01, 0.0)}),
        FakeInput("temperature", "Cel", loinc=("8310-5",)),
        FakeInput("age", "a", loinc=("30525-0",)),
        FakeInput(
            "sample_type",
            kind="code",
            loinc=("31208-2",),
            codes=("arterial", "venous", "capillary", "mixed_venous", "unknown"),
        ),
        FakeInput("pregnant", kind="flag"),
    )
}


def load(name: str) -> dict[str, Any]:
    return json.loads((DATA / name).read_text())


def entry_of(bundle: dict[str, Any], obs_id: str) -> tuple[int, dict[str, Any]]:
    for i, e in enumerate(bundle["entry"]):
        if e["resource"].get("id") == obs_id:
            return i, e["resource"]
    raise KeyError(obs_id)


def codes_of(issues: tuple[Issue, ...] | list[Issue]) -> list[str]:
    return [i.code for i in issues]


# ----------------------------------------------------------------------------- reading
def test_full_arterial_panel_reads_every_member_with_its_ucum_unit() -> None:
    read = case_from_fhir(load("arterial_panel.json"), CATALOG)
    assert read.issues == ()
    assert read.case == {
        "case_id": "abg-0001",
        "ph": {"value": 7.3, "unit": "[pH]"},
        "pco2": {"value": 31, "unit": "mm[Hg]"},
        "po2": {"value": 88, "unit": "mm[Hg]"},
        "hco3": {"value": 15.2, "unit": "mmol/L"},
        "base_excess": {"value": -10.1, "unit": "mmol/L"},
        "na": {"value": 139, "unit": "mmol/L"},
        "k": {"value": 4.1, "unit": "mmol/L"},
        "cl": {"value": 111, "unit": "mmol/L"},
        "lactate": {"value": 1.1, "unit": "mmol/L"},
        "fio2": {"value": 21, "unit": "%"},  # passed on as sent; the engine converts
        "temperature": {"value": 37.0, "unit": "Cel"},
        # born 1961-07-01, sampled 2031-03-14: 69 completed years (arithmetic)
        "age": {"value": 69, "unit": "a"},
        "sample_type": "arterial",  # LOINC BldA axis and Specimen agree
    }
    assert read.sources["pco2"] == "urn:uuid:6f1c2a6e-1b0e-4d5e-9a51-000000000012"
    assert read.sources["age"] == "urn:uuid:6f1c2a6e-1b0e-4d5e-9a51-000000000001"
    assert read.subject == "urn:uuid:6f1c2a6e-1b0e-4d5e-9a51-000000000001"
    assert read.effective == "2031-03-14T08:10:00+00:00"
    assert read.ok


def test_kpa_units_pass_through_for_the_engine_to_convert() -> None:
    read = case_from_fhir(load("kpa_panel.json"), CATALOG)
    assert read.ok and read.issues == ()
    assert read.case["pco2"] == {"value": 6.8, "unit": "kPa"}
    assert read.case["po2"] == {"value": 9.2, "unit": "kPa"}
    assert read.case["case_id"] == "abg-0002"  # searchset Bundle id


def test_venous_specimen_from_loinc_axis_and_specimen_resource() -> None:
    read = case_from_fhir(load("venous_panel.json"), CATALOG)
    assert read.issues == ()
    assert read.case["sample_type"] == "venous"
    assert read.case["pco2"] == {"value": 48, "unit": "mm[Hg]"}


def test_venous_specimen_on_unspecified_blood_codes() -> None:
    """Codes on the Bld axis say nothing about the sample: the Specimen resource decides."""
    bundle = load("venous_panel.json")
    _, ph = entry_of(bundle, "ph-0003")
    ph["code"]["coding"][0]["code"] = "11558-4"  # pH of Blood (unspecified)
    _, pco2 = entry_of(bundle, "pco2-0003")
    pco2["code"]["coding"][0]["code"] = "11557-6"
    _, panel = entry_of(bundle, "vbg-0003-panel")
    panel["code"]["coding"][0]["code"] = "24338-6"  # Gas panel - Blood
    _, hco3 = entry_of(bundle, "hco3-0003")
    hco3["code"]["coding"][0]["code"] = "1959-6"
    read = case_from_fhir(bundle, CATALOG)
    assert read.issues == ()
    assert read.case["sample_type"] == "venous"
    assert read.sources["sample_type"] == "urn:uuid:9b3e4c80-3d20-4f7b-9c73-000000000002"


def test_arterial_code_with_venous_specimen_is_a_conflict_not_a_choice() -> None:
    bundle = load("arterial_panel.json")
    i = next(i for i, e in enumerate(bundle["entry"]) if e["resource"]["resourceType"] == "Specimen")
    bundle["entry"][i]["resource"]["type"]["coding"][0]["code"] = "122555007"
    read = case_from_fhir(bundle, CATALOG)
    assert "sample_type" not in read.case
    [issue] = [x for x in read.issues if x.code == "specimen.conflict"]
    assert issue.severity == "error"
    assert "says arterial (loinc)" in issue.message and "says venous (specimen)" in issue.message


def test_unknown_loinc_code_is_reported_with_its_path_and_ignored() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "lac-0001")
    obs["code"]["coding"][0]["code"] = "99999-9"
    read = case_from_fhir(bundle, CATALOG)
    assert "lactate" not in read.case
    assert [x.as_dict() for x in read.issues] == [
        {
            "path": f"Bundle.entry[{i}].resource.code",
            "code": "code.unknown",
            "message": "LOINC 99999-9 feeds no input of this rulebook; ignored",
            "severity": "warning",
        }
    ]
    assert read.ok  # a warning, not an error


def test_observation_without_loinc_coding_is_reported() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "k-0001")
    obs["code"]["coding"][0]["system"] = "urn:example:local-lab"
    read = case_from_fhir(bundle, CATALOG)
    assert "k" not in read.case
    assert codes_of(read.issues) == ["code.not_loinc"]
    assert read.issues[0].path == f"Bundle.entry[{i}].resource.code"


def test_unit_that_does_not_fit_the_input_is_reported_and_the_value_left_out() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "pco2-0001")
    obs["valueQuantity"].update({"code": "mmol/L", "unit": "mmol/L"})
    read = case_from_fhir(bundle, CATALOG)
    assert "pco2" not in read.case
    assert [str(x) for x in read.issues] == [
        f"Bundle.entry[{i}].resource.valueQuantity.code: unit 'mmol/L' is not accepted for "
        "pco2; accepted: mm[Hg], kPa"
    ]
    assert not read.ok


def test_missing_unit_is_reported_never_guessed() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "fio2-0001")  # 21 could be % or a wrong fraction
    obs["valueQuantity"] = {"value": 21}
    read = case_from_fhir(bundle, CATALOG)
    assert "fio2" not in read.case
    assert [(x.path, x.code, x.message) for x in read.issues] == [
        (f"Bundle.entry[{i}].resource.valueQuantity", "unit.missing", "no unit for fio2; accepted: 1, %")
    ]


def test_ph_without_unit_is_read_on_its_only_scale_with_a_notice() -> None:
    bundle = load("arterial_panel.json")
    _, obs = entry_of(bundle, "ph-0001")
    obs["valueQuantity"] = {"value": 7.3}
    read = case_from_fhir(bundle, CATALOG)
    assert read.case["ph"] == {"value": 7.3, "unit": "[pH]"}
    assert [(x.code, x.severity) for x in read.issues] == [("unit.assumed", "notice")]


def test_common_spelling_without_ucum_system_is_read_with_a_notice() -> None:
    bundle = load("arterial_panel.json")
    _, obs = entry_of(bundle, "pco2-0001")
    obs["valueQuantity"] = {"value": 31, "unit": "mmHg"}
    read = case_from_fhir(bundle, CATALOG)
    assert read.case["pco2"] == {"value": 31, "unit": "mm[Hg]"}
    assert [(x.code, x.message) for x in read.issues] == [("unit.alias", "unit 'mmHg' read as UCUM 'mm[Hg]'")]


def test_unknown_spelling_in_a_local_system_is_reported() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "na-0001")
    obs["valueQuantity"] = {"value": 139, "system": "urn:example:units", "code": "MEQL"}
    read = case_from_fhir(bundle, CATALOG)
    assert "na" not in read.case
    assert [(x.path, x.code) for x in read.issues] == [
        (f"Bundle.entry[{i}].resource.valueQuantity.system", "unit.not_ucum")
    ]


def test_entered_in_error_result_is_skipped_with_a_notice() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "hco3-0001")
    obs["status"] = "entered-in-error"
    read = case_from_fhir(bundle, CATALOG)
    assert "hco3" not in read.case
    assert [x.as_dict() for x in read.issues] == [
        {
            "path": f"Bundle.entry[{i}].resource.status",
            "code": "status.skipped",
            "message": "hco3 is entered-in-error and was skipped",
            "severity": "notice",
        }
    ]
    assert read.ok


def test_preliminary_result_is_left_out_unless_allowed() -> None:
    bundle = load("arterial_panel.json")
    _, obs = entry_of(bundle, "lac-0001")
    obs["status"] = "preliminary"
    left_out = case_from_fhir(bundle, CATALOG)
    assert "lactate" not in left_out.case
    assert [(x.code, x.severity) for x in left_out.issues] == [("status.not_final", "warning")]
    allowed = case_from_fhir(bundle, CATALOG, allow_preliminary=True)
    assert allowed.case["lactate"] == {"value": 1.1, "unit": "mmol/L"}
    assert codes_of(allowed.issues) == ["status.preliminary_used"]


def test_two_different_values_for_one_input_leave_it_out() -> None:
    bundle = load("arterial_panel.json")
    _, obs = entry_of(bundle, "na-0001")
    twin = copy.deepcopy(obs)
    twin["id"] = "na-0001-b"
    twin["code"]["coding"][0]["code"] = "2951-2"  # serum sodium, another analyser
    twin["valueQuantity"]["value"] = 134
    bundle["entry"].append({"fullUrl": "urn:uuid:twin", "resource": twin})
    read = case_from_fhir(bundle, CATALOG)
    assert "na" not in read.case
    [issue] = read.issues
    assert issue.code == "value.conflict"
    assert "(139 mmol/L; 134 mmol/L)" in issue.message


def test_the_same_value_in_another_unit_is_a_duplicate_not_a_conflict() -> None:
    bundle = load("kpa_panel.json")
    _, obs = entry_of(bundle, "hco3-0002")
    twin = copy.deepcopy(obs)
    twin["id"] = "hco3-0002-b"
    twin["valueQuantity"].update({"unit": "meq/L", "code": "meq/L"})
    bundle["entry"].append({"resource": twin})
    read = case_from_fhir(bundle, CATALOG)
    assert read.case["hco3"] == {"value": 31, "unit": "mmol/L"}
    assert [(x.code, x.severity) for x in read.issues] == [("value.duplicate", "notice")]


def test_censored_value_is_not_used_as_exact() -> None:
    bundle = load("arterial_panel.json")
    i, obs = entry_of(bundle, "lac-0001")
    obs["valueQuantity"].update({"value": 0.3, "comparator": "<"})
    read = case_from_fhir(bundle, CATALOG)
    assert "lactate" not in read.case
    assert [(x.path, x.code) for x in read.issues] == [
        (f"Bundle.entry[{i}].resource.valueQuantity.comparator", "value.censored")
    ]


def test_single_observation_with_components_and_a_panel_code() -> None:
    obs = {
        "resourceType": "Observation",
        "id": "poc-17",
        "status": "final",
        "code": {"coding": [{"system": "http://loinc.org", "code": "24336-0"}]},
        "effectiveDateTime": "2031-05-02T14:00:00Z",
        "component": [
            {
                "code": {"coding": [{"system": "http://loinc.org", "code": "2744-1"}]},
                "valueQuantity": {"value": 7.46, "system": "http://unitsofmeasure.org", "code": "[pH]"},
            },
            {
                "code": {"coding": [{"system": "http://loinc.org", "code": "2019-8"}]},
                "valueQuantity": {"value": 4.4, "system": "http://unitsofmeasure.org", "code": "kPa"},
            },
            {
                "code": {"coding": [{"system": "http://loinc.org", "code": "8867-4"}]},
                "valueQuantity": {"value": 88, "system": "http://unitsofmeasure.org", "code": "/min"},
            },
        ],
    }
    read = case_from_fhir(obs, CATALOG)
    assert read.case == {
        "case_id": "poc-17",
        "ph": {"value": 7.46, "unit": "[pH]"},
        "pco2": {"value": 4.4, "unit": "kPa"},
        "sample_type": "arterial",
    }
    assert [(x.path, x.code) for x in read.issues] == [("Observation.component[2].code", "code.unknown")]


def test_list_of_observations_and_an_unresolved_member() -> None:
    bundle = load("venous_panel.json")
    resources = [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "Observation"]
    read = case_from_fhir(resources, CATALOG)
    # members were referenced by fullUrl, which a plain list does not have
    assert {x.code for x in read.issues} == {"read.unresolved_reference"}
    assert read.issues[0].path.startswith("Observation[0].hasMember[")
    assert read.case["sample_type"] == "venous"  # from the LOINC BldV axis alone
    assert read.case["case_id"] == "vbg-0003-panel"
    assert "age" not in read.case  # no Patient in the list


def test_specimen_source_observation_and_a_flag() -> None:
    resources = [
        {
            "resourceType": "Observation",
            "id": "s1",
            "status": "final",
            "code": {"coding": [{"system": "http://loinc.org", "code": "31208-2"}]},
            "valueCodeableConcept": {"coding": [{"system": "http://snomed.info/sct", "code": "122554006"}]},
        },
        {
            "resourceType": "Observation",
            "id": "p1",
            "status": "final",
            "code": {"coding": [{"system": "http://loinc.org", "code": "11558-4"}]},
            "valueQuantity": {"value": 7.38, "system": "http://unitsofmeasure.org", "code": "[pH]"},
        },
    ]
    read = case_from_fhir(resources, CATALOG)
    assert read.issues == ()
    assert read.case == {"ph": {"value": 7.38, "unit": "[pH]"}, "sample_type": "capillary"}


@pytest.mark.parametrize(
    ("doc", "code"),
    [
        ({"resourceType": "Patient"}, "read.unsupported_resource"),
        ({"resourceType": "Bundle", "type": "history"}, "read.unsupported_bundle"),
        ("not json", "read.not_json_object"),
    ],
)
def test_documents_the_reader_cannot_take_are_errors(doc: Any, code: str) -> None:
    read = case_from_fhir(doc, CATALOG)
    assert codes_of(read.issues) == [code] and not read.ok


def test_age_from_a_partial_birth_date_is_not_computed() -> None:
    bundle = load("arterial_panel.json")
    bundle["entry"][0]["resource"]["birthDate"] = "1961"
    read = case_from_fhir(bundle, CATALOG)
    assert "age" not in read.case
    assert [(x.path, x.code) for x in read.issues] == [
        ("Bundle.entry[0].resource.birthDate", "age.not_computed")
    ]


def test_different_collection_times_are_flagged() -> None:
    bundle = load("arterial_panel.json")
    _, obs = entry_of(bundle, "hco3-0001")
    obs["effectiveDateTime"] = "2031-03-14T11:40:00+00:00"
    read = case_from_fhir(bundle, CATALOG)
    assert codes_of(read.issues) == ["time.mismatch"]
    assert read.case["hco3"] == {"value": 15.2, "unit": "mmol/L"}


# ----------------------------------------------------------------------------- writing
RULEBOOK = {"id": "adult-default", "version": "1.0.0", "sha256": "ab" * 32}
RESULT: dict[str, Any] = {  # shaped like an engine result; texts are our own placeholders
    "schema_version": "1",
    "case_id": "abg-0001",
    "context": {},
    "rulebook": dict(RULEBOOK),
    "engine_version": "0.1.0",
    "status": "interpreted",
    "headline": "Metabolic acidosis with a high anion gap",
    "errors": [],
    "values": {"ph": 7.3, "anion_gap": 12.8, "expected_pco2": 30.8},
    "units": {"ph": "[pH]", "anion_gap": "mmol/L", "expected_pco2": "mm[Hg]"},
    "findings": [
        {
            "code": "acidaemia",
            "category": "ph_state",
            "severity": "warning",
            "text": "pH 7.30 is below 7.35: acidaemia.",
            "rule": "ph.acidaemia",
        },
        {
            "code": "resp_compensation_appropriate",
            "category": "compensation",
            "severity": "info",
            "text": "PCO2 is within the expected range.",
            "rule": "comp.x",
        },
    ],
    "disorders": ["metabolic_acidosis_high_anion_gap"],
    "qualifiers": {},
    "not_assessed": [{"what": "oxygenation", "why": "no FiO2"}],
    "cautions": ["Supports, never replaces, clinical judgement."],
    "trace": [],
}


def validate_r4(bundle: dict[str, Any]) -> None:
    """Structural check with fhir.resources' R4B models (same as R4 for these resources)."""
    from fhir.resources.R4B.bundle import Bundle

    Bundle.model_validate(bundle)


def resources(bundle: dict[str, Any], rtype: str) -> list[dict[str, Any]]:
    return [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == rtype]


def test_interpretation_bundle_is_valid_fhir_and_points_back_at_the_inputs() -> None:
    read = case_from_fhir(load("arterial_panel.json"), CATALOG)
    out = result_to_fhir(
        RESULT,
        read.sources,
        rulebook_info=RULEBOOK,
        subject=read.subject,
        effective=read.effective,
        issued="2031-03-14T08:25:00+00:00",
    )
    validate_r4(out)
    assert out["type"] == "collection"
    [obs] = resources(out, "Observation")
    assert obs["status"] == "preliminary"
    assert obs["valueString"] == RESULT["headline"]
    assert {r["reference"] for r in obs["derivedFrom"]} == set(read.sources.values())
    assert "Supports, never replaces, clinical judgement." in [n["text"] for n in obs["note"]]
    assert "Not assessed: oxygenation (no FiO2)" in [n["text"] for n in obs["note"]]
    derived = {
        c["code"]["coding"][-1]["code"]: c["valueQuantity"]  # the project code last
        for c in obs["component"]
        if "valueQuantity" in c
    }
    assert derived == {  # inputs (ph) are not repeated as components
        "anion_gap": {
            "value": 12.8,
            "unit": "mmol/L",
            "system": "http://unitsofmeasure.org",
            "code": "mmol/L",
        },
        "expected_pco2": {
            "value": 30.8,
            "unit": "mm[Hg]",
            "system": "http://unitsofmeasure.org",
            "code": "mm[Hg]",
        },
    }
    gap = next(c for c in obs["component"] if c["code"]["text"] == "anion_gap")
    assert gap["code"]["coding"][0] == {
        "system": "http://loinc.org",
        "code": "33037-3",
        "display": "Anion gap in Serum or Plasma",
    }  # codes.md
    acid = next(
        c for c in obs["component"] if c["code"]["coding"][0] == {"system": FINDING_CS, "code": "acidaemia"}
    )
    assert acid["interpretation"][0]["coding"][0]["code"] == "A"
    [report] = resources(out, "DiagnosticReport")
    assert report["conclusion"] == RESULT["headline"]
    assert [c["coding"][0]["code"] for c in report["conclusionCode"]] == [
        "metabolic_acidosis_high_anion_gap",
        "acidaemia",
    ]  # info findings stay out
    assert "clinical judgement" in report["text"]["div"]
    [prov] = resources(out, "Provenance")
    assert prov["policy"] == [f"https://gasrules.example/rulebook/adult-default/1.0.0?sha256={'ab' * 32}"]
    assert prov["agent"][0]["who"]["display"] == "gasrules engine 0.1.0"
    assert prov["entity"][-1]["what"]["identifier"]["value"] == "adult-default|1.0.0"
    [device] = resources(out, "Device")
    assert device["version"] == [{"value": "0.1.0"}]


def test_same_result_gives_the_same_bundle() -> None:
    refs = {"ph": "Observation/ph-1"}
    a = result_to_fhir(RESULT, refs, rulebook_info=RULEBOOK, issued="2031-01-01T00:00:00Z")
    b = result_to_fhir(RESULT, refs, rulebook_info=RULEBOOK, issued="2031-01-01T00:00:00Z")
    assert a == b


def test_rejected_result_carries_its_errors_in_notes() -> None:
    rejected = {
        **RESULT,
        "status": "rejected",
        "headline": "Not interpreted",
        "disorders": [],
        "findings": [],
        "values": {},
        "errors": [
            {
                "field": "ph",
                "code": "input.out_of_range",
                "message": "pH 9.1 is outside 6.5-8.0",
                "accepted": "6.5-8.0",
            }
        ],
    }
    out = result_to_fhir(rejected, {}, rulebook_info=RULEBOOK, issued="2031-01-01T00:00:00Z")
    validate_r4(out)
    [obs] = resources(out, "Observation")
    assert "component" not in obs and "derivedFrom" not in obs
    assert obs["note"][:2] == [
        {"text": "Engine status: rejected."},
        {"text": "Input error in ph: pH 9.1 is outside 6.5-8.0 (accepted: 6.5-8.0)"},
    ]


def test_rulebook_info_must_match_the_result() -> None:
    other = {**RULEBOOK, "sha256": "cd" * 32}
    with pytest.raises(ValueError, match="sha256"):
        result_to_fhir(RESULT, {}, rulebook_info=other)
    with pytest.raises(ValueError, match="lacks version"):
        result_to_fhir(RESULT, {}, rulebook_info={"id": "x", "sha256": "y"})


# ----------------------------------------------------------------------------- demo files
@pytest.mark.parametrize("path", sorted(DEMO.glob("*.json")), ids=lambda p: p.name)
def test_demo_bundles_read_cleanly(path: Path) -> None:
    read = case_from_fhir(json.loads(path.read_text()), CATALOG)
    assert read.ok, [str(i) for i in read.issues]
    assert {"ph", "pco2", "hco3", "sample_type"} <= set(read.case)


# ----------------------------------------------------------------------------- shipped rulebook
RULEBOOK_YAML = Path(__file__).parents[1] / "rulebooks" / "adult" / "rulebook.yaml"
# LOINC System axis "Bld" (blood, unspecified): say nothing about the sample (interop.md 1.1)
UNSPECIFIED_BLOOD = {"11558-4", "11557-6", "11556-8", "1959-6", "11555-0", "20564-1"}


def test_specimen_table_knows_every_gas_code_the_shipped_rulebook_declares() -> None:
    """A gas code missing from codes.SPECIMEN_BY_LOINC would silently lose the sample type."""
    import yaml

    from gasrules.integration.standard_codes import SAMPLE_DEFINING_INPUTS, SPECIMEN_BY_LOINC

    inputs = yaml.safe_load(RULEBOOK_YAML.read_text())["inputs"]
    unknown = {
        name: code
        for name in SAMPLE_DEFINING_INPUTS
        for code in inputs.get(name, {}).get("loinc", [])
        if code not in SPECIMEN_BY_LOINC and code not in UNSPECIFIED_BLOOD
    }
    assert unknown == {}


@functools.cache
def shipped_catalog() -> dict[str, FakeInput]:
    """The shipped rulebook's inputs read straight from its YAML (no engine needed)."""
    import yaml

    inputs = yaml.safe_load(RULEBOOK_YAML.read_text())["inputs"]
    return {
        name: FakeInput(
            name,
            str(spec.get("unit", "")),
            spec.get("kind", "number"),
            tuple(spec.get("loinc", ())),
            {
                u: (float(a["factor"]), float(a.get("offset", 0.0)))
                for u, a in (spec.get("alternatives") or {}).items()
            },
            tuple(spec.get("codes", ())),
        )
        for name, spec in inputs.items()
    }


@pytest.mark.parametrize(
    "path",
    sorted(DATA.glob("*.json")) + sorted(DEMO.glob("*.json")),
    ids=lambda p: f"{p.parent.parent.name}/{p.name}",
)
def test_every_panel_reads_cleanly_with_the_shipped_rulebook_inputs(path: Path) -> None:
    read = case_from_fhir(json.loads(path.read_text()), shipped_catalog())
    assert read.issues == (), [str(i) for i in read.issues]
    assert {"ph", "pco2", "hco3", "sample_type", "age"} <= set(read.case)


def _engine() -> Any:
    import gasrules

    if not (hasattr(gasrules, "load_rulebook") and hasattr(gasrules, "interpret")):
        pytest.skip(
            "gasrules.load_rulebook / interpret are not in the package yet (the engine lands separately)"
        )
    return gasrules


@pytest.mark.parametrize("name", ["arterial_panel.json", "kpa_panel.json", "venous_panel.json"])
def test_shipped_rulebook_reads_and_interprets_each_panel(name: str) -> None:
    gasrules = _engine()
    rulebook = gasrules.load_rulebook()
    read = case_from_fhir(load(name), rulebook.inputs)
    assert read.issues == (), [str(i) for i in read.issues]
    result = gasrules.interpret(rulebook, read.case)
    assert result["errors"] == [] and result["status"] != "rejected"
    out = result_to_fhir(
        result,
        read.sources,
        rulebook_info=rulebook,
        subject=read.subject,
        effective=read.effective,
        issued="2031-03-14T08:25:00+00:00",
    )
    validate_r4(out)
    [prov] = resources(out, "Provenance")
    assert prov["policy"][0].endswith(f"?sha256={rulebook.sha256}")
