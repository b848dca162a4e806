"""Tables in and out: streaming readers and writers for CSV, JSON Lines and Parquet.

Shared by ``gasrules batch`` and ``gasrules impact``. Reading turns each input row into a
:class:`Row` (a case in the engine contract plus the row's untouched pass-through columns);
writing puts flat records into a temporary file beside the target and renames it at the end,
so a killed run never leaves a file that looks complete.

Reading (one pass, constant memory)::

    layout = analytes_of(rb)                       # input name -> accepted units
    with open_table(path, layout, mapping=load_mapping(m) if m else None) as table:
        table.passthrough                          # pass-through column names, in input order
        for row in table:                          # Row(index, where, case, passthrough, errors)
            result = interpret_row(rb, row)        # rejected inline when the row is malformed

Column mapping (CSV and Parquet columns, JSON Lines keys), by name:

* a column named like an input of the rulebook (``pco2``, ``PCO2``) is that input, in its
  canonical unit; a unit in the header picks another accepted unit: ``pco2[kPa]`` or
  ``pco2 (kPa)``; ``case_id`` is the case id;
* a mapping file (YAML or JSON) names the rest: ``columns: {"PaCO2 kPa": {input: pco2, unit:
  kPa}, "Sodium": na, "Lab no": case_id}`` and, for JSON Lines, ``passthrough: [ward, bed]``;
* every other CSV/Parquet column is passed through untouched (written back as it came, and
  carried to the engine in the case's ``context``). A JSON Lines object is a case in the
  engine contract: its ``context`` is passed through; any other unknown key is left in the
  case, and the engine rejects it naming the key (listed ``passthrough`` keys excepted).

A header that cannot be used (unknown unit, two columns for one input) raises
:class:`TableError` before any row is read. A row that cannot be read (wrong number of CSV
fields, a JSON Lines line that is not JSON) is never dropped: its :class:`Row` carries
``errors`` and :func:`interpret_row` returns a rejected result for it. Blank lines are not rows.

Writing::

    with open_writer(out, columns, fmt="parquet") as w:   # columns: list[Column]
        w.write(records)                                  # dicts keyed by column name
    # renamed into place on a clean exit; the temporary file is removed on an exception

pyarrow is imported only when Parquet is read or written.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import re
import sys
from dataclasses import dataclass, field
from datetime import date, datetime, time
from decimal import Decimal
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

from . import units as U

__all__ = [
    "FORMATS", "Column", "ColumnMapping", "Row", "Table", "TableError", "TableWriter",
    "analytes_of", "detect_format", "interpret_row", "load_mapping", "open_table",
    "open_writer", "parquet_files", "rejected_result", "temp_path_for",
]

FORMATS = ("csv", "jsonl", "parquet")
_SUFFIXES = {".csv": "csv", ".jsonl": "jsonl", ".ndjson": "jsonl",
             ".json": "jsonl", ".parquet": "parquet", ".pq": "parquet"}
_HEADER_UNIT = re.compile(r"^\s*(?P<name>[^\[\(]*?)\s*(?:\[(?P<u1>.+)\]|\((?P<u2>.+)\))\s*$")
_ROLES = ("case_id", "pass")
READ_BATCH = 4096          # Parquet rows decoded at a time


class TableError(ValueError):
    """A file, header or mapping that cannot be used at all. ``where`` names the place."""

    def __init__(self, where: str, message: str, expected: str = "") -> None:
        self.where, self.message, self.expected = where, message, expected
        text = f"{where}: {message}" + (f" (expected {expected})" if expected else "")
        super().__init__(text)


# ----------------------------------------------------------------------------- rows

@dataclass(slots=True)
class Row:
    """One input row. ``case`` is in the engine's case contract; ``passthrough`` maps the
    non-analyte columns to their values exactly as read; ``errors`` (result-contract error
    dicts) is non-empty only when the row itself could not be read."""

    index: int                       # 0-based position among the rows of the input
    where: str                       # "file.csv:17" (physical line) or "part.parquet:row 12"
    case: dict[str, Any]
    passthrough: dict[str, Any]
    errors: list[dict[str, str]] = field(default_factory=list)


def analytes_of(rulebook: Any) -> dict[str, tuple[str, ...]]:
    """Input name -> accepted units (canonical first; empty for codes and flags)."""
    out: dict[str, tuple[str, ...]] = {}
    for name, spec in rulebook.inputs.items():
        out[name] = (spec.unit, *spec.alternatives) if spec.kind == "number" else ()
    return out


def rejected_result(rulebook: Any, row: Row) -> dict[str, Any]:
    """The result contract for a row that could not be read: status rejected, errors inline.
    Built from the engine's own rejected shape so headline and cautions stay the engine's."""
    from .evaluator import interpret

    result = interpret(rulebook, None, False)
    result["case_id"] = row.case.get("case_id") if isinstance(row.case.get("case_id"), str) else None
    ctx = row.case.get("context")
    result["context"] = dict(ctx) if isinstance(ctx, Mapping) else {}
    result["errors"] = list(row.errors)
    result["not_assessed"] = [{"what": "interpretation", "why": "input rejected: " + "; ".join(
        e["message"] for e in row.errors)}]
    return result


def interpret_row(rulebook: Any, row: Row, trace: bool = False) -> dict[str, Any]:
    """Interpret one row: the engine's result, or a rejected result for an unreadable row."""
    if row.errors:
        return rejected_result(rulebook, row)
    from .evaluator import interpret

    return interpret(rulebook, row.case, trace)


def _unreadable(where: str, message: str, accepted: str, field_: str = "row") -> dict[str, str]:
    return {"field": field_, "code": "input.unreadable", "message": f"{where}: {message}",
            "accepted": accepted}


# ----------------------------------------------------------------------------- mapping

@dataclass(frozen=True)
class Target:
    """What one column is: an input (with the unit its values are in), the case id, or pass."""

    role: str                        # "input" | "case_id" | "pass"
    name: str = ""                   # input name (role input) or output name (role pass)
    unit: str = ""                   # UCUM code of the values; "" = canonical / not a number


@dataclass(frozen=True)
class ColumnMapping:
    """A mapping file: header text -> (input name | case_id | pass, optional unit)."""

    columns: dict[str, tuple[str, str]] = field(default_factory=dict)
    passthrough: tuple[str, ...] = ()
    source: str = "<mapping>"


def load_mapping(path: str | Path) -> ColumnMapping:
    """Read and check the shape of a YAML or JSON mapping file (names are checked later,
    against the rulebook, by :func:`open_table`)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise TableError(str(p), f"cannot read the mapping file: {exc.strerror}") from None
    try:
        if p.suffix.lower() == ".json":
            data = json.loads(text)
        else:
            import yaml

            data = yaml.safe_load(text)
    except (ValueError, Exception) as exc:  # yaml.YAMLError has no common base with ValueError
        raise TableError(str(p), f"not valid YAML or JSON: {exc}") from None
    return mapping_from_data(data, str(p))


def mapping_from_data(data: Any, source: str = "<mapping>") -> ColumnMapping:
    if not isinstance(data, dict) or set(data) - {"columns", "passthrough"}:
        raise TableError(source, "a mapping must be an object with 'columns' and/or 'passthrough'",
                         "{columns: {header: input | {input: name, unit: code}}, passthrough: [key]}")
    cols: dict[str, tuple[str, str]] = {}
    raw_cols = data.get("columns") or {}
    if not isinstance(raw_cols, dict):
        raise TableError(f"{source}: columns", "must map header text to an input", "an object")
    for header, spec in raw_cols.items():
        where = f"{source}: columns.{header}"
        if isinstance(spec, str):
            cols[str(header).strip()] = (spec.strip(), "")
        elif isinstance(spec, dict) and isinstance(spec.get("input"), str) and not (
                set(spec) - {"input", "unit"}) and isinstance(spec.get("unit", ""), str):
            cols[str(header).strip()] = (spec["input"].strip(), str(spec.get("unit", "")).strip())
        else:
            raise TableError(where, f"cannot read {spec!r}",
                             "an input name, 'case_id', 'pass' or {input: name, unit: code}")
    passthrough = data.get("passthrough") or []
    if not isinstance(passthrough, list) or not all(isinstance(k, str) for k in passthrough):
        raise TableError(f"{source}: passthrough", "must be a list of key names", "[ward, bed]")
    return ColumnMapping(cols, tuple(passthrough), source)


def _unit_code(where: str, name: str, unit: str, accepted: Sequence[str]) -> str:
    if not accepted:
        raise TableError(where, f"{name} takes no unit, but '{unit}' is given", "no unit")
    code = U.normalise(unit)
    if code is None or code not in accepted:
        raise TableError(where, f"unit '{unit}' does not fit {name}", "one of " + ", ".join(accepted))
    return "" if code == accepted[0] else code


def resolve_column(header: str, where: str, analytes: Mapping[str, Sequence[str]],
                   mapping: ColumnMapping | None) -> Target:
    """What a header means: the mapping first, then the name (with an optional unit)."""
    text = header.strip()
    m = _HEADER_UNIT.match(text)
    base, unit = (m["name"], m["u1"] or m["u2"]) if m else (text, "")
    if mapping is not None and text in mapping.columns:
        name, mapped_unit = mapping.columns[text]
        unit = mapped_unit or unit
        where = f"{where} (mapped in {mapping.source})"
    else:
        name = base
    key = name.strip().lower().replace(" ", "_")
    if key == "case_id" and not unit:
        return Target("case_id")
    if key == "pass" and mapping is not None and text in mapping.columns:
        return Target("pass", text)
    if key in analytes:
        return Target("input", key, _unit_code(where, key, unit, analytes[key]) if unit else "")
    if mapping is not None and text in mapping.columns:
        raise TableError(where, f"'{name}' is not an input of the rulebook",
                         "one of " + ", ".join(sorted(analytes)) + ", case_id or pass")
    return Target("pass", text)


def resolve_header(headers: Sequence[str], source: str, analytes: Mapping[str, Sequence[str]],
                   mapping: ColumnMapping | None) -> list[Target]:
    targets: list[Target] = []
    seen: dict[str, str] = {}
    passed: set[str] = set()
    for i, h in enumerate(headers, start=1):
        where = f"{source}: column {i} '{h}'"
        t = resolve_column(str(h), where, analytes, mapping)
        if t.role == "pass":                  # a repeated header keeps both columns: name_<n>
            name = t.name if t.name not in passed else f"{t.name}_{i}"
            passed.add(name)
            t = Target("pass", name)
        key = t.name if t.role == "input" else (t.role if t.role == "case_id" else "")
        if key:
            if key in seen:
                raise TableError(where, f"{key} is already given by column {seen[key]}",
                                 "one column per input")
            seen[key] = f"{i} '{h}'"
        targets.append(t)
    return targets


# ----------------------------------------------------------------------------- reading

def detect_format(path: str | Path, fmt: str | None = None) -> str:
    if fmt:
        if fmt not in FORMATS:
            raise TableError(str(path), f"unknown format '{fmt}'", "one of " + ", ".join(FORMATS))
        return fmt
    p = Path(path)
    if p.is_dir():
        return "parquet"
    found = _SUFFIXES.get(p.suffix.lower())
    if found is None:
        raise TableError(str(path), f"cannot tell the format from the suffix '{p.suffix}'",
                         "a .csv, .jsonl or .parquet file, or --format")
    return found


def parquet_files(path: str | Path) -> list[Path]:
    """A Parquet file, or every *.parquet file under a directory in sorted path order
    (hidden and _-prefixed names, such as _SUCCESS or temporary files, are skipped)."""
    p = Path(path)
    if p.is_file():
        return [p]
    files = sorted(f for f in p.rglob("*.parquet") if not any(
        part.startswith((".", "_")) for part in f.relative_to(p).parts))
    if not files:
        raise TableError(str(p), "no .parquet files in this directory", "one or more part files")
    return files


class Table:
    """An open input. Iterate it for :class:`Row` objects; ``passthrough`` lists the
    pass-through column names; ``passthrough_types`` their Arrow types (Parquet only);
    ``progress()`` is the share read so far (0..1, by bytes or rows)."""

    passthrough: list[str]
    passthrough_types: dict[str, Any]
    fmt: str

    def __init__(self, path: Path, fmt: str, analytes: Mapping[str, Sequence[str]],
                 mapping: ColumnMapping | None, start: int = 0,
                 row_groups: Sequence[int] | None = None) -> None:
        self.path, self.fmt, self.analytes, self.mapping = path, fmt, analytes, mapping
        self.start, self.row_groups = start, row_groups
        self.passthrough_types = {}
        self._close: list[Any] = []
        self._rows: Iterator[Row]
        self._progress = lambda: 0.0
        getattr(self, "_open_" + fmt)()

    # context manager and iteration
    def __enter__(self) -> "Table":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        for f in self._close:
            f.close()
        self._close.clear()

    def __iter__(self) -> Iterator[Row]:
        return self._rows

    def progress(self) -> float:
        return self._progress()

    # CSV ---------------------------------------------------------------------------------
    def _open_csv(self) -> None:
        f = open(self.path, encoding="utf-8-sig", newline="")
        self._close.append(f)
        size = max(os.fstat(f.fileno()).st_size, 1)
        raw = f.buffer.raw  # type: ignore[attr-defined]
        self._progress = lambda: min(raw.tell() / size, 1.0)
        reader = csv.reader(f)
        try:
            headers = next(reader)
        except StopIteration:
            headers = []
        except csv.Error as exc:
            raise TableError(f"{self.path}:1", f"unreadable header: {exc}") from None
        targets = resolve_header(headers, str(self.path), self.analytes, self.mapping)
        self.passthrough = [t.name for t in targets if t.role == "pass"]
        self._rows = self._csv_rows(reader, headers, targets)

    def _csv_rows(self, reader: Any, headers: list[str], targets: list[Target]) -> Iterator[Row]:
        plan = [(i, t.role, t.name, t.unit) for i, t in enumerate(targets)]
        n = len(headers)
        index = self.start
        name = self.path.name
        line = 1
        while True:
            try:
                fields = next(reader)
            except StopIteration:
                return
            except csv.Error as exc:         # e.g. a NUL byte or an unterminated quote at EOF
                line = reader.line_num
                where = f"{name}:{line}"
                yield Row(index, where, {"case_id": None, "context": {}}, {h: None for h in self.passthrough},
                          [_unreadable(where, f"not valid CSV: {exc}", "comma-separated fields")])
                index += 1
                continue
            line = reader.line_num
            if not fields:
                continue                      # a blank line is not a row
            where = f"{name}:{line}"
            passthrough: dict[str, Any] = {}
            case: dict[str, Any] = {"case_id": None, "context": passthrough}
            for i, role, key, unit in plan:
                cell = fields[i] if i < len(fields) else None
                if role == "pass":
                    passthrough[key] = cell
                elif cell is None or cell == "":
                    continue
                elif role == "input":
                    case[key] = {"value": cell, "unit": unit} if unit else cell
                else:
                    case["case_id"] = cell
            errors = []
            if len(fields) != n:
                if len(fields) > n:
                    extra = ", ".join(repr(x) for x in fields[n:n + 3])
                    msg = f"{len(fields)} fields but the header has {n} (extra: {extra})"
                else:
                    msg = (f"{len(fields)} fields but the header has {n} (missing from column "
                           f"{len(fields) + 1} '{headers[len(fields)]}')")
                errors.append(_unreadable(where, msg, f"exactly {n} fields, one per header column"))
            yield Row(index, where, case, passthrough, errors)
            index += 1

    # JSON Lines ---------------------------------------------------------------------------
    def _open_jsonl(self) -> None:
        f = open(self.path, "rb")
        self._close.append(f)
        size = max(os.fstat(f.fileno()).st_size, 1)
        raw = f.raw
        self._progress = lambda: min(raw.tell() / size, 1.0)
        listed = self.mapping.passthrough if self.mapping else ()
        self.passthrough = [*listed, "context"]
        self._key_cache: dict[str, Target | None] = {}
        self._rows = self._jsonl_rows(f, listed)

    def _key(self, key: str) -> Target | None:
        """An input key's target when it needs renaming or a unit; None to leave it as is."""
        if key not in self._key_cache:
            if key in ("case_id", "context") or key in self.analytes:
                t = None
            else:
                try:
                    t = resolve_column(key, f"{self.path}: key '{key}'", self.analytes, self.mapping)
                except TableError:
                    t = None                  # the engine rejects the key, naming it
                if t is not None and t.role == "pass":
                    t = None
            self._key_cache[key] = t
        return self._key_cache[key]

    def _jsonl_rows(self, f: Any, listed: Sequence[str]) -> Iterator[Row]:
        import orjson

        name = self.path.name
        index = self.start
        for line, raw in enumerate(f, start=1):
            if not raw.strip():
                continue
            where = f"{name}:{line}"
            try:
                obj = orjson.loads(raw)
            except orjson.JSONDecodeError as exc:
                msg = str(exc).split(":", 1)[0]
                yield Row(index, where, {"case_id": None, "context": {}}, {k: None for k in self.passthrough},
                          [_unreadable(where, f"not valid JSON: {msg}", "one JSON object per line")])
                index += 1
                continue
            if not isinstance(obj, dict):
                yield Row(index, where, {"case_id": None, "context": {}}, {k: None for k in self.passthrough},
                          [_unreadable(where, f"a line must hold a JSON object, not {type(obj).__name__}",
                                       "one JSON object per line")])
                index += 1
                continue
            passthrough = {k: obj.pop(k, None) for k in listed}
            passthrough["context"] = obj.get("context")
            case = self._jsonl_case(obj)
            if listed:
                ctx = case.get("context")
                merged = dict(ctx) if isinstance(ctx, dict) else {}
                merged.update((k, v) for k, v in passthrough.items() if k != "context")
                if isinstance(ctx, dict) or ctx is None:
                    case["context"] = merged
            yield Row(index, where, case, passthrough)
            index += 1

    def _jsonl_case(self, obj: dict[str, Any]) -> dict[str, Any]:
        renamed: dict[str, Any] | None = None
        for key in obj:
            if self._key(key) is not None:
                renamed = {}
                break
        if renamed is None:
            return obj
        for key, value in obj.items():
            t = self._key(key)
            if t is None:
                renamed[key] = value
            elif t.role == "case_id":
                renamed["case_id"] = value
            elif value is None or isinstance(value, dict) or not t.unit:
                renamed[t.name] = value
            else:
                renamed[t.name] = {"value": value, "unit": t.unit}
        return renamed

    # Parquet ------------------------------------------------------------------------------
    def _open_parquet(self) -> None:
        import pyarrow.parquet as pq

        files = parquet_files(self.path)
        first = pq.ParquetFile(files[0])
        self._close.append(first)
        schema = first.schema_arrow
        headers = list(schema.names)
        targets = resolve_header(headers, str(files[0]), self.analytes, self.mapping)
        self.passthrough = [h for h, t in zip(headers, targets) if t.role == "pass"]
        self.passthrough_types = {h: schema.field(h).type for h in self.passthrough}
        if self.row_groups is not None and len(files) > 1:
            raise TableError(str(self.path), "row groups can be chosen in a single file only")
        meta = first.metadata
        total = sum(pq.ParquetFile(f).metadata.num_rows for f in files) if len(files) > 1 else (
            meta.num_rows if self.row_groups is None else
            sum(meta.row_group(i).num_rows for i in self.row_groups))
        done = [0]
        self._progress = lambda: min(done[0] / max(total, 1), 1.0)
        self._rows = self._parquet_rows(files, first, headers, targets, done)

    def _parquet_rows(self, files: list[Path], first: Any, headers: list[str],
                      targets: list[Target], done: list[int]) -> Iterator[Row]:
        import pyarrow.parquet as pq

        plan = [(h, t.role, t.name, t.unit) for h, t in zip(headers, targets)]
        index = self.start
        for n, path in enumerate(files):
            pf = first if n == 0 else pq.ParquetFile(path)
            if n:
                self._close.append(pf)
                if list(pf.schema_arrow.names) != headers:
                    raise TableError(str(path), "its columns differ from the first file's "
                                     f"({files[0].name})", ", ".join(headers))
            label = path.name if len(files) == 1 else str(path.relative_to(self.path))
            at, groups = 0, self.row_groups
            if groups is not None:           # row numbers stay those of the whole file
                at = sum(pf.metadata.row_group(i).num_rows for i in range(min(groups, default=0)))
            for batch in pf.iter_batches(batch_size=READ_BATCH, row_groups=groups):
                for rec in batch.to_pylist():
                    at += 1
                    yield self._parquet_row(index, f"{label}:row {at}", rec, plan)
                    index += 1
                done[0] += batch.num_rows

    @staticmethod
    def _parquet_row(index: int, where: str, rec: dict[str, Any],
                     plan: list[tuple[str, str, str, str]]) -> Row:
        passthrough: dict[str, Any] = {}
        context: dict[str, Any] = {}
        case: dict[str, Any] = {"case_id": None, "context": context}
        for h, role, key, unit in plan:
            value = rec[h]
            if role == "pass":
                passthrough[h] = value
                context[h] = json_safe(value)
            elif value is None or value == "" or (isinstance(value, float) and math.isnan(value)):
                continue                      # not measured (null, empty text or NaN)
            elif role == "input":
                case[key] = {"value": value, "unit": unit} if unit else value
            else:
                case["case_id"] = value if isinstance(value, str) else str(value)
        return Row(index, where, case, passthrough)


def open_table(path: str | Path, analytes: Mapping[str, Sequence[str]], *,
               mapping: ColumnMapping | None = None, fmt: str | None = None,
               start: int = 0, row_groups: Sequence[int] | None = None) -> Table:
    """Open an input for streaming. ``analytes``: input name -> accepted units
    (:func:`analytes_of`). ``start`` is the index of the first row (for partitions);
    ``row_groups`` reads only those row groups of one Parquet file (contiguous, ascending)."""
    p = Path(path)
    kind = detect_format(p, fmt)
    if not p.exists():
        raise TableError(str(p), "no such file or directory")
    if p.is_dir() and kind != "parquet":
        raise TableError(str(p), "a directory can only be read as partitioned Parquet")
    return Table(p, kind, analytes, mapping, start, row_groups)


def json_safe(value: Any) -> Any:
    """A Parquet value as JSON can hold it (dates and times as ISO 8601 text)."""
    if value is None or isinstance(value, (str, bool, int, float)):
        return value
    if isinstance(value, (datetime, date, time)):
        return value.isoformat()
    if isinstance(value, Decimal):
        return str(value)
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return str(value)


# ----------------------------------------------------------------------------- writing

@dataclass(frozen=True)
class Column:
    """An output column. ``kind``: text | number | texts (list of text) | records (list of
    objects with text values; ``fields`` names them) | json (any JSON value, JSON text in CSV
    and Parquet) | value (text as it is, any other JSON value as JSON text; native in JSON
    Lines) | raw (a pass-through value written as it came; ``arrow_type`` keeps its Parquet
    type)."""

    name: str
    kind: str = "text"
    fields: tuple[str, ...] = ()
    arrow_type: Any = None
    unit: str = ""


_KINDS = ("text", "number", "texts", "records", "json", "value", "raw")


def temp_path_for(target: Path) -> Path:
    """The temporary name a writer uses beside ``target``: hidden, and marked as partial."""
    return target.with_name(f".{target.name}.partial-{os.getpid()}")


class TableWriter:
    """Writes records to a temporary file beside the target; :meth:`commit` renames it into
    place (after fsync), :meth:`abort` removes it. As a context manager: commit on a clean
    exit, abort on an exception. Target ``-`` writes CSV or JSON Lines to standard output."""

    def __init__(self, target: str | Path, columns: Sequence[Column], fmt: str,
                 row_group_size: int = 50_000, metadata: Mapping[str, str] | None = None) -> None:
        for c in columns:
            if c.kind not in _KINDS:
                raise ValueError(f"column {c.name}: kind {c.kind!r} not in {_KINDS}")
        names = [c.name for c in columns]
        if len(set(names)) != len(names):
            raise ValueError(f"duplicate output column names: {names}")
        self.columns, self.fmt = list(columns), fmt
        self.rows = 0
        self._stdout = str(target) == "-"
        self._done = False
        if self._stdout:
            if fmt == "parquet":
                raise TableError("-", "Parquet cannot be written to standard output", "an output path")
            self.target = self.temp = Path("-")
            self._file: Any = sys.stdout
        else:
            self.target = Path(target)
            if self.target.is_dir():
                raise TableError(str(self.target), "is a directory", "an output file path")
            self.temp = temp_path_for(self.target)
            self._file = None if fmt == "parquet" else open(self.temp, "w", encoding="utf-8", newline="")
        self._buffer: list[Sequence[Any]] = []
        self._row_group = row_group_size
        self._metadata = dict(metadata or {})       # Parquet key-value metadata (lineage)
        getattr(self, "_start_" + fmt)()

    def __enter__(self) -> "TableWriter":
        return self

    def __exit__(self, exc_type: Any, *rest: Any) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.abort()

    # formats ---------------------------------------------------------------------------
    def _start_csv(self) -> None:
        self._file.write(Encoder(self.columns, "csv").header())

    def _start_jsonl(self) -> None:
        pass

    def _start_parquet(self) -> None:
        import pyarrow.parquet as pq

        self._schema = arrow_schema(self.columns, self._metadata)
        self._pq = pq.ParquetWriter(self.temp, self._schema, compression="zstd")
        self._buffered = 0

    def encoder(self) -> "Encoder":
        """A picklable encoder for this writer's columns and format: worker processes encode
        their chunk with it, and this process only writes the blocks (:meth:`write_block`)."""
        return Encoder(self.columns, self.fmt)

    def write(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Write records given as dicts keyed by column name (missing keys are empty)."""
        names = [c.name for c in self.columns]
        self.write_rows([r.get(n) for n in names] for r in records)

    def write_rows(self, rows: Iterable[Sequence[Any]]) -> None:
        """Write records given as sequences of values in column order."""
        rows = list(rows)
        if rows:
            self.write_block(self.encoder()(rows), len(rows))

    def write_block(self, block: Any, count: int) -> None:
        """Write ``count`` records already encoded by :meth:`encoder` (text, or an Arrow batch)."""
        self.rows += count
        if self.fmt != "parquet":
            self._file.write(block)
            return
        self._buffer.append(block)
        self._buffered += count
        if self._buffered >= self._row_group:
            self._flush_parquet()

    def _flush_parquet(self) -> None:
        if not self._buffer:
            return
        import pyarrow as pa

        self._pq.write_table(pa.Table.from_batches(self._buffer, schema=self._schema))
        self._buffer.clear()
        self._buffered = 0

    def commit(self) -> None:
        if self._done:
            return
        self._done = True
        if self.fmt == "parquet":
            self._flush_parquet()
            self._pq.close()
        if self._stdout:
            self._file.flush()
            return
        if self._file is not None:
            self._file.flush()
            os.fsync(self._file.fileno())
            self._file.close()
        else:
            with open(self.temp, "rb") as f:
                os.fsync(f.fileno())
        os.replace(self.temp, self.target)
        _fsync_dir(self.target.parent)

    def abort(self) -> None:
        if self._done:
            return
        self._done = True
        try:
            if self.fmt == "parquet":
                self._pq.close()
            elif self._file is not None and not self._stdout:
                self._file.close()
        finally:
            if not self._stdout:
                try:
                    self.temp.unlink()
                except FileNotFoundError:
                    pass


class Encoder:
    """Encodes records (value sequences in column order) for one output format: CSV or JSON
    Lines text, or an Arrow record batch for Parquet. Picklable, so it runs in workers."""

    def __init__(self, columns: Sequence[Column], fmt: str) -> None:
        self.columns, self.fmt = list(columns), fmt
        self._schema: Any = None

    def __getstate__(self) -> dict[str, Any]:
        return {"columns": self.columns, "fmt": self.fmt, "_schema": None}

    def header(self) -> str:
        buf = io.StringIO()
        csv.writer(buf, lineterminator="\n").writerow([c.name for c in self.columns])
        return buf.getvalue()

    def __call__(self, rows: Sequence[Sequence[Any]]) -> Any:
        if self.fmt == "csv":
            buf = io.StringIO()
            write = csv.writer(buf, lineterminator="\n").writerow
            cells = [_CSV_CELL.get(c.kind) for c in self.columns]
            if all(f is None for f in cells):
                for r in rows:
                    write(r)
            else:
                for r in rows:
                    write([v if f is None or v is None else f(v) for f, v in zip(cells, r)])
            return buf.getvalue()
        if self.fmt == "jsonl":
            import orjson

            names = [c.name for c in self.columns]
            opt = orjson.OPT_NON_STR_KEYS | orjson.OPT_APPEND_NEWLINE
            return b"".join(orjson.dumps(dict(zip(names, r)), default=json_safe, option=opt)
                            for r in rows).decode()
        import pyarrow as pa

        if self._schema is None:
            self._schema = arrow_schema(self.columns)
        data = [[_parquet_cell(r[i], c.kind) for r in rows] for i, c in enumerate(self.columns)]
        return pa.RecordBatch.from_arrays([pa.array(col, type=self._schema.field(i).type)
                                           for i, col in enumerate(data)], schema=self._schema)


def arrow_schema(columns: Sequence[Column], metadata: Mapping[str, str] | None = None) -> Any:
    import pyarrow as pa

    return pa.schema([pa.field(c.name, _arrow_type(c), metadata={"unit": c.unit} if c.unit else None)
                      for c in columns], metadata=dict(metadata) if metadata else None)


def open_writer(target: str | Path, columns: Sequence[Column], fmt: str | None = None,
                **options: Any) -> TableWriter:
    """A writer for ``target`` (format from ``fmt`` or the suffix; ``-`` = stdout)."""
    kind = fmt or ("csv" if str(target) == "-" else detect_format(target))
    if kind not in FORMATS:
        raise TableError(str(target), f"unknown format '{kind}'", "one of " + ", ".join(FORMATS))
    return TableWriter(target, columns, kind, **options)


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _csv_texts(value: Any) -> str:
    return ";".join(value)


def _csv_json(value: Any) -> str:
    if isinstance(value, str):
        return value
    import orjson

    return orjson.dumps(value, default=json_safe).decode() if value != [] else ""


def _csv_scalar(value: Any) -> Any:
    """csv writes str, int and None itself; booleans, non-finite floats and others need help."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    if isinstance(value, (str, int)):
        return value
    return str(json_safe(value))


def _as_text(value: Any) -> Any:
    if isinstance(value, str):
        return value
    import orjson

    return orjson.dumps(value, default=json_safe).decode()


# column kind -> cell encoder for CSV (None: the value is written as it is; None is empty).
# Numbers come from the engine finite, and csv writes a float as repr() does.
_CSV_CELL: dict[str, Any] = {"text": None, "number": None, "texts": _csv_texts,
                             "records": _csv_json, "json": _csv_json, "value": _as_text,
                             "raw": _csv_scalar}


def _parquet_cell(value: Any, kind: str) -> Any:
    if kind == "value":
        return None if value is None else _as_text(value)
    if kind == "json":
        if value is None:
            return None
        import orjson

        return orjson.dumps(value, default=json_safe).decode()
    if kind == "text" and value is not None and not isinstance(value, str):
        return str(value)
    return value


def _arrow_type(c: Column) -> Any:
    import pyarrow as pa

    if c.kind == "raw" and c.arrow_type is not None:
        return c.arrow_type
    if c.kind == "number":
        return pa.float64()
    if c.kind == "texts":
        return pa.list_(pa.string())
    if c.kind == "records":
        return pa.list_(pa.struct([(f, pa.string()) for f in c.fields]))
    return pa.string()


def read_back(path: str | Path, fmt: str | None = None) -> list[dict[str, Any]]:
    """Every record of a written output (tests and small files only: it is not streamed)."""
    kind = fmt or detect_format(path)
    if kind == "parquet":
        import pyarrow.parquet as pq

        out: list[dict[str, Any]] = []
        for f in parquet_files(path):
            out.extend(pq.read_table(f).to_pylist())
        return out
    with open(path, encoding="utf-8", newline="") as f:
        if kind == "csv":
            return list(csv.DictReader(f))
        return [json.loads(line) for line in f if line.strip()]

