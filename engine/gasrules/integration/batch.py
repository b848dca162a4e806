"""The batch run: a table of cases in, one result row per input row out, in the same order.

    summary = run_batch(rb, "gases.csv", "results.parquet", BatchOptions(workers=2))
    print(summary.render())

Rows are read by :mod:`gasrules.tables.readers` (CSV, JSON Lines, Parquet), interpreted on
:mod:`gasrules.tables.pool` worker processes in chunks, and written in input order to a temporary file
that is renamed into place only when every row is written. N rows in, N rows out: a row the
reader cannot parse, and a case the engine rejects, both come out with status ``rejected`` and
their errors inline.

Output columns, in order: the pass-through columns (renamed ``<name>_input`` only when they
clash with a result column), ``case_id``, ``status``, ``headline``, ``disorders`` (codes),
``qualifiers`` (``disorder:qualifier``), one column per key value (by default every value the
rulebook reports, named as in the rulebook, in its unit), ``findings`` (codes), ``errors``
({field, code, message, accepted}) and, with ``full_json``, ``result`` (the whole result
contract with its trace). Lists are ``;``-separated text in CSV, lists in JSON Lines and
Parquet; ``errors`` is JSON text in CSV.

A run may carry :class:`RunHooks` (strict mode, decision records and shadow mode, from the
runtime settings): the rulebook is admitted once before the first row, workers also interpret
with the candidate when there is one, and every result passes through ``observe`` in input
order in this process.
"""

from __future__ import annotations

import json
import sys
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from gasrules.tables.pool import OrderedPool, chunked
from gasrules.tables.readers import (
    Column,
    ColumnMapping,
    Row,
    Table,
    analytes_of,
    interpret_row,
    open_table,
    open_writer,
)

__all__ = [
    "RESULT_COLUMNS",
    "BatchOptions",
    "BatchSummary",
    "Progress",
    "RunHooks",
    "interpret_chunk",
    "lineage",
    "output_columns",
    "record_values",
    "run_batch",
]

RESULT_COLUMNS = ("case_id", "status", "headline", "disorders", "qualifiers")
TAIL_COLUMNS = ("findings", "errors")
ERROR_FIELDS = ("field", "code", "message", "accepted")
STATUSES = ("interpreted", "partial", "inconsistent", "rejected")


@dataclass(frozen=True)
class BatchOptions:
    workers: int = 1
    chunk_size: int = 500
    full_json: bool = False
    values: tuple[str, ...] | None = None  # key value columns; None = every reported value
    in_format: str | None = None
    out_format: str | None = None
    mapping: ColumnMapping | None = None
    progress: bool | None = None  # None: only when stderr is a terminal
    formula_guard: bool = True  # neutralise formula-like pass-through cells in CSV output
    decimal_comma: bool = False  # CSV input: numbers written with a decimal comma


@dataclass
class RunHooks:
    """What the runtime settings add to a run. ``rulebook`` replaces the one given (after
    admission: strict mode, suspended rules); ``candidate`` is also run on every case (shadow
    mode); ``observe(case, result, candidate_result, unreadable)`` sees every result in input
    order (decision records, shadow disagreements); ``trace`` asks workers for traced results;
    ``close`` ends the run (it is called once, also after a failure)."""

    rulebook: Any = None
    candidate: Any = None
    trace: bool = False
    observe: Callable[[Any, dict[str, Any], dict[str, Any] | None, bool], None] | None = None
    close: Callable[[], None] | None = None
    notes: list[str] = field(default_factory=list)


@dataclass
class BatchSummary:
    rows: int = 0
    unreadable: int = 0
    by_status: Counter[str] = field(default_factory=Counter)
    by_disorder: Counter[str] = field(default_factory=Counter)
    seconds: float = 0.0
    output: str = ""
    rulebook: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def rejected(self) -> int:
        return self.by_status.get("rejected", 0)

    def add(self, status: str, disorders: Sequence[str], unreadable: bool) -> None:
        self.rows += 1
        self.unreadable += unreadable
        self.by_status[status] += 1
        if status in ("interpreted", "partial"):
            self.by_disorder.update(disorders or ("none",))

    def as_dict(self) -> dict[str, Any]:
        return {
            "rows_in": self.rows,
            "rows_out": self.rows,
            "unreadable_rows": self.unreadable,
            "by_status": {s: self.by_status.get(s, 0) for s in STATUSES},
            "by_disorder": dict(sorted(self.by_disorder.items(), key=lambda kv: (-kv[1], kv[0]))),
            "seconds": round(self.seconds, 3),
            "output": self.output,
            "rulebook": self.rulebook,
            "notes": list(self.notes),
        }

    def render(self) -> str:
        rate = self.rows / self.seconds if self.seconds > 0 else 0.0
        lines = [
            f"{self.rows:,} rows in, {self.rows:,} results out in {self.seconds:.1f} s "
            f"({rate:,.0f} rows/s) -> {self.output}",
            "by status:   "
            + ", ".join(f"{s} {self.by_status.get(s, 0):,}" for s in STATUSES)
            + (f" (of the rejected, {self.unreadable:,} unreadable rows)" if self.unreadable else ""),
        ]
        if self.by_disorder:
            lines.append("by disorder (interpreted and partial cases; a case may have several):")
            for name, n in sorted(self.by_disorder.items(), key=lambda kv: (-kv[1], kv[0])):
                lines.append(f"  {n:>10,}  {name}")
        if self.rulebook:
            rb = self.rulebook
            lines.append(
                f"rulebook {rb.get('id')} {rb.get('version')} (sha256 {str(rb.get('sha256'))[:16]}...)"
            )
        lines += self.notes
        lines.append(
            "Decision support only: it supports, never replaces, clinical judgement; "
            "local laboratory ranges and protocols prevail."
        )
        return "\n".join(lines)


# ----------------------------------------------------------------------------- columns


def value_names(rb: Any, wanted: Sequence[str] | None) -> list[str]:
    reported = [n for n, d in rb.derived.items() if d.report]
    if wanted is None:
        return reported
    unknown = [n for n in wanted if n not in rb.derived]
    if unknown:
        from gasrules.tables.readers import TableError

        raise TableError(
            "--values",
            f"not a derived value of rulebook {rb.id}: {', '.join(unknown)}",
            "names from: " + ", ".join(reported),
        )
    return list(wanted)


def output_columns(
    rb: Any, table: Table, options: BatchOptions
) -> tuple[list[Column], list[tuple[str, str]]]:
    """(output columns, [(pass-through column, its output name)])."""
    values = value_names(rb, options.values)
    fixed = set(RESULT_COLUMNS) | set(values) | set(TAIL_COLUMNS) | {"result"}
    renames: list[tuple[str, str]] = []
    taken: set[str] = set()
    for name in table.passthrough:
        out = name
        while out in fixed or out in taken:
            out = f"{out}_input"
        taken.add(out)
        renames.append((name, out))

    def kind(name: str) -> str:
        if table.fmt == "csv":  # CSV cells are text (or None for a short row)
            return "guarded" if options.formula_guard else "text"
        if table.fmt == "jsonl":
            return "json" if name == "context" else "value"
        return "raw"  # Parquet: the input column's own type

    cols = [Column(out, kind(name), arrow_type=table.passthrough_types.get(name)) for name, out in renames]
    cols += [
        Column("case_id"),
        Column("status"),
        Column("headline"),
        Column("disorders", "texts"),
        Column("qualifiers", "texts"),
    ]
    cols += [Column(n, "number", unit=rb.derived[n].unit) for n in values]
    cols += [Column("findings", "texts"), Column("errors", "records", fields=ERROR_FIELDS)]
    if options.full_json:
        cols.append(Column("result", "json"))
    return cols, renames


def record_values(
    row: Row,
    result: dict[str, Any],
    renames: Sequence[tuple[str, str]],
    values: Sequence[str],
    full_json: bool,
) -> list[Any]:
    """One output record as values in the order of :func:`output_columns`."""
    passthrough = row.passthrough
    out: list[Any] = [passthrough.get(name) for name, _ in renames]
    case_id = result.get("case_id")
    if case_id is None:
        raw = row.case.get("case_id") if isinstance(row.case, dict) else None
        case_id = None if raw is None else str(raw)
    got = result["values"]
    out += [
        case_id,
        result["status"],
        result["headline"],
        list(result["disorders"]),
        [f"{d}:{q}" for d, q in result["qualifiers"].items()],
    ]
    out += [got.get(n) for n in values]
    out.append([f["code"] for f in result["findings"]])
    out.append([{k: str(e.get(k, "")) for k in ERROR_FIELDS} for e in result["errors"]])
    if full_json:
        out.append(result)
    return out


# ----------------------------------------------------------------------------- workers


@dataclass(frozen=True)
class _Job:
    rulebook: Any
    candidate: Any
    renames: tuple[tuple[str, str], ...]
    values: tuple[str, ...]
    full_json: bool
    trace: bool
    keep: bool  # return case, result and candidate result for hooks
    encoder: Any = None  # tabular.Encoder: chunks leave the worker encoded


def interpret_chunk(job: _Job, rows: list[Row]) -> tuple[Any, list[tuple[Any, ...]]]:
    """Worker: rows -> (the chunk's records, encoded when the job has an encoder, else value
    lists; [(status, disorders, unreadable, hook data or None)] per row)."""
    recs, stats = [], []
    trace = job.trace or job.full_json
    for row in rows:
        result = _safe(job.rulebook, row, trace)
        recs.append(record_values(row, result, job.renames, job.values, job.full_json))
        extra = None
        if job.keep:
            other = _safe(job.candidate, row, False) if job.candidate is not None else None
            extra = (row.case, result, other, bool(row.errors))
        stats.append((result["status"], result["disorders"], bool(row.errors), extra))
    return (job.encoder(recs) if job.encoder is not None else recs), stats


def _safe(rb: Any, row: Row, trace: bool) -> dict[str, Any]:
    """interpret_row, and a rejected result (never a lost row) if the engine itself fails."""
    try:
        return interpret_row(rb, row, trace)
    except Exception as exc:
        broken = Row(
            row.index,
            row.where,
            row.case,
            row.passthrough,
            [
                {
                    "field": "",
                    "code": "input.unreadable",
                    "message": f"{row.where}: the engine failed on this row ({type(exc).__name__}: {exc})",
                    "accepted": "a case the engine can evaluate (please report this row)",
                }
            ],
        )
        from gasrules.tables.readers import rejected_result

        return rejected_result(rb, broken)


# ----------------------------------------------------------------------------- progress


class Progress:
    """A progress bar drawn by rich on a terminal (stderr); silent otherwise.

    ``share()`` is the part of the input read so far (0..1). Redrawn at most five times a
    second from ``update`` (no refresh thread: worker processes may be started after it)."""

    def __init__(self, stream: TextIO, share: Callable[[], float], enabled: bool | None = None) -> None:
        self.stream, self.share = stream, share
        self.enabled = stream.isatty() if enabled is None else enabled
        self.t0 = time.monotonic()
        self.last = 0.0
        self._bar: Any = None
        if self.enabled:
            from rich.console import Console
            from rich.progress import BarColumn, TaskProgressColumn, TextColumn, TimeRemainingColumn
            from rich.progress import Progress as Bar

            self._bar = Bar(
                TaskProgressColumn(),
                BarColumn(bar_width=30),
                TextColumn("{task.fields[rows]:,} rows  {task.fields[rate]:,.0f}/s"),
                TextColumn("eta"),
                TimeRemainingColumn(),
                console=Console(file=stream),
                auto_refresh=False,
                transient=False,
            )
            self._task = self._bar.add_task("", total=1.0, rows=0, rate=0.0)
            self._bar.start()

    def update(self, rows: int, force: bool = False) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if not force and now - self.last < 0.2:
            return
        self.last = now
        done = max(0.0, min(self.share(), 1.0))
        rate = rows / max(now - self.t0, 1e-9)
        self._bar.update(self._task, completed=done, rows=rows, rate=rate)
        self._bar.refresh()

    def finish(self, rows: int) -> None:
        if self.enabled:
            self.update(rows, force=True)
        self.close()

    def close(self) -> None:
        """Stop drawing (the cursor comes back); also after a failed run."""
        if self._bar is not None:
            self._bar.stop()
            self._bar = None
            self.enabled = False


# ----------------------------------------------------------------------------- the run


def records(
    rb: Any,
    table: Table,
    options: BatchOptions,
    summary: BatchSummary,
    hooks: RunHooks | None = None,
    progress: Progress | None = None,
    renames: Sequence[tuple[str, str]] = (),
    encoder: Any = None,
) -> Iterator[tuple[Any, int]]:
    """(block, rows in it) chunk by chunk, in input order: a block is the chunk encoded by
    ``encoder`` (tabular.Encoder, run in the workers) or, without one, a list of value lists in
    column order. The summary is filled, and the hooks see every result, as chunks pass."""
    hooks = hooks or RunHooks()
    keep = hooks.observe is not None
    job = _Job(
        rb,
        hooks.candidate,
        tuple(renames),
        tuple(value_names(rb, options.values)),
        options.full_json,
        hooks.trace,
        keep,
        encoder,
    )
    with OrderedPool(interpret_chunk, job, options.workers) as pool:
        for block, stats in pool.map(chunked(table, options.chunk_size)):
            for status, disorders, unreadable, extra in stats:
                if keep and extra is not None:
                    hooks.observe(*extra)  # type: ignore[misc]
                summary.add(status, disorders, unreadable)
            if progress is not None:
                progress.update(summary.rows)
            yield block, len(stats)


def run_batch(
    rb: Any,
    source: str | Path,
    target: str | Path = "-",
    options: BatchOptions | None = None,
    hooks: RunHooks | None = None,
    stderr: TextIO | None = None,
) -> BatchSummary:
    """Interpret every row of ``source`` and write ``target`` (``-``: standard output).
    Raises TableError for an input, header or mapping that cannot be used (nothing written)."""
    options = options or BatchOptions()
    hooks = hooks or RunHooks()
    rb = hooks.rulebook if hooks.rulebook is not None else rb
    stderr = stderr if stderr is not None else sys.stderr
    summary = BatchSummary(output=str(target), rulebook=dict(rb.identity), notes=hooks.notes)
    t0 = time.perf_counter()
    try:
        with open_table(
            source,
            analytes_of(rb),
            mapping=options.mapping,
            fmt=options.in_format,
            decimal_comma=options.decimal_comma,
        ) as table:
            columns, renames = output_columns(rb, table, options)
            out_fmt = options.out_format or _default_out_format(target, table.fmt)
            progress = Progress(stderr, table.progress, options.progress)
            try:
                with open_writer(target, columns, out_fmt, metadata=lineage(rb)) as writer:
                    for block, count in records(
                        rb, table, options, summary, hooks, progress, renames, writer.encoder()
                    ):
                        writer.write_block(block, count)
                progress.finish(summary.rows)
            finally:
                progress.close()
    finally:
        if hooks.close is not None:
            hooks.close()
    summary.seconds = time.perf_counter() - t0
    return summary


def lineage(rb: Any) -> dict[str, str]:
    """Key-value metadata stored in every Parquet output: which rulebook and engine wrote it."""
    return {
        "gasrules.rulebook": json.dumps(rb.identity, sort_keys=True),
        "gasrules.engine_version": str(rb.engine_version),
    }


def _default_out_format(target: str | Path, in_fmt: str) -> str:
    if str(target) == "-":
        return "csv" if in_fmt == "parquet" else in_fmt
    from gasrules.tables.readers import detect_format

    return detect_format(target)
