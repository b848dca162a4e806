"""Code tables and the case builder shared by the FHIR and HL7 v2 adapters.

The adapters map *codes and units*; they never convert a value and hold no clinical number.
Which LOINC code feeds which input, and which units an input accepts, come from the rulebook's
input catalogue (``InputSpec.loinc``, ``.unit``, ``.alternatives``). This module adds only what
a rulebook cannot say:

* the specimen axis of LOINC codes (``BldA`` arterial, ``BldV`` venous, ...), from the LOINC
  System part of each code (shared/interop.md 1.2-1.3);
* specimen type codes (SNOMED CT, HL7 table 0487) seen in ``Specimen.type`` and SPM-4;
* a short table of common non-UCUM unit spellings and their UCUM codes (interop.md 2.1);
* :class:`Issue`, the one problem record both adapters report, with the stable codes in
  :data:`ISSUE_CODES`;
* :class:`CaseBuilder`, which collects values found in a message, checks units against the
  catalogue, reports duplicates and specimen conflicts, and returns the engine case.

Where two sources disagree (two values for one input, arterial code with a venous specimen),
the builder reports the conflict and leaves the input out: it never picks one.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import date
from typing import Any, Protocol

__all__ = [
    "ISSUE_CODES",
    "PANEL_SPECIMEN",
    "SAMPLE_DEFINING_INPUTS",
    "SPECIMEN_BY_HL70487",
    "SPECIMEN_BY_LOINC",
    "SPECIMEN_BY_SNOMED",
    "UCUM_SYSTEM",
    "UNIT_ALIASES",
    "CaseBuilder",
    "InputSpecLike",
    "Issue",
    "accepted_units",
    "completed_years",
    "loinc_index",
]

UCUM_SYSTEM = "http://unitsofmeasure.org"

# ----------------------------------------------------------------------------- issue codes
# Stable codes of problems found while reading a message. Never reuse one for a new meaning.
ISSUE_CODES: dict[str, str] = {
    # structure
    "read.not_json_object": "the document is not a JSON object or list of objects",
    "read.unsupported_resource": "resourceType is not Bundle or Observation",
    "read.unsupported_bundle": "Bundle.type is not one the reader accepts",
    "read.unresolved_reference": "a reference points at nothing in the message",
    "hl7.empty": "no HL7 message found",
    "hl7.no_msh": "the message does not start with an MSH segment",
    "hl7.bad_msh": "MSH-1 or MSH-2 (separators) is malformed",
    "hl7.message_type": "the message is not an ORU^R01",
    "hl7.bad_segment": "a line is not a segment (three upper-case letters or digits)",
    "hl7.value_type": "OBX-2 value type does not fit the input",
    "hl7.numeric_st": "a number was sent with value type ST and read as a number",
    "hl7.charset": "MSH-18 names an unsupported character set, or the bytes do not fit it",
    "json.invalid": "a line of a FHIR JSON Lines file is not JSON",
    "hl7.no_control_id": "MSH-10 (message control id) is missing",
    "hl7.too_large": "an MLLP frame is larger than the listener accepts",
    "hl7.delivery": "the result message could not be filed or forwarded",
    "hl7.repetition": "a field repeats where one value is expected",
    "hl7.bad_date": "a date/time field is not in the form YYYYMMDD[HHMM[SS]]",
    # codes
    "code.not_loinc": "the observation carries no LOINC code",
    "code.unknown": "the LOINC code feeds no input of this rulebook",
    "code.ambiguous": "two LOINC codings of one observation feed different inputs",
    # values
    "value.missing": "no value (absent, empty or dataAbsentReason)",
    "value.not_a_number": "the value is not a number",
    "value.censored": "the value carries a comparator (<, >) and is not exact",
    "value.wrong_type": "the value has a type the input cannot take",
    "value.duplicate": "the same input was reported twice with the same value (first kept)",
    "value.conflict": "the same input was reported twice with different values (left out)",
    "value.unknown_code": "a coded value is not among the input's codes",
    # units
    "unit.missing": "a number came without a unit",
    "unit.assumed": "the unit was absent; the input has a single possible unit ([pH])",
    "unit.alias": "a common non-UCUM spelling was read as its UCUM code",
    "unit.not_ucum": "the unit's coding system is not UCUM and the unit is not a known alias",
    "unit.not_accepted": "the unit does not fit the input",
    # status
    "status.not_final": "the result is preliminary (left out unless preliminary is allowed)",
    "status.preliminary_used": "a preliminary result was used because preliminary is allowed",
    "status.skipped": "the result was withdrawn or cancelled and is skipped",
    "status.missing": "the result status is missing or unknown",
    # specimen and patient
    "specimen.conflict": "sources disagree on the sample type (left out)",
    "specimen.unknown": "a specimen type code is not one the reader knows",
    "age.not_computed": "age could not be computed from the birth date",
    "time.mismatch": "the blood gas results carry different collection times",
}

SEVERITIES = ("error", "warning", "notice")


@dataclass(frozen=True)
class Issue:
    """One problem found while reading: where (element path or segment-field), code, text.

    ``severity``: ``error`` (a value was given but cannot be used, or the message is broken),
    ``warning`` (something was ignored that may matter), ``notice`` (expected handling, e.g.
    an entered-in-error result skipped).
    """

    path: str
    code: str
    message: str
    severity: str = "error"

    def __post_init__(self) -> None:
        if self.code not in ISSUE_CODES:
            raise ValueError(f"undocumented issue code {self.code!r}")
        if self.severity not in SEVERITIES:
            raise ValueError(f"severity must be one of {SEVERITIES}, got {self.severity!r}")

    def as_dict(self) -> dict[str, str]:
        return {"path": self.path, "code": self.code, "message": self.message, "severity": self.severity}

    def __str__(self) -> str:
        return f"{self.path}: {self.message}"


class InputSpecLike(Protocol):
    """What the adapters read from a rulebook input (``gasrules`` InputSpec satisfies it)."""

    name: str
    unit: str
    kind: str
    loinc: tuple[str, ...]
    alternatives: Mapping[str, tuple[float, float]]
    codes: tuple[str, ...]


Catalog = Mapping[str, InputSpecLike]

# ----------------------------------------------------------------------------- specimen tables
# The LOINC System axis of the codes in shared/interop.md 1.2-1.3 that name one blood specimen.
# Codes on Bld (unspecified), Ser/Plas or Urine are absent on purpose: they say nothing.
_BY_SPECIMEN: dict[str, tuple[str, ...]] = {
    "arterial": (
        "2744-1",
        "33254-4",
        "2019-8",
        "32771-8",
        "2703-7",
        "19255-9",
        "1960-4",
        "19230-2",
        "2026-3",
        "1925-7",
        "2708-6",
        "30313-1",
        "75928-2",
        "32717-1",
        "32713-0",
        "41650-3",
        "34581-9",
        "59470-5",
        "2518-9",
        "30242-2",
        "41651-1",
        "39481-7",
        "12961-9",
        "21232-4",
        "72927-7",
    ),
    "venous": (
        "2746-6",
        "2021-4",
        "2705-2",
        "14627-4",
        "19232-8",
        "2027-1",
        "1927-3",
        "2711-0",
        "30350-3",
        "93846-4",
        "39791-9",
        "39789-3",
        "41649-5",
        "41645-3",
        "2519-7",
        "41652-9",
        "39480-9",
        "12962-7",
        "101475-2",
        "72926-9",
    ),
    "capillary": (
        "2745-8",
        "2020-6",
        "2704-5",
        "1961-2",
        "1926-5",
        "71851-0",
        "30352-9",
        "39792-7",
        "39790-1",
        "51590-8",
        "41644-6",
        "19239-3",
        "32016-8",
        "51596-5",
        "41653-7",
        "14743-9",
    ),
    "mixed_venous": ("19213-8", "19229-4", "19234-4"),
}
SPECIMEN_BY_LOINC: dict[str, str] = {
    code: specimen for specimen, codes in _BY_SPECIMEN.items() for code in codes
}
# Gas panel codes (parents in hasMember / OBR-4), interop.md 1.2 "Gas panels".
PANEL_SPECIMEN: dict[str, str | None] = {
    "24336-0": "arterial",
    "24339-4": "venous",
    "24337-8": "capillary",
    "24338-6": None,
    "24343-6": None,
}
# Only the gas itself says which sample was drawn: an arterial gas may come with a venous
# chemistry. The specimen axis of other inputs' codes is not used for sample_type.
SAMPLE_DEFINING_INPUTS: tuple[str, ...] = ("ph", "pco2", "po2", "hco3", "base_excess", "so2")

# Specimen.type / SPM-4 codes. SNOMED CT codes: interop.md 3.1 (verified there).
SPECIMEN_BY_SNOMED: dict[str, str | None] = {
    "122552005": "arterial",
    "122555007": "venous",
    "122554006": "capillary",
    "119297000": None,  # blood specimen, unspecified
}
# HL7 table 0487 / 0070 codes: interop.md 3.1 marks these as from memory.
SPECIMEN_BY_HL70487: dict[str, str | None] = {
    "BLDA": "arterial",
    "BLDV": "venous",
    "BLDC": "capillary",
    "BLD": None,
}

# ----------------------------------------------------------------------------- units
# Common non-UCUM spellings -> UCUM code (interop.md 2.1). Only exact, unambiguous spellings.
UNIT_ALIASES: dict[str, str] = {
    "mmHg": "mm[Hg]",
    "mm Hg": "mm[Hg]",
    "mmhg": "mm[Hg]",
    "KPA": "kPa",
    "kpa": "kPa",
    "mmol/l": "mmol/L",
    "mM": "mmol/L",
    "mEq/L": "meq/L",
    "mEq/l": "meq/L",
    "meq/l": "meq/L",
    "umol/l": "umol/L",
    "µmol/L": "umol/L",
    "µmol/l": "umol/L",
    "micromol/L": "umol/L",
    "g/dl": "g/dL",
    "mg/dl": "mg/dL",
    "g/l": "g/L",
    "mg/l": "mg/L",
    "mOsm/kg": "mosm/kg",
    "mosm/kg H2O": "mosm/kg",
    "°C": "Cel",
    "degC": "Cel",
    "°F": "[degF]",
    "degF": "[degF]",
    "pH": "[pH]",
    "yr": "a",
    "years": "a",
}


def accepted_units(spec: InputSpecLike) -> list[str]:
    """The canonical unit first, then the rulebook's alternatives, in declaration order."""
    return [spec.unit, *[u for u in spec.alternatives if u != spec.unit]]


def loinc_index(catalog: Catalog) -> dict[str, str]:
    """LOINC code -> input name. A code declared by two inputs is a rulebook error."""
    index: dict[str, str] = {}
    for name, spec in catalog.items():
        for code in spec.loinc:
            if code in index and index[code] != name:
                raise ValueError(f"LOINC {code} is declared by two inputs: {index[code]!r} and {name!r}")
            index[code] = name
    return index


def completed_years(birth: date, at: date) -> int:
    """Age in completed years on the date ``at`` (birthday not yet reached: one less)."""
    years = at.year - birth.year
    if (at.month, at.day) < (birth.month, birth.day):
        years -= 1
    return years


def _canonical(spec: InputSpecLike, value: float, unit: str) -> float:
    """Value in the canonical unit, using the rulebook's own factor and offset (duplicates)."""
    if unit == spec.unit:
        return value
    factor, offset = spec.alternatives[unit]
    return value * factor + offset


# ----------------------------------------------------------------------------- builder
@dataclass
class _Entry:
    value: Any
    where: str
    source: str
    canonical: float | None = None


@dataclass
class CaseBuilder:
    """Collects what a message says, then returns the engine case and every issue found.

    ``where`` strings are the message's own locations (``Bundle.entry[3].resource`` or
    ``OBX[4]``); ``source`` is what the result should point back at (a FHIR reference or the
    segment). Call :meth:`unit_for` before :meth:`add_number`.
    """

    catalog: Catalog
    allow_preliminary: bool = False
    issues: list[Issue] = field(default_factory=list)
    _entries: dict[str, list[_Entry]] = field(default_factory=dict)
    _specimen_claims: list[tuple[str, str, str, str]] = field(default_factory=list)

    # -- issues
    def issue(self, path: str, code: str, message: str, severity: str = "error") -> None:
        self.issues.append(Issue(path, code, message, severity))

    # -- status (FHIR words; the HL7 reader maps table 0085 onto them first)
    def status_allows(self, status: str | None, path: str, name: str, shown: str | None = None) -> bool:
        """True if a result with this status may be used; reports every other status.

        ``status`` is a FHIR Observation.status word; ``shown`` is the status as the message
        wrote it when that differs (HL7 table 0085 code), for the messages.
        """
        said = f"{status} ({shown})" if shown and shown != status else status
        if status in ("final", "amended", "corrected"):
            return True
        if status == "preliminary":
            if self.allow_preliminary:
                self.issue(path, "status.preliminary_used", f"preliminary result used for {name}", "warning")
                return True
            self.issue(
                path,
                "status.not_final",
                f"{name} is {said} and was left out; final, amended or corrected "
                "results are used (allow preliminary results to include it)",
                "warning",
            )
            return False
        if status in ("entered-in-error", "cancelled"):
            self.issue(path, "status.skipped", f"{name} is {said} and was skipped", "notice")
            return False
        if status in ("registered", "unknown", None, ""):
            said = said or "missing"
            self.issue(
                path,
                "status.missing",
                f"{name}: status {said!r} does not say the result is released; "
                "accepted: final, amended, corrected",
                "warning" if status else "error",
            )
            return False
        self.issue(
            path,
            "status.missing",
            f"{name}: unknown status {shown or status!r}; accepted: final, amended, corrected",
        )
        return False

    # -- units
    def unit_for(self, name: str, code: str | None, ucum: bool, path: str) -> str | None:
        """The UCUM unit to pass on, or None after reporting why the unit cannot be used.

        ``code`` is the unit as sent; ``ucum`` says whether the sender declared it UCUM.
        """
        spec = self.catalog[name]
        accepted = accepted_units(spec)
        shown = ", ".join(accepted)
        if not code:
            if accepted == ["[pH]"]:
                self.issue(path, "unit.assumed", f"no unit for {name}; read as [pH], its only unit", "notice")
                return "[pH]"
            self.issue(path, "unit.missing", f"no unit for {name}; accepted: {shown}")
            return None
        unit = code
        if unit not in accepted and unit in UNIT_ALIASES:
            unit = UNIT_ALIASES[unit]
            self.issue(path, "unit.alias", f"unit {code!r} read as UCUM {unit!r}", "notice")
        elif not ucum and unit not in accepted:
            self.issue(
                path,
                "unit.not_ucum",
                f"unit {code!r} for {name} is not declared UCUM and is not a known "
                f"spelling; accepted: {shown}",
            )
            return None
        if unit not in accepted:
            self.issue(
                path, "unit.not_accepted", f"unit {code!r} is not accepted for {name}; accepted: {shown}"
            )
            return None
        return unit

    # -- values
    def add_number(self, name: str, value: float, unit: str, where: str, source: str) -> None:
        spec = self.catalog[name]
        entry = _Entry({"value": value, "unit": unit}, where, source, _canonical(spec, value, unit))
        self._entries.setdefault(name, []).append(entry)

    def add_value(self, name: str, value: Any, where: str, source: str) -> None:
        """A coded or flag value, already checked by the caller."""
        self._entries.setdefault(name, []).append(_Entry(value, where, source))

    def claim_specimen(self, specimen: str | None, where: str, kind: str, source: str = "") -> None:
        """Record what one source says the sample was. ``kind``: loinc | specimen | input."""
        if specimen is not None and specimen != "unknown":
            self._specimen_claims.append((kind, specimen, where, source or where))

    # -- result
    def build(self) -> tuple[dict[str, Any], dict[str, str]]:
        """(case inputs, input name -> source reference). Conflicting values are left out."""
        case: dict[str, Any] = {}
        sources: dict[str, str] = {}
        for name, entries in self._entries.items():
            first = entries[0]
            clash = [e for e in entries[1:] if not _same(first, e)]
            if clash:
                places = ", ".join(e.where for e in entries)
                values = "; ".join(_show(e.value) for e in entries)
                self.issue(
                    first.where,
                    "value.conflict",
                    f"{name} reported {len(entries)} times with different values "
                    f"({values}) at {places}; left out",
                )
                continue
            for e in entries[1:]:
                self.issue(
                    e.where,
                    "value.duplicate",
                    f"{name} reported again with the same value (first kept: {first.where})",
                    "notice",
                )
            case[name] = first.value
            sources[name] = first.source
        claim = self._resolve_specimen()
        if claim is not None and "sample_type" in self.catalog:
            case["sample_type"] = claim[1]
            sources["sample_type"] = claim[3]
        return case, sources

    def _resolve_specimen(self) -> tuple[str, str, str, str] | None:
        """One agreed claim, or None. All sources must agree: LOINC axis, Specimen/SPM, input."""
        claims = self._specimen_claims
        if not claims:
            return None
        if len({c[1] for c in claims}) > 1:
            said = "; ".join(f"{where} says {spec} ({kind})" for kind, spec, where, _ in claims)
            self.issue(
                claims[0][2],
                "specimen.conflict",
                f"sources disagree on the sample type: {said}; sample_type left out",
            )
            return None
        order = {"loinc": 0, "specimen": 1, "input": 2}
        return min(claims, key=lambda c: order.get(c[0], 3))


def _same(a: _Entry, b: _Entry) -> bool:
    if a.canonical is not None and b.canonical is not None:
        if a.value == b.value:
            return True
        scale = max(abs(a.canonical), abs(b.canonical), 1e-300)
        return abs(a.canonical - b.canonical) <= 1e-9 * scale
    return bool(a.value == b.value)


def _show(value: Any) -> str:
    if isinstance(value, dict):
        return f"{value['value']} {value['unit']}"
    return repr(value)


def issues_as_dicts(issues: Iterable[Issue]) -> list[dict[str, str]]:
    return [i.as_dict() for i in issues]


SNOMED_SYSTEMS = ("http://snomed.info/sct", "SCT", "SNM", "SNOMED", "SNOMEDCT")
HL70487_SYSTEMS = (
    "http://terminology.hl7.org/CodeSystem/v2-0487",
    "HL70487",
    "http://terminology.hl7.org/CodeSystem/v2-0070",
    "HL70070",
)


def specimen_from_code(system: str | None, code: str | None) -> tuple[bool, str | None]:
    """(known, sample type or None for an unspecified blood specimen) for one coding."""
    if not code:
        return False, None
    if system in SNOMED_SYSTEMS and code in SPECIMEN_BY_SNOMED:
        return True, SPECIMEN_BY_SNOMED[code]
    if (system in HL70487_SYSTEMS or not system) and code in SPECIMEN_BY_HL70487:
        return True, SPECIMEN_BY_HL70487[code]
    return False, None
