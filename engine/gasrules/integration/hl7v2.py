"""HL7 v2 adapter: ORU^R01 (v2.5.1) blood gas results into an engine case.

A small parser of our own, with no third-party dependency: the engine needs only MSH, PID,
OBR, OBX, SPM and NTE, and every problem must name its segment occurrence and field
(``OBX[4]-6``), which a general-purpose library does not report. The parser:

* takes the separators from MSH-1 and MSH-2 (any five characters, not only ``|^~\\&``);
* accepts CR, LF or CRLF between segments, and MLLP framing (``0x0B`` ... ``0x1C 0x0D``);
* splits repetitions, components and subcomponents, then undoes escapes (``\\F\\ \\S\\ \\T\\
  \\R\\ \\E\\``, ``\\Xhh\\``, ``\\.br\\``).

Reading (:func:`case_from_hl7`): OBX-3 LOINC codes (coding system ``LN``, first or alternate
triplet) map to inputs through the rulebook's ``InputSpec.loinc``; OBX-5 (``NM``, ``SN``
without comparator, or ``ST`` when the string is a plain number) with OBX-6 UCUM units goes to the case as ``{"value", "unit"}``; OBX-11
``F``/``C``/``U``/``A`` is used, ``P``/``R``/``S`` is preliminary (left out and reported unless
allowed), ``D``/``W``/``X`` are skipped with a notice. The sample type comes from the LOINC
System axis, SPM-4 (or OBR-15 before v2.5), and the OBR-4 panel code; age from a 30525-0 OBX or
PID-7 on the collection date (OBR-7, SPM-17 or OBX-14). OBX-7 and OBX-8 are kept in
:attr:`Hl7ReadResult.observations` for display; no clinical number is read from them.

:func:`iter_messages` splits a file or stream of many messages; :func:`cases_from_hl7` reads
each one, so a bad message gives a result with errors and never stops the batch.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import date
from typing import Any

from gasrules.integration.standard_codes import (
    PANEL_SPECIMEN,
    SAMPLE_DEFINING_INPUTS,
    SPECIMEN_BY_LOINC,
    CaseBuilder,
    Catalog,
    Issue,
    accepted_units,
    completed_years,
    loinc_index,
    specimen_from_code,
)

__all__ = [
    "Hl7ReadResult",
    "Message",
    "Segment",
    "case_from_hl7",
    "cases_from_hl7",
    "iter_messages",
    "parse_message",
    "unescape",
]

_SEGMENT_NAME = re.compile(r"[A-Z][A-Z0-9]{2}")
_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)")
_TS = re.compile(r"(\d{4})(\d{2})?(\d{2})?(\d{2})?(\d{2})?(\d{2}(\.\d+)?)?([+-]\d{4})?")
_BATCH = ("FHS", "BHS", "BTS", "FTS")
# HL7 table 0085 (OBX-11) -> FHIR Observation.status (interop.md 5.2, V2-to-FHIR ConceptMap).
STATUS_0085 = {
    "F": "final",
    "C": "corrected",
    "U": "final",
    "A": "amended",
    "P": "preliminary",
    "R": "preliminary",
    "S": "preliminary",
    "D": "entered-in-error",
    "W": "entered-in-error",
    "X": "cancelled",
    "I": "registered",
    "O": "registered",
    "N": "registered",
}
NUMERIC_TYPES = ("NM", "SN")
CODED_TYPES = ("CWE", "CE", "CNE", "ST", "ID", "IS")


# ============================================================================ parsing
@dataclass(frozen=True)
class Encoding:
    field: str = "|"
    component: str = "^"
    repetition: str = "~"
    escape: str = "\\"
    subcomponent: str = "&"


def unescape(text: str, enc: Encoding) -> str:
    """Undo HL7 escape sequences. Unknown or unclosed sequences are kept as written."""
    esc = enc.escape
    if not esc or esc not in text:
        return text
    out: list[str] = []
    i = 0
    while i < len(text):
        ch = text[i]
        end = text.find(esc, i + 1) if ch == esc else -1
        if end < 0:
            out.append(ch)
            i += 1
            continue
        seq = text[i + 1 : end]
        simple = {
            "F": enc.field,
            "S": enc.component,
            "T": enc.subcomponent,
            "R": enc.repetition,
            "E": esc,
            ".br": "\n",
            "H": "",
            "N": "",
        }
        if seq in simple:
            out.append(simple[seq])
        elif (
            seq.startswith("X")
            and len(seq) > 1
            and len(seq) % 2 == 1
            and all(c in "0123456789abcdefABCDEF" for c in seq[1:])
        ):
            out.append(bytes.fromhex(seq[1:]).decode("latin-1"))
        else:
            out.append(text[i : end + 1])
        i = end + 1
    return "".join(out)


@dataclass(frozen=True)
class Segment:
    """One segment: its name, its occurrence among segments of that name, its line."""

    name: str
    index: int
    line: int
    fields: tuple[str, ...]  # fields[n] is field n as written (for MSH, fields[1] = MSH-1)

    @property
    def label(self) -> str:
        return f"{self.name}[{self.index}]"

    def at(self, n: int) -> str:
        return f"{self.label}-{n}"

    def raw(self, n: int) -> str:
        return self.fields[n] if n < len(self.fields) else ""


@dataclass(frozen=True)
class Message:
    segments: tuple[Segment, ...]
    encoding: Encoding

    def all(self, name: str) -> list[Segment]:
        return [s for s in self.segments if s.name == name]

    def first(self, name: str) -> Segment | None:
        return next((s for s in self.segments if s.name == name), None)

    def repetitions(self, seg: Segment, n: int) -> list[str]:
        raw = seg.raw(n)
        if seg.name == "MSH" and n in (1, 2):
            return [raw] if raw else []
        return [r for r in raw.split(self.encoding.repetition)] if raw else []

    def get(self, seg: Segment | None, n: int, comp: int = 1, sub: int = 1, rep: int = 1) -> str:
        """Field n, repetition rep, component comp, subcomponent sub, unescaped ('' if absent)."""
        if seg is None:
            return ""
        reps = self.repetitions(seg, n)
        if len(reps) < rep:
            return ""
        if seg.name == "MSH" and n in (1, 2):
            return reps[0]
        comps = reps[rep - 1].split(self.encoding.component)
        if len(comps) < comp:
            return ""
        subs = comps[comp - 1].split(self.encoding.subcomponent)
        return unescape(subs[sub - 1], self.encoding) if len(subs) >= sub else ""


def _lines(text: str) -> list[str]:
    text = text.replace("\x0b", "").replace("\x1c", "")
    return re.split(r"\r\n|\r|\n", text)


def iter_messages(text: str) -> Iterator[str]:
    """Each message of a file or stream, segments joined by CR. Batch envelopes are dropped;
    lines before the first MSH are yielded as one message so the reader can report them."""
    current: list[str] = []
    for line in _lines(text):
        if not line.strip() or line[:3] in _BATCH:
            continue
        if line.startswith("MSH") and current:
            yield "\r".join(current)
            current = []
        current.append(line)
    if current:
        yield "\r".join(current)


def parse_message(text: str) -> tuple[Message | None, list[Issue]]:
    """Split one message into segments. Returns (None, issues) when there is no usable MSH."""
    lines = [(n, line) for n, line in enumerate(_lines(text), 1) if line.strip()]
    if not lines:
        return None, [Issue("message", "hl7.empty", "no HL7 segment found")]
    first_no, first = lines[0]
    if not first.startswith("MSH"):
        return None, [
            Issue(
                f"line {first_no}",
                "hl7.no_msh",
                f"the message starts with {first[:3]!r}; expected an MSH segment",
            )
        ]
    if len(first) < 8 or len(set(first[3:8])) < 5:
        return None, [
            Issue(
                "MSH[1]-2",
                "hl7.bad_msh",
                f"separators {first[3:8]!r} are malformed; expected five distinct characters such as |^~\\&",
            )
        ]
    fs = first[3]
    enc = Encoding(fs, first[4], first[5], first[6], first[7])
    issues: list[Issue] = []
    counts: dict[str, int] = {}
    segments: list[Segment] = []
    for no, line in lines:
        name = line[:3]
        if not _SEGMENT_NAME.fullmatch(name) or (len(line) > 3 and line[3] != fs):
            issues.append(
                Issue(
                    f"line {no}",
                    "hl7.bad_segment",
                    f"{line[:20]!r} is not a segment; expected a three-character name then {fs!r}",
                )
            )
            continue
        parts = line.split(fs)
        fields = (name, fs, *parts[1:]) if name == "MSH" else tuple(parts)
        counts[name] = counts.get(name, 0) + 1
        segments.append(Segment(name, counts[name], no, fields))
    return Message(tuple(segments), enc), issues


# ============================================================================ reading
@dataclass(frozen=True)
class Hl7ReadResult:
    """The case read from one ORU^R01, with every issue and the OBX each input came from."""

    case: dict[str, Any]
    issues: tuple[Issue, ...]
    sources: dict[str, str] = field(default_factory=dict)  # input -> "OBX[3]"
    control_id: str | None = None  # MSH-10
    patient_id: str | None = None  # PID-3, first identifier
    observed_at: str | None = None  # collection time as sent
    observations: tuple[dict[str, Any], ...] = ()  # per OBX: code, value, range...

    @property
    def errors(self) -> list[Issue]:
        return [i for i in self.issues if i.severity == "error"]

    @property
    def ok(self) -> bool:
        return not self.errors


@dataclass
class _Reader:
    msg: Message
    catalog: Catalog
    builder: CaseBuilder
    index: dict[str, str]
    observations: list[dict[str, Any]] = field(default_factory=list)
    times: list[tuple[str, str]] = field(default_factory=list)
    age_given: bool = False

    def issue(self, path: str, code: str, message: str, severity: str = "error") -> None:
        self.builder.issue(path, code, message, severity)

    def header(self) -> bool:
        msh = self.msg.first("MSH")
        kind = (self.msg.get(msh, 9, 1), self.msg.get(msh, 9, 2))
        if kind != ("ORU", "R01"):
            shown = "^".join(k for k in kind if k) or "nothing"
            self.issue("MSH[1]-9", "hl7.message_type", f"message type is {shown}; expected ORU^R01")
            return False
        return True

    def obx(self, seg: Segment) -> None:
        code, name = self.identify(seg)
        vtype = self.msg.get(seg, 2)
        record = {
            "segment": seg.label,
            "loinc": code,
            "input": name,
            "value_type": vtype,
            "value": self.msg.get(seg, 5),
            "units": self.msg.get(seg, 6),
            "reference_range": self.msg.get(seg, 7),
            "abnormal_flags": [
                self.msg.get(seg, 8, rep=r) for r in range(1, len(self.msg.repetitions(seg, 8)) + 1)
            ],
            "status": self.msg.get(seg, 11),
            "observed_at": self.msg.get(seg, 14),
        }
        self.observations.append(record)
        if name is None:
            return
        status = self.msg.get(seg, 11)
        fhir_status = STATUS_0085.get(status, "" if not status else "?")
        if fhir_status == "?":
            self.issue(
                seg.at(11),
                "status.missing",
                f"{name}: unknown result status {status!r}; accepted: "
                f"{', '.join(STATUS_0085)} (HL7 table 0085)",
            )
            return
        if not self.builder.status_allows(fhir_status or None, seg.at(11), name, status):
            return
        if name == "age":
            self.age_given = True
        spec = self.catalog[name]
        if spec.kind == "number":
            self.number(seg, name, vtype)
        else:
            self.coded(seg, name, vtype)
        if name in SAMPLE_DEFINING_INPUTS and code is not None:
            self.builder.claim_specimen(SPECIMEN_BY_LOINC.get(code), seg.at(3), "loinc")
            if self.msg.get(seg, 14):
                self.times.append((seg.at(14), self.msg.get(seg, 14)))

    def identify(self, seg: Segment) -> tuple[str | None, str | None]:
        """(LOINC code, input name); reports codes that are not LOINC or feed no input."""
        triplets = [
            (self.msg.get(seg, 3, 1), self.msg.get(seg, 3, 3)),
            (self.msg.get(seg, 3, 4), self.msg.get(seg, 3, 6)),
        ]
        loinc = [c for c, system in triplets if c and system == "LN"]
        if not loinc:
            shown = self.msg.get(seg, 3, 1) or "nothing"
            self.issue(
                seg.at(3),
                "code.not_loinc",
                f"{shown!r} is not marked as a LOINC code (coding system LN); ignored",
                "warning",
            )
            return None, None
        for code in loinc:
            if code in self.index:
                return code, self.index[code]
        self.issue(
            seg.at(3),
            "code.unknown",
            f"LOINC {', '.join(loinc)} feeds no input of this rulebook; ignored",
            "warning",
        )
        return loinc[0], None

    def single_value(self, seg: Segment, name: str) -> str | None:
        reps = self.msg.repetitions(seg, 5)
        if not reps or not any(r for r in reps):
            self.issue(seg.at(5), "value.missing", f"{name} has no value", "warning")
            return None
        if len(reps) > 1:
            self.issue(
                seg.at(5), "hl7.repetition", f"{name} has {len(reps)} repetitions; one value is expected"
            )
            return None
        return reps[0]

    def number(self, seg: Segment, name: str, vtype: str) -> None:
        if vtype not in NUMERIC_TYPES and vtype != "ST":
            self.issue(
                seg.at(2),
                "hl7.value_type",
                f"value type {vtype or 'missing'!r} for {name}; expected NM or SN (or ST holding a number)",
            )
            return
        if self.single_value(seg, name) is None:
            return
        text = self.msg.get(seg, 5).strip()
        if vtype == "SN":
            comparator, text = self.msg.get(seg, 5, 1), self.msg.get(seg, 5, 2).strip()
            if self.msg.get(seg, 5, 3) or self.msg.get(seg, 5, 4):
                self.issue(
                    seg.at(5), "value.wrong_type", f"{name} is sent as a range or ratio; expected one number"
                )
                return
            if comparator not in ("", "="):
                self.issue(
                    seg.at(5),
                    "value.censored",
                    f"{name} is reported as {comparator}{text}, not an exact value; left out",
                )
                return
        elif text[:1] in "<>":
            self.issue(
                seg.at(5),
                "value.censored",
                f"{name} is reported as {text!r}, not an exact value; left out "
                "(use value type SN for comparators)",
            )
            return
        if not _NUMBER.fullmatch(text):
            sent = " sent as ST" if vtype == "ST" else ""
            self.issue(
                seg.at(5),
                "value.not_a_number",
                f"{name}: {text!r}{sent} is not a number (expected digits with a '.' "
                "decimal point, e.g. 7.31)",
            )
            return
        if vtype == "ST":
            self.issue(
                seg.at(2),
                "hl7.numeric_st",
                f"{name} is sent as ST (string); read as the number it holds",
                "notice",
            )
        value: float | int = float(text) if "." in text else int(text)
        code, system = self.msg.get(seg, 6, 1), self.msg.get(seg, 6, 3)
        unit = self.builder.unit_for(
            name, code or self.msg.get(seg, 6, 2), system.upper() == "UCUM", seg.at(6)
        )
        if unit is not None:
            self.builder.add_number(name, value, unit, seg.label, seg.label)

    def coded(self, seg: Segment, name: str, vtype: str) -> None:
        spec = self.catalog[name]
        if vtype not in CODED_TYPES:
            self.issue(
                seg.at(2),
                "hl7.value_type",
                f"value type {vtype or 'missing'!r} for {name}; expected {', '.join(CODED_TYPES)}",
            )
            return
        if self.single_value(seg, name) is None:
            return
        code, system = self.msg.get(seg, 5, 1), self.msg.get(seg, 5, 3)
        if spec.kind == "flag":
            flags = {"Y": True, "N": False}
            if code not in flags:
                self.issue(
                    seg.at(5), "value.unknown_code", f"{name}: {code!r} is not a yes/no flag; accepted: Y, N"
                )
                return
            self.builder.add_value(name, flags[code], seg.label, seg.label)
            return
        if name == "sample_type":
            known, sample = specimen_from_code(system, code)
            if known:
                self.builder.claim_specimen(sample, seg.at(5), "input", seg.label)
                return
        if code in spec.codes:
            if name == "sample_type":
                self.builder.claim_specimen(code, seg.at(5), "input", seg.label)
            else:
                self.builder.add_value(name, code, seg.label, seg.label)
            return
        self.issue(
            seg.at(5),
            "value.unknown_code",
            f"{name}: {code!r} is not among the accepted codes ({', '.join(spec.codes)})",
        )

    def specimens(self) -> None:
        spms = self.msg.all("SPM")
        for spm in spms:
            self.specimen_code(spm.at(4), self.msg.get(spm, 4, 1), self.msg.get(spm, 4, 3))
        for obr in self.msg.all("OBR"):
            panel = self.msg.get(obr, 4, 1)
            if self.msg.get(obr, 4, 3) == "LN" and panel in PANEL_SPECIMEN:
                self.builder.claim_specimen(PANEL_SPECIMEN[panel], obr.at(4), "loinc")
            if not spms and self.msg.get(obr, 15, 1):
                self.specimen_code(obr.at(15), self.msg.get(obr, 15, 1, 1), self.msg.get(obr, 15, 1, 3))

    def specimen_code(self, where: str, code: str, system: str) -> None:
        if not code:
            return
        known, sample = specimen_from_code(system or None, code)
        if known:
            self.builder.claim_specimen(sample, where, "specimen")
        else:
            self.issue(
                where,
                "specimen.unknown",
                f"specimen type {code!r} ({system or 'no coding system'}) is none of the "
                "blood specimen codes the reader knows (SNOMED CT 122552005, 122555007, "
                "122554006, 119297000; HL7 0487 BLDA, BLDV, BLDC, BLD)",
                "warning",
            )

    def collected(self) -> tuple[str, str] | None:
        for name, n in (("OBR", 7), ("SPM", 17)):
            seg = self.msg.first(name)
            if seg is not None and self.msg.get(seg, n):
                return seg.at(n), self.msg.get(seg, n)
        return self.times[0] if self.times else None

    def age(self) -> None:
        pid = self.msg.first("PID")
        if "age" not in self.catalog or self.age_given or pid is None:
            return
        born = self.msg.get(pid, 7).strip()
        birth = self.date_of(pid.at(7), born) if born else None
        if birth is None:
            return
        when = self.collected()
        if len(born) < 8 or when is None:
            why = (
                "the birth date is not a full date"
                if len(born) < 8
                else "no collection time (OBR-7, SPM-17, OBX-14)"
            )
            self.issue(pid.at(7), "age.not_computed", f"age not computed: {why}", "warning")
            return
        taken = self.date_of(when[0], when[1])
        if taken is not None and "a" in accepted_units(self.catalog["age"]):
            self.builder.add_number("age", completed_years(birth, taken), "a", pid.at(7), pid.label)

    def date_of(self, where: str, text: str) -> date | None:
        m = _TS.fullmatch(text.strip())
        try:
            if m is None:
                raise ValueError(text)
            return date(int(m[1]), int(m[2] or 1), int(m[3] or 1))
        except ValueError:
            self.issue(
                where, "hl7.bad_date", f"{text!r} is not a date/time; expected YYYYMMDD[HHMM[SS]]", "warning"
            )
            return None


def case_from_hl7(text: str, catalog: Catalog, *, allow_preliminary: bool = False) -> Hl7ReadResult:
    """Read one ORU^R01 message into an engine case (MSH-10 becomes the case id)."""
    builder = CaseBuilder(catalog, allow_preliminary=allow_preliminary)
    msg, issues = parse_message(text)
    builder.issues.extend(issues)
    if msg is None:
        return Hl7ReadResult({}, tuple(builder.issues))
    reader = _Reader(msg, catalog, builder, loinc_index(catalog))
    if not reader.header():
        return Hl7ReadResult({}, tuple(builder.issues))
    if not msg.all("OBX"):
        builder.issue("message", "value.missing", "the message has no OBX segment")
    for seg in msg.all("OBX"):
        reader.obx(seg)
    reader.specimens()
    reader.age()
    if len({t for _, t in reader.times}) > 1:
        said = ", ".join(f"{p}: {t}" for p, t in reader.times)
        builder.issue(
            reader.times[0][0],
            "time.mismatch",
            f"the blood gas results carry different collection times ({said})",
            "warning",
        )
    case, sources = builder.build()
    msh = msg.first("MSH")
    control = msg.get(msh, 10) or None
    if control:
        case = {"case_id": control, **case}
    collected = reader.collected()
    return Hl7ReadResult(
        case,
        tuple(builder.issues),
        sources,
        control,
        msg.get(msg.first("PID"), 3) or None,
        collected[1] if collected else None,
        tuple(reader.observations),
    )


def cases_from_hl7(
    text: str, catalog: Catalog, *, allow_preliminary: bool = False
) -> Iterator[Hl7ReadResult]:
    """One result per message of a file or stream, in order; bad messages give errors."""
    for message in iter_messages(text):
        yield case_from_hl7(message, catalog, allow_preliminary=allow_preliminary)


# ============================================================================ writing
LOCAL_SYSTEM = "99GRS"  # HL7 table 0396 local coding system (99zzz): our own codes
_FLAG = {"critical": "AA", "warning": "A"}


def escape(text: str, enc: Encoding = Encoding()) -> str:
    """Escape the separators in a text value (inverse of :func:`unescape`; newlines to .br)."""
    out = text.replace(enc.escape, "\x00E")
    for ch, code in ((enc.field, "F"), (enc.component, "S"), (enc.subcomponent, "T"), (enc.repetition, "R")):
        out = out.replace(ch, f"\x00{code}")
    out = re.sub(r"\r\n|\r|\n", "\x00.br", out)
    return re.sub("\x00(F|S|T|R|E|\\.br)", lambda m: f"{enc.escape}{m[1]}{enc.escape}", out)


def result_to_oru(
    result: dict[str, Any],
    *,
    control_id: str,
    message_time: str,
    patient_id: str | None = None,
    placer_order: str | None = None,
    application: str = "GASRULES",
    facility: str = "GASRULES",
) -> str:
    """One engine result as an ORU^R01 (v2.5.1) carrying the interpretation, segments
    joined by CR. Every OBX is marked preliminary (P): a clinician confirms it.

    ``message_time`` is an HL7 timestamp (YYYYMMDDHHMM[SS]); ``control_id`` goes to MSH-10;
    ``application`` and ``facility`` to MSH-3 and MSH-4 (the ``interfaces:`` settings).
    """
    if not _TS.fullmatch(message_time):
        raise ValueError(f"message_time {message_time!r}: expected YYYYMMDD[HHMM[SS]]")
    rulebook = result.get("rulebook") or {}
    segs = [
        f"MSH|^~\\&|{escape(application)}|{escape(facility)}|||{message_time}||"
        f"ORU^R01^ORU_R01|{escape(control_id)}|P|2.5.1||||||UNICODE UTF-8"
    ]
    if patient_id:
        segs.append(f"PID|1||{escape(patient_id)}")
    report = f"blood-gas-interpretation^Blood gas interpretation^{LOCAL_SYSTEM}"
    segs.append(f"OBR|1|{escape(placer_order or '')}||{report}|||{message_time}" + "|" * 18 + "P")
    obx: list[tuple[str, str, str, str, str]] = [
        ("ST", report, escape(str(result.get("headline") or "")), "", "")
    ]
    qualifiers = result.get("qualifiers") or {}
    from gasrules.integration.terminology import disorder_snomed, value_loinc

    for d in result.get("disorders") or []:
        label = d.replace("_", " ") + (f" ({qualifiers[d]})" if d in qualifiers else "")
        value = f"{escape(d)}^{escape(label)}^{LOCAL_SYSTEM}"
        concept = disorder_snomed(d)
        if concept is not None:  # SNOMED CT first, our own code as the alternate triplet
            value = f"{concept.code}^{escape(concept.display)}^SCT^" + value
        obx.append(("CWE", f"disorder^Disorder^{LOCAL_SYSTEM}", value, "", ""))
    for f in result.get("findings") or []:
        obx.append(
            (
                "ST",
                f"{escape(str(f['code']))}^^{LOCAL_SYSTEM}",
                escape(str(f.get("text") or "")),
                "",
                _FLAG.get(str(f.get("severity")), ""),
            )
        )
    units = result.get("units") or {}
    for name, value in (result.get("values") or {}).items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value != value:
            continue
        unit = units.get(name) or ""
        ident = f"{escape(name)}^^{LOCAL_SYSTEM}"
        loinc = value_loinc(name)
        if loinc is not None:  # LOINC first, our own code as the alternate triplet
            ident = f"{loinc.code}^{escape(loinc.display)}^LN^" + ident
        obx.append(("NM", ident, repr(value), f"{escape(unit)}^^UCUM" if unit else "", ""))
    for n, (vtype, ident, value, unit, flag) in enumerate(obx, 1):
        segs.append(f"OBX|{n}|{vtype}|{ident}||{value}|{unit}||{flag}|||P")
    notes = [
        f"Rulebook {rulebook.get('id')} {rulebook.get('version')} sha256:"
        f"{rulebook.get('sha256')}; engine {result.get('engine_version')}; "
        f"status {result.get('status')}"
    ]
    notes += [f"Input error in {e.get('field')}: {e.get('message')}" for e in result.get("errors") or []]
    notes += [f"Not assessed: {n.get('what')} ({n.get('why')})" for n in result.get("not_assessed") or []]
    notes += [str(c) for c in result.get("cautions") or []]
    segs += [f"NTE|{i}|L|{escape(t)}" for i, t in enumerate(notes, 1)]
    return "\r".join(segs) + "\r"
