"""HL7 v2 on the wire: MLLP framing, MSH-18 character sets, acknowledgements.

* **MLLP** frames a message as ``0x0B`` message ``0x1C 0x0D``. :class:`MllpDecoder` takes bytes
  as they arrive (a frame split over many reads, or many frames in one read) and returns the
  complete frames; bytes outside a frame are counted and dropped.
* **Character sets**: a message is bytes until MSH-18 says how to read them. :func:`decode`
  reads MSH-18 (first repetition; HL7 table 0211) from the ASCII header and decodes the whole
  message with it; without MSH-18 the bytes must be ASCII (UTF-8 is accepted too). An unknown
  character set, or bytes that are not valid in the declared one, is an :class:`Issue` at
  ``MSH[1]-18``.
* **Acknowledgements** (original mode): :func:`ack` builds ``MSH``, ``MSA`` (MSA-1 ``AA``,
  ``AE`` or ``AR``; MSA-2 the message's MSH-10) and one ``ERR`` per error, with the error's
  segment, occurrence and field in ERR-2 and an HL7 table 0357 code in ERR-3.

:func:`split_raw` splits a file's bytes into messages (MLLP-framed or plain, CR, LF or CRLF).
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

from gasrules.integration.standard_codes import Issue

__all__ = ["CHARSETS", "MllpDecoder", "RawHeader", "ack", "decode", "frame", "raw_header", "split_raw"]

VT, FS, CR = b"\x0b", b"\x1c", b"\x0d"

# HL7 table 0211 (MSH-18) -> Python codec. Only single-byte sets and byte-oriented multi-byte
# sets whose bytes never collide with the MLLP frame characters are accepted.
CHARSETS = {
    "ASCII": "ascii",
    "UNICODE UTF-8": "utf-8",
    **{f"8859/{n}": f"iso8859-{n}" for n in (1, 2, 3, 4, 5, 6, 7, 8, 9, 15)},
    "GB 18030-2000": "gb18030",
    "BIG-5": "big5",
}

# HL7 table 0357 (message error condition codes) used in ERR-3.
ERR_DATA_TYPE = ("102", "Data type error")
ERR_TABLE_VALUE = ("103", "Table value not found")
ERR_REQUIRED = ("101", "Required field missing")
ERR_SEGMENT = ("100", "Segment sequence error")
ERR_MESSAGE_TYPE = ("200", "Unsupported message type")
ERR_INTERNAL = ("207", "Application internal error")
_ERR_BY_CODE = {
    "hl7.value_type": ERR_DATA_TYPE,
    "value.not_a_number": ERR_DATA_TYPE,
    "value.wrong_type": ERR_DATA_TYPE,
    "unit.unknown": ERR_TABLE_VALUE,
    "status.missing": ERR_TABLE_VALUE,
    "value.missing": ERR_REQUIRED,
    "hl7.no_msh": ERR_SEGMENT,
    "hl7.bad_segment": ERR_SEGMENT,
    "hl7.message_type": ERR_MESSAGE_TYPE,
    "hl7.no_control_id": ERR_REQUIRED,
}
_PATH = re.compile(r"(?P<seg>[A-Z][A-Z0-9]{2})\[(?P<seq>\d+)\](?:-(?P<field>\d+))?")


# ============================================================================ framing
def frame(message: bytes) -> bytes:
    """One MLLP frame."""
    return VT + message + FS + CR


class MllpDecoder:
    """Incremental MLLP deframer: ``feed(data)`` returns the frames completed by ``data``."""

    def __init__(self, max_frame: int) -> None:
        self.max_frame = max_frame
        self._buf = bytearray()
        self._in_frame = False
        self.dropped = 0  # bytes seen outside any frame

    def feed(self, data: bytes) -> list[bytes]:
        frames: list[bytes] = []
        for byte in memoryview(data).cast("B"):
            if not self._in_frame:
                if byte == 0x0B:
                    self._in_frame, self._buf = True, bytearray()
                elif byte not in (0x0D, 0x0A):
                    self.dropped += 1
                continue
            if byte == 0x1C:  # end of block; the CR after it is skipped as outside
                frames.append(bytes(self._buf))
                self._in_frame = False
            elif byte == 0x0B:  # a new start inside a frame: the old one was broken
                self.dropped += len(self._buf)
                self._buf = bytearray()
            else:
                self._buf.append(byte)
                if len(self._buf) > self.max_frame:
                    raise ValueError(f"an MLLP frame exceeds {self.max_frame} bytes")
        return frames


def split_raw(data: bytes) -> Iterator[bytes]:
    """Each message of a file: MLLP frames when the data has any, else text split at each MSH
    (CR, LF or CRLF between segments; batch envelopes FHS/BHS/BTS/FTS dropped)."""
    if VT in data and FS in data:
        decoder = MllpDecoder(max_frame=len(data))
        yield from decoder.feed(data)
        return
    current: list[bytes] = []
    for line in re.split(rb"\r\n|\r|\n", data):
        if not line.strip() or line[:3] in (b"FHS", b"BHS", b"BTS", b"FTS"):
            continue
        if line.startswith(b"MSH") and current:
            yield b"\r".join(current)
            current = []
        current.append(line)
    if current:
        yield b"\r".join(current)


# ============================================================================ MSH and charsets
@dataclass(frozen=True)
class RawHeader:
    """MSH fields read from the bytes before decoding (the header is ASCII in every charset)."""

    fields: tuple[str, ...]  # fields[n] is MSH-n (fields[1] the field separator)

    def raw(self, n: int) -> str:
        return self.fields[n] if n < len(self.fields) else ""

    def get(self, n: int, component: int = 1) -> str:
        value = self.raw(n)
        if n <= 2:
            return value
        parts = value.split(self.fields[2][:1] or "^")
        return parts[component - 1] if component <= len(parts) else ""


def raw_header(message: bytes) -> RawHeader | None:
    """MSH of ``message`` (latin-1 view: one character per byte), or None without one."""
    first = re.split(rb"\r\n|\r|\n", message.lstrip(), maxsplit=1)[0]
    if not first.startswith(b"MSH") or len(first) < 8:
        return None
    text = first.decode("latin-1")
    parts = text.split(text[3])
    return RawHeader(("MSH", text[3], *parts[1:]))


def charset_name(header: RawHeader) -> str:
    """MSH-18, first repetition, trimmed ('' when absent)."""
    raw = header.get(18)
    rep = header.get(2)[1:2] or "~"
    return raw.split(rep)[0].strip()


def decode(message: bytes) -> tuple[str | None, Issue | None]:
    """(text, None), or (None, issue at MSH-18) when the bytes cannot be read as declared."""
    header = raw_header(message)
    name = charset_name(header) if header else ""
    if not name:
        try:
            return message.decode("utf-8"), None
        except UnicodeDecodeError as exc:
            return None, Issue(
                "MSH[1]-18",
                "hl7.charset",
                f"byte {message[exc.start]:#04x} at offset {exc.start} is not "
                "ASCII and MSH-18 names no character set; accepted in MSH-18: " + ", ".join(CHARSETS),
            )
    codec = CHARSETS.get(name.upper())
    if codec is None:
        return None, Issue(
            "MSH[1]-18",
            "hl7.charset",
            f"character set {name!r} is not supported; accepted: " + ", ".join(CHARSETS),
        )
    try:
        return message.decode(codec), None
    except UnicodeDecodeError as exc:
        return None, Issue(
            "MSH[1]-18",
            "hl7.charset",
            f"byte {message[exc.start]:#04x} at offset {exc.start} is not valid {name}",
        )


# ============================================================================ acknowledgements
def _esc(text: str) -> str:
    from gasrules.integration.hl7v2 import escape

    return escape(text)


def err_segment(issue: Issue) -> str:
    """ERR for one issue: ERR-2 location, ERR-3 table 0357 code, ERR-4 E, ERR-8 the message."""
    m = _PATH.fullmatch(issue.path)
    location = f"{m['seg']}^{m['seq']}^{m['field'] or ''}".rstrip("^") if m else ""
    code, text = _ERR_BY_CODE.get(issue.code, ERR_INTERNAL)
    severity = {"error": "E", "warning": "W", "notice": "I"}[issue.severity]
    return f"ERR||{location}|{code}^{text}^HL70357|{severity}||||{_esc(f'{issue.code}: {issue.message}')}"


def ack(
    code: str,
    header: RawHeader | None,
    *,
    control_id: str,
    timestamp: str,
    application: str,
    facility: str,
    errors: Sequence[Issue] = (),
) -> str:
    """An original-mode ACK (segments joined by CR). ``code`` is AA, AE or AR."""
    if code not in ("AA", "AE", "AR"):
        raise ValueError(f"acknowledgement code {code!r}: expected AA, AE or AR")
    empty = RawHeader(("MSH", "|", "^~\\&"))
    header_ = header if header is not None else empty
    get, raw = header_.get, header_.raw
    trigger = get(9, 2)
    version = get(12) or "2.5.1"
    processing = get(11) or "P"
    charset = charset_name(header) if header is not None else ""
    msh = (
        f"MSH|^~\\&|{_esc(application)}|{_esc(facility)}|{raw(3)}|{raw(4)}|{timestamp}||"
        f"ACK{'^' + trigger if trigger else ''}^ACK|{_esc(control_id)}|{processing}|"
        f"{version}"
    )
    if charset:
        msh += f"||||||{charset}"
    segs = [msh, f"MSA|{code}|{raw(10)}"]
    segs += [err_segment(i) for i in errors]
    return "\r".join(segs) + "\r"


def encoding_of(header: RawHeader | None) -> str:
    """The codec to write a reply in: the message's own character set, else ASCII."""
    name = charset_name(header).upper() if header is not None else ""
    return CHARSETS.get(name, "ascii")
