"""FHIR R4 adapter: Observations in, an interpretation Bundle out.

Reading (:func:`case_from_fhir`) takes a Bundle (collection, searchset, transaction, batch), a
list of resources, or one Observation (with ``component`` or ``hasMember``) and returns the
engine case plus every issue found, each naming its FHIR element path
(``Bundle.entry[3].resource.valueQuantity.code``). Items of a plain list are named
``Observation[3]`` / ``Patient[0]`` by their position in the list.

* LOINC codings (system ``http://loinc.org``) are mapped to inputs through the rulebook's
  ``InputSpec.loinc``; values go to the case as ``{"value", "unit"}`` with the UCUM code as sent.
  The engine converts with the rulebook's ``alternatives``: no conversion happens here.
* The sample type comes from the LOINC System axis of the gas codes, the Specimen resource
  referenced by a gas Observation (``Specimen.type``), or a LOINC 31208-2 observation; sources
  that disagree are reported and the sample type is left out.
* Age comes from a 30525-0 Observation or, failing that, the Patient's ``birthDate`` on the
  collection date of the gas.
* Unknown codes, missing or unfit units, conflicting duplicates and results that are not final
  are reported, never guessed.

Writing (:func:`result_to_fhir`) turns one engine result into a Bundle (type collection) of an
interpretation Observation, a DiagnosticReport, the engine Device and a Provenance naming the
rulebook (id, version, sha256) and the engine version.
"""

from __future__ import annotations

import json
import uuid
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from typing import Any

from gasrules.integration.standard_codes import (
    PANEL_SPECIMEN,
    SAMPLE_DEFINING_INPUTS,
    SPECIMEN_BY_LOINC,
    UCUM_SYSTEM,
    CaseBuilder,
    Catalog,
    Issue,
    accepted_units,
    completed_years,
    loinc_index,
    specimen_from_code,
)

__all__ = ["CODE_SYSTEM_BASE", "FhirReadResult", "case_from_fhir", "result_to_fhir"]

LOINC_SYSTEM = "http://loinc.org"
BUNDLE_TYPES = ("collection", "searchset", "transaction", "batch")
CODE_SYSTEM_BASE = "https://gasrules.example/fhir/CodeSystem"
FINDING_CS = f"{CODE_SYSTEM_BASE}/finding"
RULEBOOK_ID_SYSTEM = "https://gasrules.example/rulebook"
_NAMESPACE = uuid.UUID("7b0c3f52-2a49-5d1e-9a8e-67617372756c")  # our own, fixed
_OBS_INTERPRETATION = "http://terminology.hl7.org/CodeSystem/v3-ObservationInterpretation"
_SEVERITY_FLAG = {"critical": ("AA", "Critical abnormal"), "warning": ("A", "Abnormal")}


@dataclass(frozen=True)
class FhirReadResult:
    """The case read from FHIR, with every issue and where each input came from."""

    case: dict[str, Any]
    issues: tuple[Issue, ...]
    sources: dict[str, str] = field(default_factory=dict)  # input -> reference to its resource
    subject: str | None = None  # Patient reference, if any
    effective: str | None = None  # collection time of the gas

    @property
    def errors(self) -> list[Issue]:
        return [i for i in self.issues if i.severity == "error"]

    @property
    def ok(self) -> bool:
        """No error-level issue: every value the message gave was usable."""
        return not self.errors


# ============================================================================ reading
@dataclass
class _Reader:
    catalog: Catalog
    builder: CaseBuilder
    index: dict[str, str]
    by_ref: dict[str, tuple[str, dict[str, Any]]] = field(default_factory=dict)
    patients: list[tuple[str, str, dict[str, Any]]] = field(default_factory=list)
    times: list[tuple[str, str]] = field(default_factory=list)
    subjects: list[str] = field(default_factory=list)
    panel_ids: list[str] = field(default_factory=list)
    age_given: bool = False

    def issue(self, path: str, code: str, message: str, severity: str = "error") -> None:
        self.builder.issue(path, code, message, severity)

    # -- references
    def register(self, path: str, res: dict[str, Any], full_url: str | None) -> str:
        """Index a resource under its fullUrl and Type/id; return the reference to cite."""
        rtype, rid = res.get("resourceType"), res.get("id")
        refs = [r for r in (full_url, f"{rtype}/{rid}" if rid else None) if r]
        for ref in refs:
            self.by_ref[ref] = (path, res)
        return refs[0] if refs else path

    def resolve(
        self,
        ref: Any,
        holder: dict[str, Any],
        path: str,
    ) -> tuple[str, dict[str, Any]] | None:
        text = ref.get("reference") if isinstance(ref, dict) else None
        if not isinstance(text, str):
            return None
        if text.startswith("#"):
            for i, c in enumerate(holder.get("contained") or []):
                if isinstance(c, dict) and c.get("id") == text[1:]:
                    return f"{path}.contained[{i}]", c
        elif text in self.by_ref:
            return self.by_ref[text]
        else:
            tail = "/".join(text.rstrip("/").split("/")[-2:])
            if tail in self.by_ref:
                return self.by_ref[tail]
        return None

    # -- observations
    def observation(self, path: str, obs: dict[str, Any], ref: str) -> None:
        codes = _loinc_codes(obs.get("code"))
        names = sorted({self.index[c] for c in codes if c in self.index})
        panel = [c for c in codes if c in PANEL_SPECIMEN]
        components = obs.get("component") if isinstance(obs.get("component"), list) else []
        if isinstance(obs.get("subject"), dict) and obs["subject"].get("reference"):
            self.subjects.append(obs["subject"]["reference"])
        if panel or obs.get("hasMember"):
            self.panel(path, obs, panel)
        if len(names) > 1:
            self.issue(
                f"{path}.code",
                "code.ambiguous",
                f"LOINC codings {codes} feed different inputs ({', '.join(names)})",
            )
            return
        if not names:
            if not panel and not components and not obs.get("hasMember"):
                self.unknown(path, obs, codes)
            if components:
                self.components(path, obs, ref)
            return
        name = names[0]
        if not self.builder.status_allows(obs.get("status"), f"{path}.status", name):
            return
        code = next(c for c in codes if c in self.index)
        self.value(name, obs, path, ref)
        self.specimen_claims(name, code, obs, path)
        if components:
            self.components(path, obs, ref)

    def components(self, path: str, obs: dict[str, Any], ref: str) -> None:
        status = obs.get("status")
        for i, comp in enumerate(obs["component"]):
            cpath = f"{path}.component[{i}]"
            if not isinstance(comp, dict):
                continue
            codes = _loinc_codes(comp.get("code"))
            names = sorted({self.index[c] for c in codes if c in self.index})
            if not names:
                self.unknown(cpath, comp, codes)
                continue
            if len(names) > 1:
                self.issue(
                    f"{cpath}.code",
                    "code.ambiguous",
                    f"LOINC codings {codes} feed different inputs ({', '.join(names)})",
                )
                continue
            if not self.builder.status_allows(status, f"{path}.status", names[0]):
                continue
            code = next(c for c in codes if c in self.index)
            self.value(names[0], comp, cpath, ref)
            self.specimen_claims(names[0], code, obs, path)

    def unknown(self, path: str, holder: dict[str, Any], codes: list[str]) -> None:
        if codes:
            self.issue(
                f"{path}.code",
                "code.unknown",
                f"LOINC {', '.join(codes)} feeds no input of this rulebook; ignored",
                "warning",
            )
        else:
            self.issue(
                f"{path}.code", "code.not_loinc", f"no coding with system {LOINC_SYSTEM}; ignored", "warning"
            )

    def panel(self, path: str, obs: dict[str, Any], panel: list[str]) -> None:
        if obs.get("id"):
            self.panel_ids.append(str(obs["id"]))
        for code in panel:
            self.builder.claim_specimen(PANEL_SPECIMEN[code], f"{path}.code", "loinc")
        for i, member in enumerate(obs.get("hasMember") or []):
            if self.resolve(member, obs, path) is None:
                self.issue(
                    f"{path}.hasMember[{i}]",
                    "read.unresolved_reference",
                    f"member {_ref_text(member)!r} is not in the message",
                    "warning",
                )
        self.note_time(path, obs)

    def specimen_claims(self, name: str, code: str, obs: dict[str, Any], path: str) -> None:
        if name not in SAMPLE_DEFINING_INPUTS:
            return
        self.builder.claim_specimen(SPECIMEN_BY_LOINC.get(code), f"{path}.code", "loinc")
        self.note_time(path, obs)
        if "specimen" not in obs:
            return
        found = self.resolve(obs["specimen"], obs, path)
        if found is None:
            self.issue(
                f"{path}.specimen",
                "read.unresolved_reference",
                f"specimen {_ref_text(obs['specimen'])!r} is not in the message",
                "warning",
            )
            return
        spath, spec = found
        codings = (spec.get("type") or {}).get("coding") or []
        for j, coding in enumerate(codings):
            known, sample = specimen_from_code(coding.get("system"), coding.get("code"))
            if known:
                self.builder.claim_specimen(
                    sample, f"{spath}.type.coding[{j}]", "specimen", _ref_text(obs["specimen"])
                )
                return
        if codings:
            self.issue(
                f"{spath}.type",
                "specimen.unknown",
                "specimen type is none of the blood specimen codes the reader knows "
                "(SNOMED CT 122552005, 122555007, 122554006, 119297000)",
                "warning",
            )

    def note_time(self, path: str, obs: dict[str, Any]) -> None:
        when = (
            obs.get("effectiveDateTime")
            or obs.get("effectiveInstant")
            or ((obs.get("effectivePeriod") or {}).get("start"))
        )
        if isinstance(when, str):
            self.times.append((path, when))

    # -- values
    def value(self, name: str, holder: dict[str, Any], path: str, ref: str) -> None:
        spec = self.catalog[name]
        values = [k for k in holder if k.startswith("value")]
        if not values:
            reason = holder.get("dataAbsentReason")
            why = f" ({_concept_text(reason)})" if reason else ""
            self.issue(path, "value.missing", f"{name} has no value{why}", "warning")
            return
        if name == "age":
            self.age_given = True
        if spec.kind == "number":
            self.number(name, holder, path, ref, values)
        elif spec.kind == "code":
            self.coded(name, holder, path, ref)
        else:
            if not isinstance(holder.get("valueBoolean"), bool):
                self.issue(
                    f"{path}.{values[0]}",
                    "value.wrong_type",
                    f"{name} is a yes/no flag; expected valueBoolean",
                )
                return
            self.builder.add_value(name, holder["valueBoolean"], path, ref)

    def number(self, name: str, holder: dict[str, Any], path: str, ref: str, values: list[str]) -> None:
        q = holder.get("valueQuantity")
        qpath = f"{path}.valueQuantity"
        if not isinstance(q, dict):
            self.issue(
                f"{path}.{values[0]}",
                "value.wrong_type",
                f"{name} is a number; expected valueQuantity with a UCUM unit",
            )
            return
        v = q.get("value")
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            self.issue(f"{qpath}.value", "value.not_a_number", f"{name}: {v!r} is not a number")
            return
        if q.get("comparator"):
            self.issue(
                f"{qpath}.comparator",
                "value.censored",
                f"{name} is reported as {q['comparator']}{v}, not an exact value; left out",
            )
            return
        system, code, text = q.get("system"), q.get("code"), q.get("unit")
        if code:
            where = f"{qpath}.code" if system == UCUM_SYSTEM else f"{qpath}.system"
            unit = self.builder.unit_for(name, code, system == UCUM_SYSTEM, where)
        else:
            unit = self.builder.unit_for(name, text, False, f"{qpath}.unit" if text else qpath)
        if unit is not None:
            self.builder.add_number(name, float(v) if isinstance(v, float) else v, unit, path, ref)

    def coded(self, name: str, holder: dict[str, Any], path: str, ref: str) -> None:
        spec = self.catalog[name]
        if isinstance(holder.get("valueString"), str):
            words = [(f"{path}.valueString", None, holder["valueString"])]
        elif isinstance(holder.get("valueCodeableConcept"), dict):
            codings = holder["valueCodeableConcept"].get("coding") or []
            words = [
                (f"{path}.valueCodeableConcept.coding[{j}]", c.get("system"), c.get("code"))
                for j, c in enumerate(codings)
                if isinstance(c, dict)
            ]
        else:
            self.issue(
                path, "value.wrong_type", f"{name} is coded; expected valueCodeableConcept or valueString"
            )
            return
        for where, system, code in words:
            if name == "sample_type":
                known, sample = specimen_from_code(system, code)
                if known:
                    self.builder.claim_specimen(sample, where, "input", ref)
                    return
            if code in spec.codes:
                if name == "sample_type":
                    self.builder.claim_specimen(code, where, "input", ref)
                else:
                    self.builder.add_value(name, code, where, ref)
                return
        shown = ", ".join(str(w[2]) for w in words) or "nothing"
        self.issue(
            path,
            "value.unknown_code",
            f"{name}: {shown} is not among the accepted codes ({', '.join(spec.codes)})",
        )

    # -- patient
    def age_from_birth_date(self) -> None:
        if "age" not in self.catalog or self.age_given or not self.patients:
            return
        patient = None
        for subject in self.subjects:
            found = self.by_ref.get(subject) or self.by_ref.get("/".join(subject.split("/")[-2:]))
            if found and found[1].get("resourceType") == "Patient":
                patient = next((p for p in self.patients if p[2] is found[1]), None)
        if patient is None and len(self.patients) == 1:
            patient = self.patients[0]
        if patient is None:
            return
        path, ref, res = patient
        born = res.get("birthDate")
        if not isinstance(born, str):
            return
        taken = self.times[0][1] if self.times else None
        if len(born) != 10 or taken is None:
            why = "the birth date is partial" if len(born) != 10 else "no result carries a collection time"
            self.issue(f"{path}.birthDate", "age.not_computed", f"age not computed: {why}", "warning")
            return
        try:
            years = completed_years(date.fromisoformat(born), date.fromisoformat(taken[:10]))
        except ValueError:
            self.issue(
                f"{path}.birthDate",
                "age.not_computed",
                f"age not computed: {born!r} or {taken!r} is not a date",
                "warning",
            )
            return
        if "a" in accepted_units(self.catalog["age"]):
            self.builder.add_number("age", years, "a", f"{path}.birthDate", ref)


def case_from_fhir(resource: Any, catalog: Catalog, *, allow_preliminary: bool = False) -> FhirReadResult:
    """Read a Bundle, a list of resources or one Observation into an engine case.

    ``catalog`` maps input names to rulebook inputs (``rulebook.inputs``). Preliminary results
    are left out and reported unless ``allow_preliminary`` is true.
    """
    builder = CaseBuilder(catalog, allow_preliminary=allow_preliminary)
    reader = _Reader(catalog, builder, loinc_index(catalog))
    items, case_id = _items(resource, builder)
    refs = [reader.register(path, res, url) for path, res, url in items]
    for (path, res, _), ref in zip(items, refs, strict=True):
        if res.get("resourceType") == "Patient":
            reader.patients.append((path, ref, res))
    for (path, res, _), ref in zip(items, refs, strict=True):
        if res.get("resourceType") == "Observation":
            reader.observation(path, res, ref)
    reader.age_from_birth_date()
    times = sorted({t for _, t in reader.times})
    if len(times) > 1:
        said = ", ".join(f"{p}: {t}" for p, t in reader.times)
        builder.issue(
            reader.times[0][0],
            "time.mismatch",
            f"the blood gas results carry different collection times ({said})",
            "warning",
        )
    case, sources = builder.build()
    if case_id is None and len(reader.panel_ids) == 1:
        case_id = reader.panel_ids[0]
    if case_id is not None:
        case = {"case_id": case_id, **case}
    subject = reader.subjects[0] if reader.subjects else None
    return FhirReadResult(
        case, tuple(builder.issues), sources, subject, reader.times[0][1] if reader.times else None
    )


def _items(
    resource: Any,
    builder: CaseBuilder,
) -> tuple[list[tuple[str, dict[str, Any], str | None]], str | None]:
    """(path, resource, fullUrl) for every resource to read, and the case id."""
    out: list[tuple[str, dict[str, Any], str | None]] = []
    if isinstance(resource, list):
        for i, res in enumerate(resource):
            if isinstance(res, dict):
                out.append((f"{res.get('resourceType', 'Resource')}[{i}]", res, None))
            else:
                builder.issue(f"[{i}]", "read.not_json_object", "list item is not an object")
        return out, None
    if not isinstance(resource, dict):
        builder.issue("$", "read.not_json_object", "expected a FHIR Bundle, Observation or list of resources")
        return [], None
    rtype = resource.get("resourceType")
    case_id = resource.get("id") if isinstance(resource.get("id"), str) else None
    if rtype == "Observation":
        return [("Observation", resource, None)], case_id
    if rtype != "Bundle":
        builder.issue(
            "resourceType",
            "read.unsupported_resource",
            f"resourceType {rtype!r} is not read; expected Bundle or Observation",
        )
        return [], None
    if resource.get("type") not in BUNDLE_TYPES:
        builder.issue(
            "Bundle.type",
            "read.unsupported_bundle",
            f"Bundle.type {resource.get('type')!r} is not read; accepted: {', '.join(BUNDLE_TYPES)}",
        )
        return [], case_id
    for i, entry in enumerate(resource.get("entry") or []):
        res = entry.get("resource") if isinstance(entry, dict) else None
        if isinstance(res, dict):
            out.append((f"Bundle.entry[{i}].resource", res, entry.get("fullUrl")))
    return out, case_id


def _loinc_codes(concept: Any) -> list[str]:
    if not isinstance(concept, dict):
        return []
    return [
        str(c["code"])
        for c in concept.get("coding") or []
        if isinstance(c, dict) and c.get("system") == LOINC_SYSTEM and c.get("code")
    ]


def _ref_text(ref: Any) -> str:
    return str(ref.get("reference")) if isinstance(ref, dict) else repr(ref)


def _concept_text(concept: Any) -> str:
    if not isinstance(concept, dict):
        return str(concept)
    codings = concept.get("coding") or [{}]
    return str(concept.get("text") or codings[0].get("display") or codings[0].get("code"))


# ============================================================================ writing
def result_to_fhir(
    result: Mapping[str, Any],
    case_inputs_refs: Mapping[str, str],
    *,
    rulebook_info: Any,
    subject: str | None = None,
    effective: str | None = None,
    issued: str | None = None,
    codesystem_url: str = CODE_SYSTEM_BASE,
) -> dict[str, Any]:
    """One engine result as a FHIR R4 Bundle (type collection).

    ``case_inputs_refs`` maps input names to references of the Observations they came from
    (``FhirReadResult.sources``); they become ``derivedFrom``, ``DiagnosticReport.result`` and
    Provenance entities. ``rulebook_info`` is the rulebook (or a mapping with id, version,
    sha256); it must be the one named in ``result["rulebook"]``. Resource ids are derived from
    the content, so the same result gives the same Bundle; ``issued`` defaults to now (UTC).
    Project codes are under ``codesystem_url`` (``<base>/disorder`` etc.); derived values and
    disorders also carry the LOINC / SNOMED CT codes of :mod:`gasrules.integration.terminology`.
    """
    cs = {
        k: f"{codesystem_url.rstrip('/')}/{k}"
        for k in ("report", "finding", "disorder", "qualifier", "value")
    }
    rulebook = _rulebook_fields(rulebook_info)
    claimed = result.get("rulebook") or {}
    for key in ("id", "version", "sha256"):
        if claimed.get(key) not in (None, rulebook[key]):
            raise ValueError(
                f"rulebook_info {key} {rulebook[key]!r} differs from the "
                f"result's rulebook {key} {claimed[key]!r}"
            )
    issued = issued or datetime.now(UTC).replace(microsecond=0).isoformat()
    engine_version = str(result.get("engine_version") or "unknown")
    refs = list(dict.fromkeys(case_inputs_refs.values()))
    seed = json.dumps(
        [{k: v for k, v in result.items() if k != "trace"}, refs, rulebook], sort_keys=True, default=str
    )
    base = uuid.uuid5(_NAMESPACE, seed)
    ids = {k: uuid.uuid5(base, k) for k in ("bundle", "obs", "report", "device", "prov")}
    url = {k: f"urn:uuid:{v}" for k, v in ids.items()}
    common: dict[str, Any] = {}
    if subject:
        common["subject"] = {"reference": subject}
    if effective:
        common["effectiveDateTime"] = effective
    report_code = {
        "coding": [
            {
                "system": cs["report"],
                "code": "blood-gas-interpretation",
                "display": "Blood gas interpretation (rule-based)",
            }
        ],
        "text": "Blood gas interpretation",
    }
    headline = str(result.get("headline") or "")
    observation: dict[str, Any] = {
        "resourceType": "Observation",
        "id": str(ids["obs"]),
        "status": "preliminary",
        "category": [
            {
                "coding": [
                    {
                        "system": "http://terminology.hl7.org/CodeSystem/observation-category",
                        "code": "laboratory",
                    }
                ]
            }
        ],
        "code": report_code,
        **common,
        "issued": issued,
        "valueString": headline,
        "method": {"text": f"gasrules rulebook {rulebook['id']} {rulebook['version']}"},
        "device": {"reference": url["device"]},
    }
    notes = _notes(result)
    if notes:
        observation["note"] = [{"text": n} for n in notes]
    if refs:
        observation["derivedFrom"] = [{"reference": r} for r in refs]
    components = _components(result, set(case_inputs_refs), cs)
    if components:
        observation["component"] = components
    report: dict[str, Any] = {
        "resourceType": "DiagnosticReport",
        "id": str(ids["report"]),
        "status": "preliminary",
        "category": [
            {
                "coding": [
                    {
                        "system": "http://terminology.hl7.org/CodeSystem/v2-0074",
                        "code": "LAB",
                        "display": "Laboratory",
                    }
                ]
            }
        ],
        "code": report_code,
        **common,
        "issued": issued,
        "result": [{"reference": url["obs"]}] + [{"reference": r} for r in refs],
        "conclusion": headline,
        "text": {"status": "generated", "div": _narrative(result, notes)},
    }
    conclusion_codes = _conclusion_codes(result, cs)
    if conclusion_codes:
        report["conclusionCode"] = conclusion_codes
    device = {
        "resourceType": "Device",
        "id": str(ids["device"]),
        "deviceName": [{"name": "gasrules", "type": "user-friendly-name"}],
        "version": [{"value": engine_version}],
    }
    rb_ref = f"{rulebook['id']}|{rulebook['version']}"
    provenance = {
        "resourceType": "Provenance",
        "id": str(ids["prov"]),
        "target": [{"reference": url["obs"]}, {"reference": url["report"]}],
        "recorded": issued,
        "policy": [
            f"{RULEBOOK_ID_SYSTEM}/{rulebook['id']}/{rulebook['version']}?sha256={rulebook['sha256']}"
        ],
        "activity": {
            "coding": [
                {
                    "system": "http://terminology.hl7.org/CodeSystem/v3-DataOperation",
                    "code": "CREATE",
                    "display": "create",
                }
            ]
        },
        "agent": [
            {
                "type": {
                    "coding": [
                        {
                            "system": "http://terminology.hl7.org/CodeSystem/provenance-participant-type",
                            "code": "assembler",
                            "display": "Assembler",
                        }
                    ]
                },
                "who": {"reference": url["device"], "display": f"gasrules engine {engine_version}"},
            }
        ],
        "entity": [{"role": "source", "what": {"reference": r}} for r in refs]
        + [
            {
                "role": "derivation",
                "what": {
                    "identifier": {"system": RULEBOOK_ID_SYSTEM, "value": rb_ref},
                    "display": f"rulebook {rulebook['id']} {rulebook['version']} sha256:{rulebook['sha256']}",
                },
            }
        ],
    }
    entries = [("obs", observation), ("report", report), ("device", device), ("prov", provenance)]
    return {
        "resourceType": "Bundle",
        "id": str(ids["bundle"]),
        "type": "collection",
        "timestamp": issued,
        "entry": [{"fullUrl": url[k], "resource": r} for k, r in entries],
    }


def _rulebook_fields(info: Any) -> dict[str, str]:
    def get(key: str) -> Any:
        return info.get(key) if isinstance(info, Mapping) else getattr(info, key, None)

    out = {k: get(k) for k in ("id", "version", "sha256")}
    missing = [k for k, v in out.items() if not v]
    if missing:
        raise ValueError(
            f"rulebook_info lacks {', '.join(missing)}; expected id, version, "
            "sha256 (a loaded rulebook or a mapping)"
        )
    return {k: str(v) for k, v in out.items()}


def _notes(result: Mapping[str, Any]) -> list[str]:
    notes = [f"Engine status: {result.get('status', 'unknown')}."]
    for e in result.get("errors") or []:
        accepted = f" (accepted: {e['accepted']})" if e.get("accepted") else ""
        notes.append(f"Input error in {e.get('field')}: {e.get('message')}{accepted}")
    for n in result.get("not_assessed") or []:
        notes.append(f"Not assessed: {n.get('what')} ({n.get('why')})")
    notes.extend(str(c) for c in result.get("cautions") or [])
    return notes


def _components(result: Mapping[str, Any], inputs: set[str], cs: Mapping[str, str]) -> list[dict[str, Any]]:
    from gasrules.integration.terminology import disorder_codings, value_codings

    out: list[dict[str, Any]] = []
    qualifiers = result.get("qualifiers") or {}
    for d in result.get("disorders") or []:
        concept: dict[str, Any] = {"coding": disorder_codings(d, cs["disorder"])}
        if d in qualifiers:
            concept["coding"].append({"system": cs["qualifier"], "code": str(qualifiers[d])})
        out.append(
            {
                "code": {"coding": [{"system": cs["report"], "code": "disorder"}], "text": "Disorder"},
                "valueCodeableConcept": {**concept, "text": _disorder_text(d, qualifiers)},
            }
        )
    for f in result.get("findings") or []:
        comp: dict[str, Any] = {
            "code": {
                "coding": [{"system": cs["finding"], "code": f["code"]}],
                "text": str(f.get("category") or f["code"]),
            },
            "valueString": str(f.get("text") or f["code"]),
        }
        flag = _SEVERITY_FLAG.get(str(f.get("severity")))
        if flag:
            comp["interpretation"] = [
                {"coding": [{"system": _OBS_INTERPRETATION, "code": flag[0], "display": flag[1]}]}
            ]
        out.append(comp)
    units = result.get("units") or {}
    for name, value in (result.get("values") or {}).items():
        if name in inputs or isinstance(value, bool) or not isinstance(value, (int, float)):
            continue
        if value != value or value in (float("inf"), float("-inf")):
            continue
        quantity: dict[str, Any] = {"value": value}
        unit = units.get(name)
        if unit:
            quantity.update({"unit": unit, "system": UCUM_SYSTEM, "code": unit})
        out.append(
            {"code": {"coding": value_codings(name, cs["value"]), "text": name}, "valueQuantity": quantity}
        )
    return out


def _disorder_text(disorder: str, qualifiers: Mapping[str, Any]) -> str:
    words = disorder.replace("_", " ")
    return f"{words} ({qualifiers[disorder]})" if disorder in qualifiers else words


def _conclusion_codes(result: Mapping[str, Any], cs: Mapping[str, str]) -> list[dict[str, Any]]:
    from gasrules.integration.terminology import disorder_codings

    codes = [
        {
            "coding": disorder_codings(d, cs["disorder"]),
            "text": _disorder_text(d, result.get("qualifiers") or {}),
        }
        for d in result.get("disorders") or []
    ]
    codes += [
        {"coding": [{"system": cs["finding"], "code": f["code"]}], "text": str(f.get("text") or f["code"])}
        for f in result.get("findings") or []
        if f.get("severity") in _SEVERITY_FLAG
    ]
    return codes


def _narrative(result: Mapping[str, Any], notes: list[str]) -> str:
    from html import escape

    parts = [f"<p><b>{escape(str(result.get('headline') or ''))}</b></p>"]
    findings = [escape(str(f.get("text") or f.get("code"))) for f in result.get("findings") or []]
    if findings:
        parts.append("<ul>" + "".join(f"<li>{t}</li>" for t in findings) + "</ul>")
    if notes:
        parts.append("<ul>" + "".join(f"<li>{escape(n)}</li>" for n in notes) + "</ul>")
    return '<div xmlns="http://www.w3.org/1999/xhtml">' + "".join(parts) + "</div>"
