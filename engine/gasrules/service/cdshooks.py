"""CDS Hooks service logic: discovery, prefetch to case, result to card, feedback records.

Pure functions and two small stores; the HTTP side is in :mod:`gasrules.service.handlers`. Follows CDS
Hooks 2.0.1 (STU2) and accepts the 3.0 ballot fields (shared/interop.md section 4):

* discovery lists one service per row of :data:`SERVICES`, each with two prefetch templates:
  the patient (for age from ``birthDate``) and the patient's Observations for every LOINC code
  the rulebook reads;
* a call takes the prefetched Observations, picks the most recent blood gas (the latest final pH
  or PCO2 collection time) and the results collected at that same time, reads them with
  :func:`gasrules.integration.fhir.case_from_fhir` and interprets them;
* the card: the headline as summary (< 140 characters), the findings, what was not assessed,
  input problems, the results used and the cautions as detail; the indicator follows the most
  severe finding; the source names the rulebook and its version; one suggestion files the
  interpretation as a preliminary Observation; override reasons of our own;
* feedback (accepted / overridden) is written to a JSON Lines file against the rule ids behind
  the card (each issued card is written there too, so feedback can be joined after a restart).

A missing prefetch key cannot be made good (the service does not query the EHR's FHIR server):
:class:`CdsError` with status 412. Observations of another patient than ``context.patientId``
are refused (400): the service never interprets results of the wrong patient.
"""

from __future__ import annotations

import json
import os
import threading
import uuid
from collections import OrderedDict
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.integration.fhir import (
    CODE_SYSTEM_BASE,
    LOINC_SYSTEM,
    FhirReadResult,
    case_from_fhir,
    result_to_fhir,
)

__all__ = [
    "SERVICES",
    "CardStore",
    "CdsError",
    "FeedbackLog",
    "Selection",
    "ServiceDef",
    "build_card",
    "discovery",
    "feedback_records",
    "gather_prefetch",
    "read_request",
]


class CdsError(EngineError):
    """A CDS request that cannot be served; ``status`` 400 or 412, ``field`` names the element."""

    def __init__(self, status: int, code: str, message: str, field: str = "") -> None:
        super().__init__(message)
        self.status, self.code, self.message, self.field = status, code, message, field


@dataclass(frozen=True)
class ServiceDef:
    id: str
    hook: str
    title: str
    description: str


SERVICES: tuple[ServiceDef, ...] = (
    ServiceDef(
        "blood-gas-patient-view",
        "patient-view",
        "Blood gas interpretation (rule-based)",
        "Interprets the patient's most recent blood gas, with the chemistry collected at "
        "the same time, by the versioned gasrules rulebook: acid-base disorders, "
        "compensation, anion gap, oxygenation, critical values. Decision support only.",
    ),
)
SERVICES_BY_ID = {s.id: s for s in SERVICES}

TOPIC = {
    "system": f"{CODE_SYSTEM_BASE}/cds-topic",
    "code": "acid-base",
    "display": "Acid-base and blood gas interpretation",
}
OVERRIDE_SYSTEM = f"{CODE_SYSTEM_BASE}/override-reason"
OVERRIDE_REASONS = (
    ("sample-problem", "Sample or labelling problem (sample type, timing, pre-analytical error)"),
    ("clinical-context", "Clinical context explains the results"),
    ("already-addressed", "Already known and addressed"),
    ("disagree", "Disagree with the interpretation"),
)
ANCHOR_INPUTS = ("ph", "pco2")  # the latest of these sets the collection time of "the" gas
USABLE_STATUSES = ("final", "amended", "corrected")  # what the FHIR reader uses
SUMMARY_LIMIT = 139  # card.summary: one sentence, < 140 characters
_SEVERITY_RANK = {"info": 0, "warning": 1, "critical": 2}


# ============================================================================ discovery
def prefetch_templates(rulebook: Any) -> dict[str, str]:
    codes = sorted({c for spec in rulebook.inputs.values() for c in getattr(spec, "loinc", ())})
    code_param = ",".join(f"{LOINC_SYSTEM}|{c}" for c in codes)
    return {
        "patient": "Patient/{{context.patientId}}",
        "observations": "Observation?patient={{context.patientId}}&code="
        + code_param
        + "&_sort=-date&_count=200",
    }


def discovery(rulebook: Any) -> dict[str, Any]:
    templates = prefetch_templates(rulebook)
    return {
        "services": [
            {
                "hook": s.hook,
                "title": s.title,
                "description": s.description,
                "id": s.id,
                "prefetch": templates,
                "version": "STU2",
                "usageRequirements": "Needs the prefetched Observations (key 'observations'); the "
                "service does not query the FHIR server itself.",
            }
            for s in SERVICES
        ]
    }


# ============================================================================ request
def read_request(body: Any, service: ServiceDef) -> dict[str, Any]:
    """Check the request envelope; return its context. Raises CdsError(400) naming the field."""
    if not isinstance(body, dict):
        raise CdsError(400, "cds.request", "the request must be a JSON object", "$")
    if body.get("hook") != service.hook:
        raise CdsError(
            400,
            "cds.hook",
            f"hook {body.get('hook')!r} is not served here; "
            f"service {service.id!r} answers hook {service.hook!r}",
            "hook",
        )
    instance = body.get("hookInstance")
    try:
        uuid.UUID(str(instance))
    except ValueError:
        raise CdsError(
            400, "cds.hook_instance", f"hookInstance {instance!r} is not a UUID", "hookInstance"
        ) from None
    context = body.get("context")
    if not isinstance(context, dict):
        raise CdsError(400, "cds.context", "context must be an object", "context")
    pid = context.get("patientId")
    if not isinstance(pid, str) or not pid:
        raise CdsError(400, "cds.context", "context.patientId is required (a FHIR id)", "context.patientId")
    if "fhirAuthorization" in body and not body.get("fhirServer"):
        raise CdsError(
            400, "cds.fhir_server", "fhirServer is required when fhirAuthorization is given", "fhirServer"
        )
    if "prefetch" in body and not isinstance(body["prefetch"], dict):
        raise CdsError(400, "cds.prefetch", "prefetch must be an object", "prefetch")
    return context


@dataclass(frozen=True)
class Selection:
    """The resources of the most recent blood gas, and what was left out."""

    resources: list[dict[str, Any]]
    collected: datetime | None
    observations_seen: int
    left_out: int


def _outcome_problem(resource: Any) -> str | None:
    if isinstance(resource, dict) and resource.get("resourceType") == "OperationOutcome":
        issues = [i for i in resource.get("issue") or [] if isinstance(i, dict)]
        if not issues or any(i.get("severity") in ("error", "fatal") for i in issues):
            texts = [
                str(i.get("diagnostics") or (i.get("details") or {}).get("text") or i.get("code"))
                for i in issues
            ]
            return "; ".join(texts) or "an OperationOutcome without issues"
    return None


def gather_prefetch(
    body: Mapping[str, Any], patient_id: str, rulebook: Any, window: timedelta = timedelta(0)
) -> Selection | None:
    """The Observations to interpret, or None when the EHR has none (key present, value null)."""
    prefetch = body.get("prefetch") or {}
    if "observations" not in prefetch:
        raise CdsError(
            412,
            "cds.prefetch_missing",
            "prefetch 'observations' was not provided; this service does not query the FHIR server itself",
            "prefetch",
        )
    raw = prefetch["observations"]
    if raw is None:
        return None
    problem = _outcome_problem(raw)
    if problem:
        raise CdsError(
            412,
            "cds.prefetch_failed",
            f"the EHR could not prefetch the Observations: {problem}",
            "prefetch.observations",
        )
    items = _resources(raw, "prefetch.observations")
    for i, res in enumerate(items):
        problem = _outcome_problem(res)
        if problem:
            raise CdsError(
                412,
                "cds.prefetch_failed",
                f"the prefetched Bundle reports an error: {problem}",
                f"prefetch.observations.entry[{i}]",
            )
    patient = prefetch.get("patient")
    extra: list[dict[str, Any]] = []
    patient_refs = {f"Patient/{patient_id}"}
    if isinstance(patient, dict) and patient.get("resourceType") == "Patient":
        if patient.get("id") not in (None, patient_id):
            raise CdsError(
                400,
                "cds.wrong_patient",
                f"prefetch.patient is Patient/{patient.get('id')}, not context.patientId {patient_id}",
                "prefetch.patient.id",
            )
        extra.append(patient)
    observations = [r for r in items if r.get("resourceType") == "Observation"]
    others = [r for r in items if r.get("resourceType") not in ("Observation", "OperationOutcome")]
    for r in others:
        if r.get("resourceType") == "Patient" and r.get("id") not in (None, patient_id):
            raise CdsError(
                400,
                "cds.wrong_patient",
                f"the prefetch holds Patient/{r.get('id')}, not context.patientId {patient_id}",
                "prefetch.observations",
            )
    if isinstance(raw, dict) and raw.get("resourceType") == "Bundle":
        patient_refs |= {
            str(e["fullUrl"])
            for e in raw.get("entry") or []
            if isinstance(e, dict)
            and e.get("fullUrl")
            and isinstance(e.get("resource"), dict)
            and e["resource"].get("resourceType") == "Patient"
        }
    for r in observations:
        ref = (r.get("subject") or {}).get("reference") if isinstance(r.get("subject"), dict) else None
        if ref and ref not in patient_refs and not ref.endswith(f"/Patient/{patient_id}"):
            raise CdsError(
                400,
                "cds.wrong_patient",
                f"Observation/{r.get('id')} is for {ref}, not context.patientId {patient_id}",
                "prefetch.observations",
            )
    return _latest_gas(observations, others + extra, rulebook, window)


def _resources(raw: Any, where: str) -> list[dict[str, Any]]:
    if isinstance(raw, list):
        return [r for r in raw if isinstance(r, dict)]
    if isinstance(raw, dict) and raw.get("resourceType") == "Bundle":
        return [
            e["resource"]
            for e in raw.get("entry") or []
            if isinstance(e, dict) and isinstance(e.get("resource"), dict)
        ]
    if isinstance(raw, dict) and raw.get("resourceType") == "Observation":
        return [raw]
    raise CdsError(400, "cds.prefetch", "expected a searchset Bundle of Observations (or null)", where)


def effective_time(obs: Mapping[str, Any]) -> datetime | None:
    text = (
        obs.get("effectiveDateTime")
        or obs.get("effectiveInstant")
        or (obs.get("effectivePeriod") or {}).get("start")
    )
    if not isinstance(text, str):
        return None
    try:
        when = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        try:
            d = date.fromisoformat(text)
        except ValueError:
            return None
        when = datetime(d.year, d.month, d.day)
    return when if when.tzinfo else when.replace(tzinfo=UTC)


def _inputs_of(obs: Mapping[str, Any], index: Mapping[str, str]) -> set[str]:
    concepts = [obs.get("code")] + [c.get("code") for c in obs.get("component") or [] if isinstance(c, dict)]
    return {
        index[str(c.get("code"))]
        for con in concepts
        if isinstance(con, dict)
        for c in con.get("coding") or []
        if isinstance(c, dict) and c.get("system") == LOINC_SYSTEM and str(c.get("code")) in index
    }


def _latest_gas(
    observations: list[dict[str, Any]], others: list[dict[str, Any]], rulebook: Any, window: timedelta
) -> Selection | None:
    from gasrules.integration.standard_codes import loinc_index

    index = loinc_index(rulebook.inputs)
    timed = [(effective_time(o), _inputs_of(o, index), o) for o in observations]
    anchors = [
        t
        for t, names, o in timed
        if t is not None and names & set(ANCHOR_INPUTS) and o.get("status") in USABLE_STATUSES
    ]
    if not anchors:
        return None
    at = max(anchors)
    chosen = [o for t, _, o in timed if t == at]
    covered = set().union(*(names for t, names, _ in timed if t == at))
    if window > timedelta(0):  # chemistry drawn a little earlier, newest first per input
        for t, names, o in sorted(
            (x for x in timed if x[0] is not None and at - window <= x[0] < at),
            key=lambda x: x[0],
            reverse=True,
        ):
            if names and not names & covered and o.get("status") in USABLE_STATUSES:
                chosen.append(o)
                covered |= names
    return Selection(
        resources=others + chosen,
        collected=at,
        observations_seen=len(observations),
        left_out=len(observations) - len(chosen),
    )


def case_for(
    selection: Selection, context: Mapping[str, Any], hook_instance: str, rulebook: Any
) -> FhirReadResult:
    read = case_from_fhir(selection.resources, rulebook.inputs)
    case = dict(read.case)
    case["case_id"] = f"cds-{hook_instance}"
    # snake_case keys, so that decision records mask or drop patient_id like any other context
    case["context"] = {
        "source": "cds-hooks",
        "hook_instance": hook_instance,
        "patient_id": str(context["patientId"]),
    }
    return FhirReadResult(case, read.issues, read.sources, read.subject, read.effective)


# ============================================================================ cards
def _md(text: Any) -> str:
    out = str(text)
    for ch in "\\`*_[]<>":
        out = out.replace(ch, "\\" + ch)
    return out


def summary_of(headline: str) -> str:
    """The headline cut at a clause boundary to fit card.summary (< 140 characters)."""
    headline = " ".join(str(headline).split()) or "Blood gas interpreted"
    if len(headline) <= SUMMARY_LIMIT:
        return headline
    cut = headline[: SUMMARY_LIMIT - 1]
    for sep in ("; ", ", ", " "):
        if sep in cut:
            cut = cut[: cut.rindex(sep)]
            break
    return cut.rstrip(";, ") + "…"


def indicator_of(result: Mapping[str, Any]) -> str:
    ranks = [_SEVERITY_RANK.get(str(f.get("severity")), 0) for f in result.get("findings") or []]
    best = max(ranks, default=0)
    return next(k for k, v in _SEVERITY_RANK.items() if v == best)


def rules_of(result: Mapping[str, Any]) -> list[str]:
    """Rule ids behind a result: the rules of its findings, then every other fired rule."""
    rules = [str(f["rule"]) for f in result.get("findings") or [] if f.get("rule")]
    rules += [
        str(e["rule"]) for e in result.get("trace") or [] if e.get("outcome") == "fired" and e.get("rule")
    ]
    return list(dict.fromkeys(rules))


def _detail(result: Mapping[str, Any], read: FhirReadResult, selection: Selection, rulebook: Any) -> str:
    from gasrules.evaluation.evaluator import format_quantity

    lines: list[str] = []
    findings = sorted(
        result.get("findings") or [], key=lambda f: -_SEVERITY_RANK.get(str(f.get("severity")), 0)
    )
    if findings:
        lines.append("**Findings**")
        for f in findings:
            sev = str(f.get("severity") or "info")
            lines.append(f"- {'**' + sev + '**' if sev != 'info' else sev}: {_md(f.get('text'))}")
    problems = [
        f"{e.get('field') or 'case'}: {e.get('message')}"
        + (f" (accepted: {e['accepted']})" if e.get("accepted") else "")
        for e in result.get("errors") or []
    ]
    problems += [f"{i.path}: {i.message}" for i in read.issues if i.severity != "notice"]
    if problems:
        lines += ["", "**Input problems**"] + [f"- {_md(p)}" for p in problems]
    missing = [f"{n.get('what')}: {n.get('why')}" for n in result.get("not_assessed") or []]
    if missing:
        lines += ["", "**Not assessed**"] + [f"- {_md(m)}" for m in missing]
    used = []
    for name, value in (result.get("inputs") or {}).items():
        spec = rulebook.inputs.get(name)
        if name not in read.case or spec is None:
            continue
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            used.append(
                f"{getattr(spec, 'label', name)} "
                f"{format_quantity(rulebook, value, spec.unit, spec.precision)}"
            )
        else:
            used.append(f"{getattr(spec, 'label', name)} {value}")
    when = selection.collected.strftime("%Y-%m-%d %H:%M UTC") if selection.collected else "?"
    lines += ["", f"**Results used** (collected {when}): {_md(', '.join(used)) or 'none'}."]
    if selection.left_out:
        lines.append(f"{selection.left_out} other prefetched result(s) from other times were not used.")
    rb = result.get("rulebook") or {}
    lines += [
        "",
        f"Rulebook {_md(rb.get('id'))} {_md(rb.get('version'))} (sha256 "
        f"{str(rb.get('sha256'))[:12]}…), engine {_md(result.get('engine_version'))}; "
        f"status {_md(result.get('status'))}.",
    ]
    cautions = result.get("cautions") or []
    if cautions:
        lines += ["", "**Cautions**"] + [f"- {_md(c)}" for c in cautions]
    return "\n".join(lines)


def build_card(
    result: Mapping[str, Any], read: FhirReadResult, selection: Selection, rulebook: Any, patient_id: str
) -> dict[str, Any]:
    """One card for one interpretation (CDS Hooks card attributes)."""
    rb = result.get("rulebook") or {}
    card: dict[str, Any] = {
        "uuid": str(uuid.uuid4()),
        "summary": summary_of(str(result.get("headline") or "")),
        "indicator": indicator_of(result),
        "detail": _detail(result, read, selection, rulebook),
        "source": {"label": f"gasrules rulebook {rb.get('id')} {rb.get('version')}", "topic": TOPIC},
        "overrideReasons": [
            {"system": OVERRIDE_SYSTEM, "code": c, "display": d} for c, d in OVERRIDE_REASONS
        ],
    }
    if result.get("status") != "rejected":
        card["suggestions"] = [
            {
                "label": "File this interpretation in the chart (preliminary)",
                "uuid": str(uuid.uuid4()),
                "isRecommended": False,
                "actions": [
                    {
                        "type": "create",
                        "description": "Create a preliminary Observation holding the "
                        "interpretation, derived from the results used",
                        "resource": interpretation_observation(result, read, rulebook, patient_id),
                    }
                ],
            }
        ]
        card["selectionBehavior"] = "at-most-one"
    return card


def interpretation_observation(
    result: Mapping[str, Any], read: FhirReadResult, rulebook: Any, patient_id: str
) -> dict[str, Any]:
    """The interpretation Observation of :func:`result_to_fhir`, standing alone for a create."""
    refs = {k: v for k, v in read.sources.items() if "/" in v and not v.startswith("urn:")}
    bundle = result_to_fhir(
        result, refs, rulebook_info=rulebook, subject=f"Patient/{patient_id}", effective=read.effective
    )
    obs = dict(bundle["entry"][0]["resource"])
    obs.pop("device", None)  # a urn:uuid inside the Bundle; the create action stands alone
    obs.pop("id", None)  # the EHR assigns the id
    return obs


# ============================================================================ feedback
class FeedbackLog:
    """Append-only JSON Lines file of issued cards and feedback, one flushed line per record."""

    def __init__(self, path: str | Path, *, fsync: bool = False) -> None:
        self.path = Path(path)
        self.fsync = fsync
        self._lock = threading.Lock()

    def append(self, records: Sequence[Mapping[str, Any]]) -> None:
        if not records:
            return
        data = "".join(json.dumps(r, sort_keys=True, ensure_ascii=False) + "\n" for r in records)
        with self._lock:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write(data)
                fh.flush()
                if self.fsync:
                    os.fsync(fh.fileno())

    def cards(self, limit: int) -> list[dict[str, Any]]:
        """The last ``limit`` card records (to rebuild the card index after a restart)."""
        if not self.path.exists():
            return []
        found: OrderedDict[str, dict[str, Any]] = OrderedDict()
        with open(self.path, encoding="utf-8") as fh:
            for line in fh:
                try:
                    rec = json.loads(line)
                except ValueError:
                    continue  # a torn last line from a crash: skip it
                if isinstance(rec, dict) and rec.get("type") == "card" and rec.get("card"):
                    found[str(rec["card"])] = rec
                    if len(found) > limit:
                        found.popitem(last=False)
        return list(found.values())


class CardStore:
    """Bounded index of issued cards: card uuid -> its issue record."""

    def __init__(self, limit: int = 50_000) -> None:
        self.limit = limit
        self._cards: OrderedDict[str, dict[str, Any]] = OrderedDict()
        self._lock = threading.Lock()

    def put(self, record: dict[str, Any]) -> None:
        with self._lock:
            self._cards[str(record["card"])] = record
            while len(self._cards) > self.limit:
                self._cards.popitem(last=False)

    def get(self, card: str) -> dict[str, Any] | None:
        with self._lock:
            return self._cards.get(card)


def card_record(
    card: Mapping[str, Any], result: Mapping[str, Any], service: ServiceDef, hook_instance: str, now: datetime
) -> dict[str, Any]:
    return {
        "type": "card",
        "card": card["uuid"],
        "service": service.id,
        "hookInstance": hook_instance,
        "issued_at": now.isoformat(),
        "indicator": card["indicator"],
        "summary": card["summary"],
        "suggestions": [s["uuid"] for s in card.get("suggestions") or []],
        "rules": rules_of(result),
        "findings": [f.get("code") for f in result.get("findings") or []],
        "disorders": list(result.get("disorders") or []),
        "status": result.get("status"),
        "case_id": result.get("case_id"),
        "rulebook": result.get("rulebook"),
    }


def _timestamp(value: Any, where: str) -> str:
    if not isinstance(value, str) or "T" not in value:
        raise CdsError(
            400,
            "cds.feedback",
            f"{where} must be an RFC 3339 date-time in UTC, e.g. 2031-03-14T08:40:12Z; got {value!r}",
            where,
        )
    try:
        when = datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise CdsError(
            400, "cds.feedback", f"{where} {value!r} is not an RFC 3339 date-time", where
        ) from None
    if when.tzinfo is None:
        raise CdsError(400, "cds.feedback", f"{where} {value!r} lacks a time zone (use Z)", where)
    return value


def feedback_records(
    body: Any, service: ServiceDef, cards: CardStore, client: Mapping[str, Any] | None, now: datetime
) -> list[dict[str, Any]]:
    """Validate a feedback request; one record per entry, with the rule ids of its card.
    Every entry is checked before any is recorded (all or nothing)."""
    if not isinstance(body, dict) or not isinstance(body.get("feedback"), list) or not body["feedback"]:
        raise CdsError(
            400, "cds.feedback", 'expected {"feedback": [ ... ]} with at least one entry', "feedback"
        )
    out = []
    for i, fb in enumerate(body["feedback"]):
        where = f"feedback[{i}]"
        if not isinstance(fb, dict):
            raise CdsError(400, "cds.feedback", f"{where} must be an object", where)
        card_id = fb.get("card")
        if not isinstance(card_id, str) or not card_id:
            raise CdsError(400, "cds.feedback", f"{where}.card (the card uuid) is required", f"{where}.card")
        outcome = fb.get("outcome")
        if outcome not in ("accepted", "overridden"):
            raise CdsError(
                400,
                "cds.feedback",
                f"{where}.outcome must be 'accepted' or 'overridden'; got {outcome!r}",
                f"{where}.outcome",
            )
        accepted = fb.get("acceptedSuggestions")
        if outcome == "accepted":
            if (
                not isinstance(accepted, list)
                or not accepted
                or not all(isinstance(a, dict) and isinstance(a.get("id"), str) for a in accepted)
            ):
                raise CdsError(
                    400,
                    "cds.feedback",
                    f"{where}.acceptedSuggestions [{{id}}] is required for an accepted outcome",
                    f"{where}.acceptedSuggestions",
                )
        reason = fb.get("overrideReason")
        if reason is not None and not isinstance(reason, dict):
            raise CdsError(
                400, "cds.feedback", f"{where}.overrideReason must be an object", f"{where}.overrideReason"
            )
        stamp = _timestamp(fb.get("outcomeTimestamp"), f"{where}.outcomeTimestamp")
        issued = cards.get(card_id)
        if issued is not None and issued.get("service") != service.id:
            raise CdsError(
                400,
                "cds.feedback",
                f"{where}.card {card_id} was issued by service {issued.get('service')!r}, not {service.id!r}",
                f"{where}.card",
            )
        if issued is not None and outcome == "accepted":
            unknown = [a["id"] for a in accepted if a["id"] not in issued.get("suggestions", [])]
            if unknown:
                raise CdsError(
                    400,
                    "cds.feedback",
                    f"{where}.acceptedSuggestions {unknown} are not suggestions of card {card_id}",
                    f"{where}.acceptedSuggestions",
                )
        record: dict[str, Any] = {
            "type": "feedback",
            "recorded_at": now.isoformat(),
            "service": service.id,
            "card": card_id,
            "card_known": issued is not None,
            "outcome": outcome,
            "outcomeTimestamp": stamp,
            "rules": (issued or {}).get("rules", []),
            "findings": (issued or {}).get("findings", []),
            "rulebook": (issued or {}).get("rulebook"),
            "hookInstance": (issued or {}).get("hookInstance"),
        }
        if accepted:
            record["acceptedSuggestions"] = [a.get("id") for a in accepted if isinstance(a, dict)]
        if reason is not None:
            record["overrideReason"] = reason
        if client:
            record["client"] = {k: client[k] for k in ("iss", "sub", "tenant") if k in client}
        out.append(record)
    return out
