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

The writers live in :mod:`gasrules.tables.writers` and are re-exported here, so callers import
everything from ``gasrules.tables.readers``. pyarrow is imported only when Parquet is read or written.
"""

from __future__ import annotations

import json
import math
import os
import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core import units as U
from gasrules.core.errors import EngineError
from gasrules.tables.writers import (
    Column,
    Encoder,
    TableWriter,
    arrow_schema,
    json_safe,
    open_writer,
    read_back,
    temp_path_for,
)

__all__ = [
    "FORMATS",
    "Column",
    "ColumnMapping",
    "Encoder",
    "Row",
    "Table",
    "TableError",
    "TableWriter",
    "analytes_of",
    "arrow_schema",
    "detect_format",
    "interpret_row",
    "json_safe",
    "load_mapping",
    "mapping_from_data",
    "open_table",
    "open_writer",
    "parquet_files",
    "read_back",
    "rejected_result",
    "temp_path_for",
]

FORMATS = ("csv", "jsonl", "parquet")
_SUFFIXES = {
    ".csv": "csv",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".json": "jsonl",
    ".parquet": "parquet",
    ".pq": "parquet",
}
_HEADER_UNIT = re.compile(r"^\s*(?P<name>[^\[\(]*?)\s*(?:\[(?P<u1>.+)\]|\((?P<u2>.+)\))\s*$")
_ROLES = ("case_id", "pass")
_DECIMAL_COMMA = re.compile(r"^\s*[+-]?[0-9]+,[0-9]+\s*$")
READ_BATCH = 4096  # Parquet rows decoded at a time


class TableError(EngineError, ValueError):
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

    index: int  # 0-based position among the rows of the input
    where: str  # "file.csv:17" (physical line) or "part.parquet:row 12"
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
    from gasrules.evaluation.evaluator import interpret

    result = interpret(rulebook, None, False)
    result["case_id"] = row.case.get("case_id") if isinstance(row.case.get("case_id"), str) else None
    ctx = row.case.get("context")
    result["context"] = dict(ctx) if isinstance(ctx, Mapping) else {}
    result["errors"] = list(row.errors)
    result["not_assessed"] = [
        {"what": "interpretation", "why": "input rejected: " + "; ".join(e["message"] for e in row.errors)}
    ]
    return result


def interpret_row(rulebook: Any, row: Row, trace: bool = False) -> dict[str, Any]:
    """Interpret one row: the engine's result, or a rejected result for an unreadable row."""
    if row.errors:
        return rejected_result(rulebook, row)
    from gasrules.evaluation.evaluator import interpret

    return interpret(rulebook, row.case, trace)


def _unreadable(where: str, message: str, accepted: str, field_: str = "row") -> dict[str, str]:
    return {
        "field": field_,
        "code": "input.unreadable",
        "message": f"{where}: {message}",
        "accepted": accepted,
    }


# ----------------------------------------------------------------------------- mapping


@dataclass(frozen=True)
class Target:
    """What one column is: an input (with the unit its values are in), the case id, or pass."""

    role: str  # "input" | "case_id" | "pass"
    name: str = ""  # input name (role input) or output name (role pass)
    unit: str = ""  # UCUM code of the values; "" = canonical / not a number


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
        raise TableError(
            source,
            "a mapping must be an object with 'columns' and/or 'passthrough'",
            "{columns: {header: input | {input: name, unit: code}}, passthrough: [key]}",
        )
    cols: dict[str, tuple[str, str]] = {}
    raw_cols = data.get("columns") or {}
    if not isinstance(raw_cols, dict):
        raise TableError(f"{source}: columns", "must map header text to an input", "an object")
    for header, spec in raw_cols.items():
        where = f"{source}: columns.{header}"
        if isinstance(spec, str):
            cols[str(header).strip()] = (spec.strip(), "")
        elif (
            isinstance(spec, dict)
            and isinstance(spec.get("input"), str)
            and not (set(spec) - {"input", "unit"})
            and isinstance(spec.get("unit", ""), str)
        ):
            cols[str(header).strip()] = (spec["input"].strip(), str(spec.get("unit", "")).strip())
        else:
            raise TableError(
                where,
                f"cannot read {spec!r}",
                "an input name, 'case_id', 'pass' or {input: name, unit: code}",
            )
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


def resolve_column(
    header: str, where: str, analytes: Mapping[str, Sequence[str]], mapping: ColumnMapping | None
) -> Target:
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
        raise TableError(
            where,
            f"'{name}' is not an input of the rulebook",
            "one of " + ", ".join(sorted(analytes)) + ", case_id or pass",
        )
    likely = None if mapping is not None and text in mapping.passthrough else looks_like_input(key, analytes)
    if likely is not None:
        raise TableError(
            where,
            f"looks like input '{likely}' but is not one of its names",
            f'the column named {likely} (with [unit] if needed), or mapped (columns: {{"{text}": '
            f'{{input: {likely}}}}}) or declared pass-through (passthrough: ["{text}"]) in a mapping file',
        )
    return Target("pass", text)


# Column names people use for an input (names only, no numbers). A column called one of these,
# or within one edit of an input name or alias of 4 characters or more, "looks like an input":
# it is an error unless it is mapped or declared pass-through, never silently passed through.
COLUMN_ALIASES: dict[str, str] = {
    "paco2": "pco2",
    "pvco2": "pco2",
    "pco₂": "pco2",
    "co2": "pco2",
    "pao2": "po2",
    "pvo2": "po2",
    "po₂": "po2",
    "bicarb": "hco3",
    "bicarbonate": "hco3",
    "hco3-": "hco3",
    "hco₃": "hco3",
    "hco₃-": "hco3",
    "std_hco3": "hco3",
    "sodium": "na",
    "na+": "na",
    "potassium": "k",
    "k+": "k",
    "chloride": "cl",
    "cl-": "cl",
    "lac": "lactate",
    "lactic_acid": "lactate",
    "alb": "albumin",
    "sao2": "so2",
    "svo2": "so2",
    "fio₂": "fio2",
    "fi02": "fio2",
    "glu": "glucose",
    "creat": "creatinine",
    "hgb": "hb",
    "haemoglobin": "hb",
    "hemoglobin": "hb",
    "temp": "temperature",
    "be": "base_excess",
    "abe": "base_excess",
    "sbe": "base_excess",
    "osm": "osmolality",
    "mg": "magnesium",
    "phos": "phosphate",
    "ica": "ionized_calcium",
    "ionised_calcium": "ionized_calcium",
    "ph_value": "ph",
}


def _edits1(a: str, b: str) -> bool:
    """True when ``a`` and ``b`` differ by exactly one insertion, deletion or substitution."""
    if a == b or abs(len(a) - len(b)) > 1:
        return False
    if len(a) > len(b):
        a, b = b, a
    i = 0
    while i < len(a) and a[i] == b[i]:
        i += 1
    return a[i + (len(a) == len(b)) :] == b[i + 1 :]


def looks_like_input(key: str, analytes: Mapping[str, Sequence[str]]) -> str | None:
    """The input a column name seems meant for (an alias, or one edit away from an input name
    or alias of 4+ characters), or None."""
    target = COLUMN_ALIASES.get(key)
    if target in analytes:
        return target
    for name in analytes:
        if len(name) >= 4 and _edits1(key, name):
            return name
    for alias, name in COLUMN_ALIASES.items():
        if name in analytes and len(alias) >= 4 and _edits1(key, alias):
            return name
    return None


def resolve_header(
    headers: Sequence[str], source: str, analytes: Mapping[str, Sequence[str]], mapping: ColumnMapping | None
) -> list[Target]:
    targets: list[Target] = []
    seen: dict[str, str] = {}
    passed: set[str] = set()
    for i, h in enumerate(headers, start=1):
        where = f"{source}: column {i} '{h}'"
        t = resolve_column(str(h), where, analytes, mapping)
        if t.role == "pass":  # a repeated header keeps both columns: name_<n>
            name = t.name if t.name not in passed else f"{t.name}_{i}"
            passed.add(name)
            t = Target("pass", name)
        key = t.name if t.role == "input" else (t.role if t.role == "case_id" else "")
        if key:
            if key in seen:
                raise TableError(
                    where, f"{key} is already given by column {seen[key]}", "one column per input"
                )
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
        raise TableError(
            str(path),
            f"cannot tell the format from the suffix '{p.suffix}'",
            "a .csv, .jsonl or .parquet file, or --format",
        )
    return found


def parquet_files(path: str | Path) -> list[Path]:
    """A Parquet file, or every *.parquet file under a directory in sorted path order
    (hidden and _-prefixed names, such as _SUCCESS or temporary files, are skipped)."""
    p = Path(path)
    if p.is_file():
        return [p]
    files = sorted(
        f
        for f in p.rglob("*.parquet")
        if not any(part.startswith((".", "_")) for part in f.relative_to(p).parts)
    )
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

    def __init__(
        self,
        path: Path,
        fmt: str,
        analytes: Mapping[str, Sequence[str]],
        mapping: ColumnMapping | None,
        start: int = 0,
        row_groups: Sequence[int] | None = None,
        *,
        decimal_comma: bool = False,
        field_limit: int | None = None,
    ) -> None:
        from gasrules.tables.csvread import FIELD_LIMIT

        self.path, self.fmt, self.analytes, self.mapping = path, fmt, analytes, mapping
        self.decimal_comma, self.field_limit = decimal_comma, field_limit or FIELD_LIMIT
        self.delimiter = ","
        self.start, self.row_groups = start, row_groups
        self.passthrough_types = {}
        self._close: list[Any] = []
        self._rows: Iterator[Row]
        self._progress = lambda: 0.0
        getattr(self, "_open_" + fmt)()

    # context manager and iteration
    def __enter__(self) -> Table:
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
        from gasrules.tables.csvread import CsvHeaderError, read_records

        f = open(self.path, "rb")
        self._close.append(f)
        size = max(os.fstat(f.fileno()).st_size, 1)
        raw = f.raw  # type: ignore[attr-defined]
        self._progress = lambda: min(raw.tell() / size, 1.0)
        try:
            self.delimiter, headers, records, collapsed = read_records(f, self.field_limit)
        except CsvHeaderError as exc:
            raise TableError(f"{self.path}:{exc.line}", exc.message, exc.expected) from None
        if self.decimal_comma and self.delimiter == ",":
            raise TableError(
                str(self.path),
                "--decimal-comma is ambiguous in a comma-delimited file",
                "a semicolon- or tab-delimited file for numbers written with a decimal comma",
            )
        targets = resolve_header(headers, str(self.path), self.analytes, self.mapping)
        if collapsed is not None:
            raise TableError(f"{self.path}:{collapsed.line}", collapsed.message, collapsed.expected)
        self.passthrough = [t.name for t in targets if t.role == "pass"]
        self._rows = self._csv_rows(records, headers, targets)

    def _csv_rows(self, records: Any, headers: list[str], targets: list[Target]) -> Iterator[Row]:
        plan = [(i, t.role, t.name, t.unit) for i, t in enumerate(targets)]
        n = len(headers)
        index = self.start
        name = self.path.name
        comma = self.decimal_comma
        for rec in records:
            where = f"{name}:{rec.line}"
            fields = rec.fields
            if fields is None:
                yield Row(
                    index,
                    where,
                    {"case_id": None, "context": {}},
                    {h: None for h in self.passthrough},
                    [_unreadable(where, rec.error, "comma-, semicolon- or tab-separated UTF-8 fields")],
                )
                index += 1
                continue
            passthrough: dict[str, Any] = {}
            case: dict[str, Any] = {"case_id": None, "context": passthrough}
            for i, role, key, unit in plan:
                cell = fields[i] if i < len(fields) else None
                if role == "pass":
                    passthrough[key] = cell
                elif cell is None or cell == "":
                    continue
                elif role == "input":
                    if comma and _DECIMAL_COMMA.match(cell):
                        cell = cell.replace(",", ".")
                    case[key] = {"value": cell, "unit": unit} if unit else cell
                else:
                    case["case_id"] = cell
            errors = []
            if len(fields) != n:
                if len(fields) > n:
                    extra = ", ".join(repr(x[:40]) for x in fields[n : n + 3])
                    msg = f"{len(fields)} fields but the header has {n} (extra: {extra})"
                else:
                    msg = (
                        f"{len(fields)} fields but the header has {n} (missing from column "
                        f"{len(fields) + 1} '{headers[len(fields)]}')"
                    )
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
                    t = None  # the engine rejects the key, naming it
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
                yield Row(
                    index,
                    where,
                    {"case_id": None, "context": {}},
                    {k: None for k in self.passthrough},
                    [_unreadable(where, f"not valid JSON: {msg}", "one JSON object per line")],
                )
                index += 1
                continue
            if not isinstance(obj, dict):
                yield Row(
                    index,
                    where,
                    {"case_id": None, "context": {}},
                    {k: None for k in self.passthrough},
                    [
                        _unreadable(
                            where,
                            f"a line must hold a JSON object, not {type(obj).__name__}",
                            "one JSON object per line",
                        )
                    ],
                )
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
        total = (
            sum(pq.ParquetFile(f).metadata.num_rows for f in files)
            if len(files) > 1
            else (
                meta.num_rows
                if self.row_groups is None
                else sum(meta.row_group(i).num_rows for i in self.row_groups)
            )
        )
        done = [0]
        self._progress = lambda: min(done[0] / max(total, 1), 1.0)
        self._rows = self._parquet_rows(files, first, headers, targets, done)

    def _parquet_rows(
        self, files: list[Path], first: Any, headers: list[str], targets: list[Target], done: list[int]
    ) -> Iterator[Row]:
        import pyarrow.parquet as pq

        plan = [(h, t.role, t.name, t.unit) for h, t in zip(headers, targets)]
        index = self.start
        for n, path in enumerate(files):
            pf = first if n == 0 else pq.ParquetFile(path)
            if n:
                self._close.append(pf)
                if list(pf.schema_arrow.names) != headers:
                    raise TableError(
                        str(path),
                        f"its columns differ from the first file's ({files[0].name})",
                        ", ".join(headers),
                    )
            label = path.name if len(files) == 1 else str(path.relative_to(self.path))
            at, groups = 0, self.row_groups
            if groups is not None:  # row numbers stay those of the whole file
                at = sum(pf.metadata.row_group(i).num_rows for i in range(min(groups, default=0)))
            for batch in pf.iter_batches(batch_size=READ_BATCH, row_groups=groups):
                for rec in batch.to_pylist():
                    at += 1
                    yield self._parquet_row(index, f"{label}:row {at}", rec, plan)
                    index += 1
                done[0] += batch.num_rows

    @staticmethod
    def _parquet_row(
        index: int, where: str, rec: dict[str, Any], plan: list[tuple[str, str, str, str]]
    ) -> Row:
        passthrough: dict[str, Any] = {}
        context: dict[str, Any] = {}
        case: dict[str, Any] = {"case_id": None, "context": context}
        for h, role, key, unit in plan:
            value = rec[h]
            if role == "pass":
                passthrough[h] = value
                context[h] = json_safe(value)
            elif value is None or value == "" or (isinstance(value, float) and math.isnan(value)):
                continue  # not measured (null, empty text or NaN)
            elif role == "input":
                case[key] = {"value": value, "unit": unit} if unit else value
            else:
                case["case_id"] = value if isinstance(value, str) else str(value)
        return Row(index, where, case, passthrough)


def open_table(
    path: str | Path,
    analytes: Mapping[str, Sequence[str]],
    *,
    mapping: ColumnMapping | None = None,
    fmt: str | None = None,
    start: int = 0,
    row_groups: Sequence[int] | None = None,
    decimal_comma: bool = False,
    field_limit: int | None = None,
) -> Table:
    """Open an input for streaming. ``analytes``: input name -> accepted units
    (:func:`analytes_of`). ``start`` is the index of the first row (for partitions);
    ``row_groups`` reads only those row groups of one Parquet file (contiguous, ascending)."""
    p = Path(path)
    kind = detect_format(p, fmt)
    if not p.exists():
        raise TableError(str(p), "no such file or directory")
    if p.is_dir() and kind != "parquet":
        raise TableError(str(p), "a directory can only be read as partitioned Parquet")
    if decimal_comma and kind != "csv":
        raise TableError(str(p), "--decimal-comma applies to CSV input only", "a .csv file")
    return Table(
        p, kind, analytes, mapping, start, row_groups, decimal_comma=decimal_comma, field_limit=field_limit
    )
