"""Writing tables: records to CSV, JSON Lines or Parquet through a temporary file beside the
target, renamed into place only when everything is written (so a killed run never leaves a file
that looks complete). Part of the table layer; import these names from :mod:`gasrules.tables.readers`.

    with open_writer(out, columns, fmt="parquet") as w:   # columns: list[Column]
        w.write(records)                                  # dicts keyed by column name
        w.write_block(w.encoder()(value_lists), n)        # or blocks encoded in a worker

pyarrow is imported only when Parquet is written.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import sys
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime, time
from decimal import Decimal
from pathlib import Path
from typing import Any

__all__ = [
    "Column",
    "Encoder",
    "TableWriter",
    "arrow_schema",
    "json_safe",
    "open_writer",
    "read_back",
    "temp_path_for",
]


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


@dataclass(frozen=True)
class Column:
    """An output column. ``kind``: text | number | texts (list of text) | records (list of
    objects with text values; ``fields`` names them) | json (any JSON value, JSON text in CSV
    and Parquet) | value (text as it is, any other JSON value as JSON text; native in JSON
    Lines) | raw (a pass-through value written as it came; ``arrow_type`` keeps its Parquet
    type) | guarded (pass-through text; in CSV output a cell that a spreadsheet would run as a
    formula is neutralised, see :func:`neutralise_formula`)."""

    name: str
    kind: str = "text"
    fields: tuple[str, ...] = ()
    arrow_type: Any = None
    unit: str = ""


_KINDS = ("text", "number", "texts", "records", "json", "value", "raw", "guarded")


def neutralise_formula(cell: str) -> str:
    """A CSV cell a spreadsheet would run as a formula, made plain text with a leading
    apostrophe: one starting with ``=``, ``@``, a tab or a carriage return, or with ``+`` or
    ``-`` when the cell is not a number (``-4.2`` stays as it is)."""
    if not cell or cell[0] not in "=@+-\t\r":
        return cell
    if cell[0] in "+-":
        try:
            float(cell)
            return cell
        except ValueError:
            pass
    return "'" + cell


def temp_path_for(target: Path) -> Path:
    """The temporary name a writer uses beside ``target``: hidden, and marked as partial."""
    return target.with_name(f".{target.name}.partial-{os.getpid()}")


def remove_stale_partials(target: Path) -> list[Path]:
    """Remove the hidden partial files that killed runs left beside ``target`` (their process
    is gone); a partial of a run still going is left alone. Returns what was removed."""
    removed = []
    for path in target.parent.glob(f".{target.name}.partial-*"):
        pid = path.name.rsplit("-", 1)[-1]
        if not pid.isdigit() or int(pid) == os.getpid() or _alive(int(pid)):
            continue
        try:
            if path.is_dir():
                import shutil

                shutil.rmtree(path)
            else:
                path.unlink()
            removed.append(path)
        except OSError:
            pass
    return removed


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:  # a zombie (exited, not yet reaped) is not a running writer
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[-1].split()[0] != b"Z"
    except (OSError, IndexError):
        return True


class TableWriter:
    """Writes records to a temporary file beside the target; :meth:`commit` renames it into
    place (after fsync), :meth:`abort` removes it. As a context manager: commit on a clean
    exit, abort on an exception. Target ``-`` writes CSV or JSON Lines to standard output."""

    def __init__(
        self,
        target: str | Path,
        columns: Sequence[Column],
        fmt: str,
        row_group_size: int = 50_000,
        metadata: Mapping[str, str] | None = None,
    ) -> None:
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
                from gasrules.tables.readers import TableError

                raise TableError("-", "Parquet cannot be written to standard output", "an output path")
            self.target = self.temp = Path("-")
            self._file: Any = sys.stdout
        else:
            self.target = Path(target)
            if self.target.is_dir():
                from gasrules.tables.readers import TableError

                raise TableError(str(self.target), "is a directory", "an output file path")
            remove_stale_partials(self.target)
            self.temp = temp_path_for(self.target)
            self._file = None if fmt == "parquet" else open(self.temp, "w", encoding="utf-8", newline="")
        self._buffer: list[Sequence[Any]] = []
        self._row_group = row_group_size
        self._metadata = dict(metadata or {})  # Parquet key-value metadata (lineage)
        getattr(self, "_start_" + fmt)()

    def __enter__(self) -> TableWriter:
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

    def encoder(self) -> Encoder:
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
            return b"".join(
                orjson.dumps(dict(zip(names, r)), default=json_safe, option=opt) for r in rows
            ).decode()
        import pyarrow as pa

        if self._schema is None:
            self._schema = arrow_schema(self.columns)
        arrays = []
        for i, c in enumerate(self.columns):
            if c.kind in _PARQUET_AS_IS:
                col = [r[i] for r in rows]
            else:
                col = [_parquet_cell(r[i], c.kind) for r in rows]
            arrays.append(pa.array(col, type=self._schema.field(i).type))
        return pa.RecordBatch.from_arrays(arrays, schema=self._schema)


def arrow_schema(columns: Sequence[Column], metadata: Mapping[str, str] | None = None) -> Any:
    import pyarrow as pa

    return pa.schema(
        [pa.field(c.name, _arrow_type(c), metadata={"unit": c.unit} if c.unit else None) for c in columns],
        metadata=dict(metadata) if metadata else None,
    )


def open_writer(
    target: str | Path, columns: Sequence[Column], fmt: str | None = None, **options: Any
) -> TableWriter:
    """A writer for ``target`` (format from ``fmt`` or the suffix; ``-`` = stdout)."""
    from gasrules.tables.readers import FORMATS, TableError, detect_format

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
_CSV_CELL: dict[str, Any] = {
    "text": None,
    "number": None,
    "texts": _csv_texts,
    "records": _csv_json,
    "json": _csv_json,
    "value": _as_text,
    "raw": _csv_scalar,
    "guarded": neutralise_formula,
}


# kinds whose values Arrow takes as they are (numbers, lists of text, lists of records, typed raw)
_PARQUET_AS_IS = frozenset({"number", "texts", "records", "raw"})


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
    from gasrules.tables.readers import detect_format, parquet_files

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
