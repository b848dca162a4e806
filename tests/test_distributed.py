"""The batch on a real Dask cluster (a LocalCluster with a scheduler and two worker processes):
partitioned Parquet in, partitioned Parquet out, rows identical to the single-process run, and a
failed run that leaves no output directory behind.

Cases are invented by the seeded demo generator; expected results are the single-process
batch's own output for the same files, never hard-coded conclusions.
"""

from __future__ import annotations

import io
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.cli import main
from gasrules.integration.batch import BatchOptions, run_batch
from gasrules.integration.distributed import SUCCESS, Task, plan_tasks, run_distributed
from gasrules.tables.readers import TableError, read_back
from gasrules.verification.casegen import CODED_INPUTS, generate_cases, to_canonical

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")
distributed = pytest.importorskip("dask.distributed")

NUMBERS = (
    "age",
    "ph",
    "pco2",
    "po2",
    "hco3",
    "base_excess",
    "na",
    "k",
    "cl",
    "albumin",
    "lactate",
    "glucose",
    "fio2",
    "so2",
    "hb",
)


def _flat(case: dict[str, Any]) -> dict[str, Any]:
    row: dict[str, Any] = {"case_id": case["case_id"], **case["context"]}
    for name in NUMBERS:
        value = case.get(name)
        row[name] = None if value is None else float(to_canonical(name, value))
    for name in CODED_INPUTS:
        row[name] = case.get(name)
    row["pregnant"] = case.get("pregnant")
    return row


def _table(start: int, n: int, seed: int) -> Any:
    rows = [_flat(c) for c in generate_cases(n, seed)]
    for i, r in enumerate(rows):
        r["case_id"] = f"P{start + i:06d}"
        if i % 97 == 5:
            r["ph"] = 73.4  # a decimal slip: rejected inline, never dropped
    return pa.Table.from_pylist(rows)


@pytest.fixture(scope="module")
def client() -> Iterator[Any]:
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None
    )
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


@pytest.fixture(scope="module")
def rb() -> Any:
    return gasrules.load_rulebook()


@pytest.fixture(scope="module")
def warehouse(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("wh") / "gases"
    for month, seed, n in (("03", 1, 400), ("04", 2, 250)):
        d = root / "year=2026" / f"month={month}"
        d.mkdir(parents=True)
        pq.write_table(_table(seed * 1000, n, seed), d / "part-0.parquet")
        pq.write_table(_table(seed * 1000 + n, 120, seed + 10), d / "part-1.parquet")
    (root / SUCCESS).write_text("")
    return root


def test_partitions_in_partitions_out_identical_to_single_process(
    client: Any, rb: Any, warehouse: Path, tmp_path: Path
) -> None:
    out = tmp_path / "results"
    summary = run_distributed(rb, warehouse, out, BatchOptions(), client=client)
    parts = sorted(str(p.relative_to(out)) for p in out.rglob("*.parquet"))
    assert parts == [
        "year=2026/month=03/part-0.parquet",
        "year=2026/month=03/part-1.parquet",
        "year=2026/month=04/part-0.parquet",
        "year=2026/month=04/part-1.parquet",
    ]
    single = tmp_path / "single.parquet"
    one = run_batch(rb, warehouse, single, BatchOptions(workers=1), stderr=io.StringIO())
    assert read_back(out) == read_back(single)
    assert summary.rows == one.rows == 400 + 120 + 250 + 120
    assert summary.by_status == one.by_status and summary.by_disorder == one.by_disorder
    assert summary.by_status["rejected"] >= 8
    done = json.loads((out / SUCCESS).read_text())
    assert done["rows_in"] == done["rows_out"] == summary.rows
    for part in out.rglob("*.parquet"):  # lineage in every part's metadata
        meta = pq.ParquetFile(part).schema_arrow.metadata
        assert json.loads(meta[b"gasrules.rulebook"]) == rb.identity == done["rulebook"]
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_single_file_split_by_row_groups(client: Any, rb: Any, tmp_path: Path) -> None:
    src = tmp_path / "gases.parquet"
    pq.write_table(_table(1, 700, 5), src, row_group_size=200)
    assert [t.row_groups for t in plan_tasks(src)] == [(0,), (1,), (2,), (3,)]
    out = tmp_path / "results"
    run_distributed(rb, src, out, client=client)
    assert sorted(p.name for p in out.iterdir()) == [SUCCESS] + [f"part-0000{i}.parquet" for i in range(4)]
    run_batch(rb, src, tmp_path / "single.parquet", stderr=io.StringIO())
    back = read_back(out)
    assert back == read_back(tmp_path / "single.parquet") and len(back) == 700
    assert [r["case_id"] for r in back] == [f"P{i:06d}" for i in range(1, 701)]


def test_failed_run_leaves_no_output_directory(
    client: Any, rb: Any, warehouse: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    src = tmp_path / "mixed"
    src.mkdir()
    pq.write_table(_table(1, 50, 1), src / "a.parquet")
    pq.write_table(_table(51, 50, 1).drop(["ward"]), src / "b.parquet")  # a partition with other columns
    out = tmp_path / "results"
    with pytest.raises(
        TableError, match=r"b.parquet: its columns differ from the first part's \(a.parquet\)"
    ):
        run_distributed(rb, src, out, client=client)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mixed"]  # refused before any work
    (src / "b.parquet").unlink()
    real = plan_tasks(src)
    gone = Task(1, str(src / "vanished.parquet"), None, "vanished.parquet")  # fails on a worker
    monkeypatch.setattr("gasrules.integration.distributed.plan_tasks", lambda *a: [*real, gone])
    with pytest.raises(TableError, match="no such file"):
        run_distributed(rb, src, out, client=client)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mixed"]  # no results, no partial directory
    (tmp_path / "taken").mkdir()
    (tmp_path / "taken" / "x").write_text("")
    with pytest.raises(TableError, match="already exists"):
        run_distributed(rb, warehouse, tmp_path / "taken", client=client)


def test_cli_on_a_running_scheduler(
    client: Any, warehouse: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "results"
    code = main(["batch", str(warehouse), str(out), "--dask", client.scheduler.address, "--allow-rejected"])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "890 rows in, 890 results out" in err and "4 partitions written" in err
    assert (
        main(
            [
                "batch",
                str(warehouse),
                str(tmp_path / "x"),
                "--dask",
                client.scheduler.address,
                "--format",
                "csv",
            ]
        )
        == 2
    )
    assert "a distributed run writes partitioned Parquet" in capsys.readouterr().err
