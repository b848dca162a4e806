"""Cases in from HL7 v2 and FHIR files, results out as FHIR or HL7 v2: the shared stage behind
``gasrules interpret``, ``gasrules batch`` and ``gasrules listen``.

Case boundaries (what counts as one case):

* **HL7 v2** (``.hl7``, or ``--input-format hl7``): one ORU^R01 message is one case, whether the
  file holds MLLP frames (``0x0B`` ... ``0x1C 0x0D``) or plain text split at each MSH (CR, LF
  or CRLF between segments; FHS/BHS/BTS/FTS batch envelopes dropped). Bytes are decoded by
  each message's MSH-18 (:mod:`gasrules.integration.hl7wire`). MSH-10 becomes the case id.
* **FHIR R4** (a ``.json`` file whose top-level object has a ``resourceType``, or
  ``--input-format fhir``): a Bundle, one Observation, or a JSON list of resources is one
  case; a JSON list of Bundles is one case per Bundle; a JSON Lines file of Bundles is one case
  per line.

A message or Bundle whose reading has errors becomes a **rejected** case naming every error
(``OBX[4]-5: ...``), never a partly read one; warnings and notices go with the case
(:attr:`Incoming.issues`). N messages in, N results out, in order.

Writing: :func:`to_fhir` (a FHIR Bundle per result, with an OperationOutcome carrying the
reading issues) and :func:`to_hl7` (a preliminary ORU^R01 per result, MSH-3/MSH-4 from the
``interfaces:`` settings section).

Settings (``interfaces:`` section of a settings file; every key optional)::

    interfaces:
      application: GASRULES          # MSH-3 of the messages we send
      facility: GASRULES             # MSH-4 of the messages we send (the sending facility)
      codesystem_url: https://gasrules.example/fhir/CodeSystem   # project CodeSystem base
      listen: {...}                  # `gasrules listen` (gasrules.integration.mllp)
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from gasrules.evaluation.evaluator import UNREADABLE
from gasrules.integration.standard_codes import Issue

__all__ = [
    "INPUT_FORMATS",
    "Incoming",
    "InterfaceSettings",
    "input_format",
    "interfaces_section",
    "read_incoming",
    "to_fhir",
    "to_hl7",
]

INPUT_FORMATS = ("json", "jsonl", "hl7", "fhir")
DEFAULT_CODESYSTEM_URL = "https://gasrules.example/fhir/CodeSystem"


@dataclass(frozen=True)
class InterfaceSettings:
    application: str = "GASRULES"
    facility: str = "GASRULES"
    codesystem_url: str = DEFAULT_CODESYSTEM_URL
    listen: Mapping[str, Any] = field(default_factory=dict)


def interfaces_section(file: str | os.PathLike[str] | None) -> InterfaceSettings:
    """The checked ``interfaces:`` section of a settings file (defaults without one)."""
    from gasrules.governance.settings import SettingsError

    if file is None:
        return InterfaceSettings()
    from gasrules.rulebook.loader import load_document

    doc, problems = load_document(Path(file))
    if problems or doc is None:
        first = problems[0] if problems else None
        raise SettingsError(
            "--settings",
            first.message if first else "cannot read the file",
            "a readable YAML mapping",
            str(first.location) if first else str(file),
        )
    data = doc.data if isinstance(doc.data, dict) else {}
    section = data.get("interfaces") or {}
    if not isinstance(section, dict):
        raise SettingsError(
            "interfaces",
            "expected a mapping",
            "application, facility, codesystem_url, listen",
            str(doc.locate(("interfaces",))),
        )
    values: dict[str, Any] = {}
    for key, value in section.items():
        where = str(doc.locate(("interfaces", key)))
        if key in ("application", "facility", "codesystem_url"):
            if not isinstance(value, str) or not value.strip() or "|" in value or "^" in value:
                raise SettingsError(
                    f"interfaces.{key}",
                    f"{value!r} is not usable",
                    "a non-empty string without | or ^",
                    where,
                )
            if key == "codesystem_url" and not value.startswith(("http://", "https://")):
                raise SettingsError(
                    "interfaces.codesystem_url", f"{value!r} is not a URL", "an absolute http(s) URL", where
                )
            values[key] = value.strip().rstrip("/") if key == "codesystem_url" else value.strip()
        elif key == "listen":
            from gasrules.integration.mllp import listen_settings

            values["listen"] = listen_settings(value, doc, Path(file).parent)
        else:
            raise SettingsError(
                f"interfaces.{key}", "unknown setting", "application, facility, codesystem_url, listen", where
            )
    return InterfaceSettings(**values)


# ============================================================================ reading
@dataclass(frozen=True)
class Incoming:
    """One case read from a message or Bundle, ready for the engine, with its provenance."""

    case: dict[str, Any]  # rejected (UNREADABLE) when reading had errors
    issues: tuple[Issue, ...] = ()
    kind: str = "json"  # json | hl7 | fhir
    refs: Mapping[str, str] = field(default_factory=dict)  # input -> FHIR reference
    subject: str | None = None
    effective: str | None = None
    control_id: str | None = None  # HL7 MSH-10
    patient_id: str | None = None  # HL7 PID-3

    @property
    def errors(self) -> list[Issue]:
        return [i for i in self.issues if i.severity == "error"]


def input_format(path: str, option: str | None = None) -> str:
    """The input format from ``option`` or the file: .hl7 is HL7 v2; a .json/.jsonl whose
    first object has a resourceType is FHIR; other .json is JSON, .jsonl/.ndjson JSON Lines."""
    if option is not None:
        if option not in INPUT_FORMATS:
            raise ValueError(f"input format {option!r}; accepted: {', '.join(INPUT_FORMATS)}")
        return option
    suffix = Path(path).suffix.lower()
    if suffix in (".hl7", ".hl7v2", ".mllp"):
        return "hl7"
    if path != "-" and suffix in (".json", ".jsonl", ".ndjson") and _looks_fhir(Path(path)):
        return "fhir"
    return "jsonl" if suffix in (".jsonl", ".ndjson") else "json"


def _looks_fhir(path: Path) -> bool:
    try:
        with path.open("rb") as f:
            head = f.read(4096)
    except OSError:
        return False
    return b'"resourceType"' in head


def _rejected(issues: Iterable[Issue], case_id: str | None) -> dict[str, Any]:
    errors = [i for i in issues if i.severity == "error"]
    case: dict[str, Any] = {UNREADABLE: "; ".join(f"{i.path}: {i.message}" for i in errors)}
    if case_id:
        case["case_id"] = case_id
    return case


def read_hl7_bytes(
    data: bytes, catalog: Any, where: str = "", allow_preliminary: bool = False
) -> Iterator[Incoming]:
    """One :class:`Incoming` per message in ``data`` (MLLP-framed or plain)."""
    from gasrules.integration.hl7wire import split_raw

    for n, raw in enumerate(split_raw(data), 1):
        yield incoming_from_hl7(raw, catalog, f"{where}message {n}", allow_preliminary=allow_preliminary)


def incoming_from_hl7(
    raw: bytes, catalog: Any, label: str = "message", allow_preliminary: bool = False
) -> Incoming:
    from gasrules.integration.hl7v2 import case_from_hl7
    from gasrules.integration.hl7wire import decode, raw_header

    text, problem = decode(raw)
    if text is None:
        header = raw_header(raw)
        control = header.raw(10) if header else None
        return Incoming(
            _rejected([problem], control),
            (problem,),
            "hl7",  # type: ignore[list-item]
            control_id=control,
        )
    read = case_from_hl7(text, catalog, allow_preliminary=allow_preliminary)
    case = read.case if read.ok else _rejected(read.issues, read.control_id or label)
    return Incoming(
        case,
        read.issues,
        "hl7",
        {},
        control_id=read.control_id,
        patient_id=read.patient_id,
        effective=fhir_datetime(read.observed_at),
    )


def fhir_datetime(ts: str | None) -> str | None:
    """An HL7 v2 timestamp as a FHIR dateTime: with its time only when it carries a time
    zone (FHIR requires one with a time), else the date alone; None when unreadable."""
    import re

    m = re.fullmatch(
        r"(\d{4})(\d{2})?(\d{2})?(?:(\d{2})(\d{2})(\d{2})?(?:\.\d+)?)?"
        r"([+-]\d{4})?",
        (ts or "").strip(),
    )
    if m is None:
        return None
    year, month, day, hh, mm, ss, zone = m.groups()
    date = "-".join(x for x in (year, month, day if month else None) if x)
    if hh is None or zone is None or day is None:
        return date
    return f"{date}T{hh}:{mm}:{ss or '00'}{zone[:3]}:{zone[3:]}"


def read_fhir_text(
    text: str, catalog: Any, where: str = "", allow_preliminary: bool = False
) -> Iterator[Incoming]:
    """One :class:`Incoming` per case of a FHIR JSON or JSON Lines text (see module doc)."""
    stripped = text.strip()
    try:
        docs: list[Any] = [json.loads(stripped)]
    except json.JSONDecodeError:
        docs = []
        for n, line in enumerate(stripped.splitlines(), 1):
            if not line.strip():
                continue
            try:
                docs.append(json.loads(line))
            except json.JSONDecodeError as exc:
                issue = Issue(
                    f"{where}line {n}", "json.invalid", f"not valid JSON: {exc.msg} at column {exc.colno}"
                )
                docs.append(issue)
    if (
        len(docs) == 1
        and isinstance(docs[0], list)
        and docs[0]
        and all(isinstance(d, dict) and d.get("resourceType") == "Bundle" for d in docs[0])
    ):
        docs = docs[0]
    for doc in docs:
        yield incoming_from_fhir(doc, catalog, allow_preliminary)


def incoming_from_fhir(doc: Any, catalog: Any, allow_preliminary: bool = False) -> Incoming:
    from gasrules.integration.fhir import case_from_fhir

    if isinstance(doc, Issue):
        return Incoming(_rejected([doc], None), (doc,), "fhir")
    read = case_from_fhir(doc, catalog, allow_preliminary=allow_preliminary)
    refs = {k: v for k, v in read.sources.items() if "/" in v or v.startswith("urn:")}
    case_id = read.case.get("case_id") if isinstance(read.case, dict) else None
    case = read.case if read.ok else _rejected(read.issues, case_id)
    return Incoming(case, read.issues, "fhir", refs, read.subject, read.effective)


def read_incoming(source: str, fmt: str, catalog: Any, allow_preliminary: bool = False) -> Iterator[Incoming]:
    """Cases of an HL7 v2 or FHIR file (``-``: standard input). Raises OSError."""
    import sys

    if fmt == "hl7":
        data = sys.stdin.buffer.read() if source == "-" else Path(source).read_bytes()
        yield from read_hl7_bytes(data, catalog, allow_preliminary=allow_preliminary)
        return
    text = sys.stdin.read() if source == "-" else Path(source).read_text(encoding="utf-8")
    yield from read_fhir_text(text, catalog, allow_preliminary=allow_preliminary)


# ============================================================================ writing
def to_fhir(
    result: dict[str, Any], incoming: Incoming | None, rulebook: Any, codesystem_url: str | None = None
) -> dict[str, Any]:
    """A FHIR Bundle for one result; reading issues become an OperationOutcome entry."""
    import uuid

    from gasrules.integration.fhir import result_to_fhir

    inc = incoming or Incoming({})
    bundle = result_to_fhir(
        result,
        inc.refs,
        rulebook_info=result.get("rulebook") or rulebook,
        subject=inc.subject,
        effective=inc.effective,
        **({"codesystem_url": codesystem_url} if codesystem_url else {}),
    )
    if inc.issues:
        severity = {"error": "error", "warning": "warning", "notice": "information"}
        bundle["entry"].append(
            {
                "fullUrl": f"urn:uuid:{uuid.uuid4()}",
                "resource": {
                    "resourceType": "OperationOutcome",
                    "issue": [
                        {
                            "severity": severity[i.severity],
                            "code": "not-supported" if i.code.startswith("code.") else "invalid",
                            "details": {"text": i.message},
                            "diagnostics": i.code,
                            "expression": [i.path],
                        }
                        for i in inc.issues
                    ],
                },
            }
        )
    return bundle


def hl7_timestamp(now: datetime | None = None) -> str:
    return (now or datetime.now(UTC)).strftime("%Y%m%d%H%M%S")


def to_hl7(
    result: dict[str, Any],
    incoming: Incoming | None,
    settings: InterfaceSettings,
    control_id: str,
    now: datetime | None = None,
) -> str:
    """A preliminary ORU^R01 for one result (segments joined by CR)."""
    from gasrules.integration.hl7v2 import result_to_oru

    inc = incoming or Incoming({})
    return result_to_oru(
        result,
        control_id=control_id,
        message_time=hl7_timestamp(now),
        patient_id=inc.patient_id,
        placer_order=inc.control_id,
        application=settings.application,
        facility=settings.facility,
    )
