"""CSV records from bytes, never half-read: the reading stage under :mod:`gasrules.tables.readers`.

* Encoding: UTF-8, with or without a byte-order mark; a UTF-16 file is refused at once. A row
  holding bytes that are not UTF-8 is rejected (naming the cell); the rows around it are read.
* Delimiter: comma, semicolon or tab, whichever the header line uses most (outside quotes). A
  header that collapses into one column while the first row holds one of those delimiters is
  refused: the file was written with another delimiter than its header.
* Size: a record (a quoted field may span lines) longer than ``field_limit`` bytes (default
  1 MB) is rejected as one row and skipped without being kept in memory; the next record is read.

Each record is a :class:`Record` with its first physical line and either its fields or the
reason it cannot be read.
"""

from __future__ import annotations

import csv
from collections.abc import Iterator
from dataclasses import dataclass
from typing import BinaryIO

from gasrules.core.errors import EngineError

__all__ = ["DELIMITERS", "FIELD_LIMIT", "CsvHeaderError", "Record", "read_records"]

FIELD_LIMIT = 1_048_576
DELIMITERS = (",", ";", "\t")
_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}


class CsvHeaderError(EngineError, ValueError):
    """The file or its header cannot be read at all: (line, message, expected)."""

    def __init__(self, line: int, message: str, expected: str = "") -> None:
        self.line, self.message, self.expected = line, message, expected
        super().__init__(message)


@dataclass(slots=True)
class Record:
    line: int  # first physical line of the record (1-based)
    fields: list[str] | None  # None when the record cannot be read
    error: str = ""


def _quote_state(line: bytes, inside: bool, delimiter: int) -> bool:
    """Whether a quoted field is still open at the end of ``line``. A quote opens a field only
    at its start (as the csv module reads it): ``5'11"`` in an unquoted field is text."""
    at_start = not inside
    i, n = 0, len(line)
    while i < n:
        c = line[i]
        if inside:
            if c == 34:  # '"'
                if i + 1 < n and line[i + 1] == 34:
                    i += 1  # an escaped quote
                else:
                    inside, at_start = False, False
        elif c == 34 and at_start:
            inside = True
        else:
            at_start = c == delimiter or c in (10, 13)
        i += 1
    return inside


def _raw_records(f: BinaryIO, limit: int, delimiter: list[int]) -> Iterator[tuple[int, bytes | None, int]]:
    """(first line, record bytes or None when too long, byte size) for each logical record:
    physical lines joined while a quoted field is open. ``delimiter`` holds the delimiter's
    byte (set once the header is known)."""
    line_no = 0
    parts: list[bytes] = []
    size = 0
    inside = False
    start = 1
    too_long = False
    for raw in f:
        line_no += 1
        if not parts and not too_long:
            start = line_no
        if inside or b'"' in raw:
            inside = _quote_state(raw, inside, delimiter[0])
        size += len(raw)
        if size > limit:
            too_long, parts = True, []
        elif not too_long:
            parts.append(raw)
        if not inside:
            yield start, (None if too_long else b"".join(parts)), size
            parts, size, too_long = [], 0, False
    if parts or too_long:
        yield start, (None if too_long else b"".join(parts)), size


def _strip_eol(data: bytes) -> bytes:
    if data.endswith(b"\r\n"):
        return data[:-2]
    return data[:-1] if data.endswith((b"\n", b"\r")) else data


def _outside_quotes(text: str) -> str:
    out, inside = [], False
    for ch in text:
        if ch == '"':
            inside = not inside
        elif not inside:
            out.append(ch)
    return "".join(out)


def sniff_delimiter(header: str) -> str:
    bare = _outside_quotes(header)
    counts = {d: bare.count(d) for d in DELIMITERS}
    best = max(DELIMITERS, key=lambda d: (counts[d], d == ","))
    return best if counts[best] else ","


def _parse(data: bytes, delimiter: str) -> tuple[list[str] | None, str]:
    text = _strip_eol(data).decode("utf-8", "surrogateescape")
    try:
        fields = next(csv.reader([text], delimiter=delimiter, strict=False), [])
    except csv.Error as exc:
        return None, f"not valid CSV: {exc}"
    for i, cell in enumerate(fields, start=1):
        try:
            cell.encode("utf-8")
        except UnicodeEncodeError as exc:
            bad = cell[exc.start].encode("utf-8", "surrogateescape")[0]
            return None, f"cell {i} holds byte 0x{bad:02x}, which is not UTF-8"
    return fields, ""


def read_records(
    f: BinaryIO,
    field_limit: int = FIELD_LIMIT,
) -> tuple[str, list[str], Iterator[Record], CsvHeaderError | None]:
    """(delimiter, header fields, the data records, the header's collapse into one column or
    None). Raises CsvHeaderError for a file that is UTF-16 or whose header cannot be read; the
    caller raises the collapse after checking the header's names (a more precise message)."""
    csv.field_size_limit(max(csv.field_size_limit(), field_limit + 1))
    head = f.peek(4)[:4]  # type: ignore[attr-defined]
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise CsvHeaderError(1, "the file is UTF-16", "a UTF-8 CSV file (with or without a byte-order mark)")
    if head.startswith(b"\xef\xbb\xbf"):
        f.read(3)
    holder = [ord(",")]
    records = _raw_records(f, field_limit, holder)
    first = next(records, None)
    if first is None:
        return ",", [], iter(()), None
    line, data, size = first
    if data is None:
        raise CsvHeaderError(line, f"the header is longer than the limit of {field_limit} bytes")
    try:
        header_text = _strip_eol(data).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise CsvHeaderError(
            line, f"the header holds byte 0x{data[exc.start]:02x}, which is not UTF-8", "a UTF-8 header"
        ) from None
    delimiter = sniff_delimiter(header_text)
    holder[0] = ord(delimiter)
    header, why = _parse(data, delimiter)
    if header is None:
        raise CsvHeaderError(line, f"unreadable header: {why}")
    peeked = next(records, None)
    collapsed = None
    if len(header) == 1 and peeked is not None and peeked[1] is not None:
        bare = _outside_quotes(_strip_eol(peeked[1]).decode("utf-8", "replace"))
        used = [d for d in DELIMITERS if d in bare]
        if used:
            collapsed = CsvHeaderError(
                line,
                f"the header is one column but line {peeked[0]} holds {_NAMES[used[0]]} delimiters",
                "a header written with the same delimiter as the rows (comma, semicolon or tab)",
            )
    return delimiter, header, _records(peeked, records, delimiter, field_limit), collapsed


def _records(
    peeked: tuple[int, bytes | None, int] | None,
    records: Iterator[tuple[int, bytes | None, int]],
    delimiter: str,
    limit: int,
) -> Iterator[Record]:
    def one(item: tuple[int, bytes | None, int]) -> Record | None:
        line, data, size = item
        if data is None:
            return Record(line, None, f"a field or row longer than the limit of {limit} bytes ({size} bytes)")
        if not data.strip(b"\r\n"):
            return None  # a blank line is not a row
        fields, why = _parse(data, delimiter)
        return Record(line, fields, why)

    if peeked is not None:
        rec = one(peeked)
        if rec is not None:
            yield rec
    for item in records:
        rec = one(item)
        if rec is not None:
            yield rec
