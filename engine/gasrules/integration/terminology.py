"""Standard codes on our outputs, each with how we know it, and the project's own CodeSystems.

LOINC and SNOMED CT cannot be fetched where this project is built, so every standard code the
FHIR and HL7 writers emit is listed in :data:`CODES` with its display and its provenance:
``public`` (read in a public source, named in ``source``) or ``memory`` (from memory, not
checked against the terminology's own release; kept only where we are confident, and said so).
A derived value or disorder without a code we can vouch for is coded only in the project's
CodeSystems. ``docs/codes.md`` is the same table for readers; tests check they agree.

The project's CodeSystems live under one canonical base URL, a setting
(``interfaces.codesystem_url``, default :data:`DEFAULT_BASE`): ``<base>/report``,
``<base>/disorder``, ``<base>/finding``, ``<base>/qualifier``, ``<base>/value``. The shipped
resources for the default rulebook are in ``docs/fhir/codesystems.json``
(:func:`codesystem_bundle` writes them: ``python tools/make_codesystems.py``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

__all__ = [
    "CODES",
    "DEFAULT_BASE",
    "LOINC",
    "SNOMED",
    "Code",
    "codesystem_bundle",
    "disorder_codings",
    "disorder_snomed",
    "value_codings",
    "value_loinc",
]

LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"
DEFAULT_BASE = "https://gasrules.example/fhir/CodeSystem"


@dataclass(frozen=True)
class Code:
    system: str
    code: str
    display: str
    used_for: str  # what it codes on our outputs
    known: str  # "public" or "memory"
    source: str  # the public source, or why we are confident / what is unverified


_THO = "http://terminology.hl7.org/CodeSystem/"
_LOINC_PUBLIC = (
    "LOINC term name as used in public code listing LOINC codes, confirmed by two "
    "independent files; not yet checked against the LOINC table (Loinc.csv)"
)

CODES: tuple[Code, ...] = (
    Code(
        LOINC,
        "33037-3",
        "Anion gap in Serum or Plasma",
        "value anion_gap",
        "public",
        _LOINC_PUBLIC + ". The System axis is serum or plasma; gas analysers report "
        "plasma-equivalent electrolytes",
    ),
    Code(
        LOINC,
        "1863-0",
        "Anion gap 4 in Serum or Plasma",
        "value anion_gap_with_k",
        "public",
        _LOINC_PUBLIC + ". 'Anion gap 4' includes potassium",
    ),
    Code(
        SNOMED,
        "59455009",
        "Metabolic acidosis",
        "disorder metabolic_acidosis",
        "memory",
        "from memory; not verified against a SNOMED CT release",
    ),
    Code(
        SNOMED,
        "12326000",
        "Respiratory acidosis",
        "disorder respiratory_acidosis",
        "memory",
        "from memory; not verified against a SNOMED CT release",
    ),
    Code(
        SNOMED,
        "1388004",
        "Metabolic alkalosis",
        "disorder metabolic_alkalosis",
        "memory",
        "from memory; not verified against a SNOMED CT release",
    ),
    Code(
        SNOMED,
        "20165001",
        "Respiratory alkalosis",
        "disorder respiratory_alkalosis",
        "memory",
        "from memory; not verified against a SNOMED CT release",
    ),
    # Codes from HL7 terminology on every FHIR result (the structure, not the clinical content).
    Code(
        _THO + "observation-category",
        "laboratory",
        "Laboratory",
        "Observation.category",
        "memory",
        "from memory (FHIR R4 observation-category code system)",
    ),
    Code(
        _THO + "v2-0074",
        "LAB",
        "Laboratory",
        "DiagnosticReport.category",
        "memory",
        "from memory (HL7 table 0074, diagnostic service section)",
    ),
    Code(
        _THO + "v3-ObservationInterpretation",
        "A",
        "Abnormal",
        "finding of severity warning",
        "public",
        "terminology.hl7.org CodeSystem v3-ObservationInterpretation page",
    ),
    Code(
        _THO + "v3-ObservationInterpretation",
        "AA",
        "Critical abnormal",
        "finding of severity critical",
        "public",
        "terminology.hl7.org CodeSystem v3-ObservationInterpretation page",
    ),
    Code(_THO + "v3-DataOperation", "CREATE", "create", "Provenance.activity", "memory", "from memory"),
    Code(
        _THO + "provenance-participant-type",
        "assembler",
        "Assembler",
        "Provenance.agent.type",
        "memory",
        "from memory",
    ),
    # HL7 v2 tables on acknowledgements and result messages.
    Code("HL7 table 0008", "AA", "Application Accept", "MSA-1", "memory", "from memory"),
    Code("HL7 table 0008", "AE", "Application Error", "MSA-1", "memory", "from memory"),
    Code("HL7 table 0008", "AR", "Application Reject", "MSA-1", "memory", "from memory"),
    Code("HL7 table 0357", "100", "Segment sequence error", "ERR-3", "memory", "from memory"),
    Code("HL7 table 0357", "101", "Required field missing", "ERR-3", "memory", "from memory"),
    Code("HL7 table 0357", "102", "Data type error", "ERR-3", "memory", "from memory"),
    Code("HL7 table 0357", "103", "Table value not found", "ERR-3", "memory", "from memory"),
    Code("HL7 table 0357", "200", "Unsupported message type", "ERR-3", "memory", "from memory"),
    Code("HL7 table 0357", "207", "Application internal error", "ERR-3", "memory", "from memory"),
    Code(
        "HL7 table 0211",
        "UNICODE UTF-8",
        "UTF-8",
        "MSH-18 of result messages",
        "memory",
        "from memory; MSH-18 values read are listed in gasrules.integration.hl7wire.CHARSETS",
    ),
    Code(
        "HL7 table 0085",
        "P",
        "Preliminary results",
        "OBX-11 and OBR-25 of result messages",
        "memory",
        "from memory",
    ),
)

# Derived values and disorders left to the project CodeSystems on purpose, with the reason
# (shown in docs/codes.md).
PROJECT_ONLY: dict[str, str] = {
    "calculated_osmolality": "no LOINC code for calculated osmolality that we can vouch for",
    "osmolal_gap": "no LOINC code for the osmolal gap that we can vouch for",
    "standard_base_excess": "LOINC base excess codes (e.g. 1925-7 arterial, 11555-0 blood) "
    "are per specimen; whether they mean standard (extracellular) base "
    "excess was not verified",
    "aa_gradient": "no LOINC code for the A-a gradient that we can vouch for",
    "pf_ratio": "no LOINC code for PaO2/FiO2 that we can vouch for",
    "metabolic_acidosis_high_anion_gap": "no SNOMED CT concept we can vouch for",
    "metabolic_acidosis_normal_anion_gap": "no SNOMED CT concept we can vouch for",
}


def value_loinc(name: str) -> Code | None:
    """The LOINC code of a derived value, when we have one."""
    return _BY_USE.get(f"value {name}")


def disorder_snomed(name: str) -> Code | None:
    """The SNOMED CT concept of a disorder code, when we have one."""
    return _BY_USE.get(f"disorder {name}")


_BY_USE = {c.used_for: c for c in CODES}


def value_codings(name: str, project_system: str) -> list[dict[str, Any]]:
    """FHIR codings of a derived value: LOINC first when known, then the project code."""
    known = value_loinc(name)
    own = {"system": project_system, "code": name}
    return (
        [{"system": LOINC, "code": known.code, "display": known.display}, own] if known is not None else [own]
    )


def disorder_codings(name: str, project_system: str) -> list[dict[str, Any]]:
    """FHIR codings of a disorder: the project code, then SNOMED CT when known."""
    known = disorder_snomed(name)
    own = {"system": project_system, "code": name}
    return (
        [own, {"system": SNOMED, "code": known.code, "display": known.display}]
        if known is not None
        else [own]
    )


def _concepts(codes: dict[str, str]) -> list[dict[str, Any]]:
    return [{"code": k, "display": v} for k, v in sorted(codes.items())]


def project_codes(rulebook: Any) -> dict[str, dict[str, str]]:
    """kind -> {code: display} for every project code the rulebook can put on an output."""
    pres = getattr(rulebook, "presentation", None) or {}
    labels = dict(pres.get("disorder_labels") or {})
    qualifiers = dict(pres.get("qualifier_labels") or {})
    findings: dict[str, str] = {}
    for rule in getattr(rulebook, "rules", ()):
        for finding in getattr(rule, "findings", ()) or ():
            shown = getattr(finding, "headline", None) or finding.code.replace("_", " ")
            findings.setdefault(finding.code, str(shown))
    derived = getattr(rulebook, "derived", {})
    values = {
        name: str(getattr(derived.get(name), "label", None) or name.replace("_", " "))
        for name in getattr(rulebook, "value_names", ())
    }
    return {
        "report": {
            "blood-gas-interpretation": "Blood gas interpretation (rule-based)",
            "disorder": "Disorder",
        },
        "disorder": labels,
        "finding": findings,
        "qualifier": qualifiers,
        "value": values,
    }


def codesystem_bundle(rulebook: Any, base: str = DEFAULT_BASE) -> dict[str, Any]:
    """The project CodeSystems for ``rulebook`` as a FHIR Bundle (type collection)."""
    entries = []
    for kind, codes in project_codes(rulebook).items():
        url = f"{base}/{kind}"
        entries.append(
            {
                "fullUrl": url,
                "resource": {
                    "resourceType": "CodeSystem",
                    "id": f"gasrules-{kind}",
                    "url": url,
                    "name": f"Gasrules{kind.capitalize()}",
                    "title": f"gasrules {kind} codes",
                    "status": "active",
                    "experimental": False,
                    "caseSensitive": True,
                    "description": f"gasrules {kind} codes for rulebook {rulebook.id} "
                    f"{rulebook.version}; codes without a standard (LOINC, SNOMED CT) "
                    "equivalent that the project can vouch for.",
                    "content": "complete",
                    "count": len(codes),
                    "concept": _concepts(codes),
                },
            }
        )
    return {"resourceType": "Bundle", "type": "collection", "entry": entries}
