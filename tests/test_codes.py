"""Standard and project codes on the outputs: every code emitted is in the table, documented,
and defined; the project CodeSystems are valid FHIR and current for the shipped rulebook.

No clinical number is asserted; the demo cases (invented) are only a source of results.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.integration.fhir import result_to_fhir
from gasrules.integration.hl7v2 import parse_message, result_to_oru
from gasrules.integration.terminology import CODES, DEFAULT_BASE, codesystem_bundle

ROOT = Path(__file__).parents[1]
SHIPPED = ROOT / "docs" / "fhir" / "codesystems.json"
STANDARD = {(c.system, c.code) for c in CODES}


@pytest.fixture(scope="module")
def rulebook() -> Any:
    return gasrules.load_rulebook()


@pytest.fixture(scope="module")
def results(rulebook: Any) -> list[dict[str, Any]]:
    cases = [
        json.loads(x) for x in (ROOT / "tools" / "demo" / "cases.jsonl").read_text().splitlines() if x.strip()
    ]
    return [gasrules.interpret(rulebook, c, trace=False) for c in cases]


def codings(node: Any) -> Iterator[dict[str, Any]]:
    if isinstance(node, dict):
        if "system" in node and "code" in node and "value" not in node:
            yield node
        for v in node.values():
            yield from codings(v)
    elif isinstance(node, list):
        for v in node:
            yield from codings(v)


def test_every_table_code_is_documented() -> None:
    page = (ROOT / "docs" / "codes.md").read_text(encoding="utf-8")
    for c in CODES:
        assert f"| {c.system} | `{c.code}` | {c.display} |" in page, (c.system, c.code)
        assert c.known in ("public", "memory")
        assert c.known == "memory" or "memory" not in c.source


def test_shipped_codesystems_are_current_and_valid_fhir(rulebook: Any) -> None:
    from fhir.resources.R4B.bundle import Bundle
    from fhir.resources.R4B.codesystem import CodeSystem

    shipped = json.loads(SHIPPED.read_text(encoding="utf-8"))
    assert shipped == codesystem_bundle(rulebook), (
        "docs/fhir/codesystems.json is stale: run .venv/bin/python tools/make_codesystems.py"
    )
    Bundle.model_validate(shipped)
    for entry in shipped["entry"]:
        cs = CodeSystem.model_validate(entry["resource"])
        assert cs.url.startswith(DEFAULT_BASE) and cs.count == len(cs.concept)


def test_fhir_outputs_use_only_documented_or_defined_codes(
    rulebook: Any, results: list[dict[str, Any]]
) -> None:
    from fhir.resources.R4B.bundle import Bundle

    defined = {
        (e["resource"]["url"], c["code"])
        for e in codesystem_bundle(rulebook)["entry"]
        for c in e["resource"]["concept"]
    }
    seen_standard = set()
    for result in results:
        bundle = result_to_fhir(result, {}, rulebook_info=rulebook)
        Bundle.model_validate(bundle)
        for c in codings(bundle):
            key = (c["system"], c["code"])
            if c["system"].startswith(DEFAULT_BASE):
                assert key in defined, key
            elif c["system"] != "http://unitsofmeasure.org":
                assert key in STANDARD, key
                seen_standard.add(key)
    assert ("http://loinc.org", "33037-3") in seen_standard  # the demo cases have a gap


def test_the_codesystem_url_is_a_setting(rulebook: Any, results: list[dict[str, Any]]) -> None:
    base = "https://terminology.example-hospital.org/gasrules"
    bundle = result_to_fhir(results[0], {}, rulebook_info=rulebook, codesystem_url=base)
    systems = {c["system"] for c in codings(bundle)}
    assert f"{base}/report" in systems and not any(s.startswith(DEFAULT_BASE) for s in systems)


def test_a_disorder_with_a_snomed_concept_carries_both_codings(rulebook: Any) -> None:
    result = {
        **gasrules.interpret(rulebook, {}, trace=False),
        "disorders": ["respiratory_alkalosis"],
        "qualifiers": {},
    }
    bundle = result_to_fhir(result, {}, rulebook_info=rulebook)
    report = next(
        e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "DiagnosticReport"
    )
    [concept] = report["conclusionCode"]
    assert [(c["system"], c["code"]) for c in concept["coding"]] == [
        (f"{DEFAULT_BASE}/disorder", "respiratory_alkalosis"),
        ("http://snomed.info/sct", "20165001"),
    ]  # docs/codes.md: from memory


def test_hl7_outputs_use_the_same_codes(results: list[dict[str, Any]]) -> None:
    systems = {"LN": "http://loinc.org", "SCT": "http://snomed.info/sct"}
    seen = set()
    for result in results:
        msg, issues = parse_message(
            result_to_oru(result, control_id="C1", message_time="20310402091530", facility="SITE-9")
        )
        assert issues == [] and msg is not None
        assert msg.get(msg.first("MSH"), 4) == "SITE-9"
        for seg in msg.all("OBX"):
            for field in (3, 5):
                for first in (1, 4):
                    system = msg.get(seg, field, first + 2)
                    if system in systems:
                        key = (systems[system], msg.get(seg, field, first))
                        assert key in STANDARD, key
                        seen.add(key)
    assert ("http://loinc.org", "33037-3") in seen
