"""The batch run on a Dask cluster: partitioned Parquet in, partitioned Parquet out.

    summary = run_distributed(rb, "gases/", "results/", BatchOptions(), scheduler="tcp://sched:8786")

The input is one Parquet file or a directory of them (``year=2026/month=03/part-0.parquet``
...; names starting with ``.`` or ``_`` are skipped). Each input file is one task; a single
file is split into one task per group of row groups. Every task runs on a worker the same code
as ``gasrules batch`` (tabular reader -> engine -> flat records -> Parquet part), so the rows of
the output parts, read in sorted path order, are identical to a single-process run over the same
input. The compiled rulebook is scattered to every worker once.

Output: a directory mirroring the input's relative paths (one part per input file, or
``part-00000.parquet``... for a split single file) plus ``_SUCCESS`` holding the summary as
JSON. Everything is written into a hidden ``.NAME.partial-PID`` directory beside the target and
renamed to the target only when every task has succeeded: a failed or killed run never leaves
a directory that looks complete. Workers must see the same filesystem (a shared volume, or run
the tasks where the data is); decision records and shadow mode are single-machine features.
"""

from __future__ import annotations

import json
import os
import shutil
import time
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from gasrules.integration.batch import BatchOptions, BatchSummary, lineage, output_columns, records
from gasrules.tables.readers import TableError, analytes_of, open_table, open_writer, parquet_files

__all__ = ["SUCCESS", "Task", "plan_tasks", "run_distributed", "run_task"]

SUCCESS = "_SUCCESS"
ROW_GROUPS_PER_TASK = 1


@dataclass(frozen=True)
class Task:
    """One unit of work: an input file (optionally some of its row groups) -> one output part."""

    number: int
    source: str
    row_groups: tuple[int, ...] | None
    part: str  # output path relative to the output directory


def plan_tasks(source: str | Path, row_groups_per_task: int = ROW_GROUPS_PER_TASK) -> list[Task]:
    """The tasks for an input, in output order."""
    import pyarrow.parquet as pq

    src = Path(source)
    files = parquet_files(src)
    if src.is_dir():
        names = pq.ParquetFile(files[0]).schema_arrow.names
        for f in files[1:]:  # footers only: every part must have the same columns
            other = pq.ParquetFile(f).schema_arrow.names
            if other != names:
                raise TableError(
                    str(f),
                    f"its columns differ from the first part's ({files[0].relative_to(src)})",
                    ", ".join(names),
                )
        return [Task(i, str(f), None, str(f.relative_to(src))) for i, f in enumerate(files)]
    groups = pq.ParquetFile(src).metadata.num_row_groups
    if groups <= row_groups_per_task:
        return [Task(0, str(src), None, "part-00000.parquet")]
    spans = [
        tuple(range(g, min(g + row_groups_per_task, groups))) for g in range(0, groups, row_groups_per_task)
    ]
    return [Task(i, str(src), span, f"part-{i:05d}.parquet") for i, span in enumerate(spans)]


def run_task(rb: Any, task: Task, options: BatchOptions, out_dir: str) -> dict[str, Any]:
    """On a worker: interpret one task's rows into its output part; return its counts."""
    summary = BatchSummary(output=task.part)
    t0 = time.perf_counter()
    target = Path(out_dir) / task.part
    target.parent.mkdir(parents=True, exist_ok=True)
    local = replace(options, workers=1, progress=False)
    with open_table(
        task.source, analytes_of(rb), mapping=options.mapping, fmt="parquet", row_groups=task.row_groups
    ) as table:
        columns, renames = output_columns(rb, table, local)
        with open_writer(target, columns, "parquet", metadata=lineage(rb)) as writer:
            for block, count in records(rb, table, local, summary, renames=renames, encoder=writer.encoder()):
                writer.write_block(block, count)
    summary.seconds = time.perf_counter() - t0
    out = summary.as_dict()
    out["by_status"] = dict(summary.by_status)
    out["by_disorder"] = dict(summary.by_disorder)
    out["unreadable_rows"] = summary.unreadable
    return out


def _partial_dir(target: Path) -> Path:
    return target.with_name(f".{target.name}.partial-{os.getpid()}")


def _check_target(target: Path) -> None:
    if target.exists() and (not target.is_dir() or any(target.iterdir())):
        raise TableError(
            str(target),
            "already exists and is not an empty directory",
            "a new directory name (results are never written over)",
        )


def run_distributed(
    rb: Any,
    source: str | Path,
    target: str | Path,
    options: BatchOptions | None = None,
    *,
    scheduler: str | None = None,
    local_workers: int | None = None,
    client: Any = None,
    row_groups_per_task: int = ROW_GROUPS_PER_TASK,
) -> BatchSummary:
    """Run the batch over partitioned Parquet on a Dask cluster: an existing ``client``, a
    ``scheduler`` address, or a LocalCluster of ``local_workers`` processes."""
    options = options or BatchOptions()
    if options.out_format not in (None, "parquet"):
        raise TableError("--format", "a distributed run writes partitioned Parquet", "parquet")
    if options.in_format not in (None, "parquet"):
        raise TableError(
            str(source), "a distributed run reads Parquet", "a .parquet file or a directory of them"
        )
    if str(target) == "-":
        raise TableError("-", "a distributed run writes a directory", "an output directory path")
    target = Path(target).resolve()
    _check_target(target)
    tasks = plan_tasks(source, row_groups_per_task)
    partial = _partial_dir(target)
    partial.mkdir(parents=True)
    t0 = time.perf_counter()
    try:
        own = client is None
        if own:
            client, cluster = _connect(scheduler, local_workers)
        try:
            parts = _submit(client, rb, tasks, options, str(partial))
        finally:
            if own:  # close what this run opened, never a caller's client
                client.close()
                if cluster is not None:
                    cluster.close()
        summary = _merge(parts, target, rb)
        summary.seconds = time.perf_counter() - t0
        (partial / SUCCESS).write_text(json.dumps(summary.as_dict(), indent=2) + "\n", encoding="utf-8")
        if target.exists():
            target.rmdir()  # empty (checked above); rename needs it gone
        os.rename(partial, target)
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return summary


def _connect(scheduler: str | None, local_workers: int | None) -> tuple[Any, Any]:
    from dask.distributed import Client, LocalCluster

    if scheduler:
        return Client(scheduler), None
    cluster = LocalCluster(
        n_workers=local_workers or 2, threads_per_worker=1, processes=True, dashboard_address=None
    )
    return Client(cluster), cluster


def _submit(
    client: Any, rb: Any, tasks: Sequence[Task], options: BatchOptions, out_dir: str
) -> list[dict[str, Any]]:
    [rb_future] = client.scatter([rb], broadcast=True)
    futures = client.map(
        run_task, [rb_future] * len(tasks), tasks, [options] * len(tasks), [out_dir] * len(tasks), pure=False
    )
    return list(client.gather(futures))


def _merge(parts: Sequence[dict[str, Any]], target: Path, rb: Any) -> BatchSummary:
    summary = BatchSummary(output=str(target), rulebook=dict(rb.identity))
    for p in parts:
        summary.rows += p["rows_in"]
        summary.unreadable += p["unreadable_rows"]
        summary.by_status.update(p["by_status"])
        summary.by_disorder.update(p["by_disorder"])
    summary.notes.append(f"{len(parts)} partitions written under {target}")
    return summary
