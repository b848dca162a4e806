"""The ordered worker pool and `gasrules batch`: N rows in, N rows out (malformed rows included),
identical output on 1 and 2 worker processes, results equal to the engine's own, settings
honoured, and a killed run that leaves no file looking complete.

The corpus is invented by the seeded demo generator (engine/gasrules/verification/casegen.py); every clinical
expectation is the engine's own answer for the same case, never a hard-coded conclusion.
"""

from __future__ import annotations

import csv
import importlib.util
import io
import json
import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.cli import main
from gasrules.integration.batch import BatchOptions, Progress, run_batch
from gasrules.tables.pool import OrderedPool, PoolError, chunked
from gasrules.tables.readers import read_back

ROOT = Path(__file__).resolve().parent.parent


def _tool() -> Any:
    spec = importlib.util.spec_from_file_location("make_demo_data", ROOT / "tools" / "make_demo_data.py")
    assert spec and spec.loader
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("make_demo_data", module)
    spec.loader.exec_module(module)
    return module


TOOL = _tool()


def _corpus(path: Path, n: int, fmt: str, seed: int = 11, malformed: float = 0.03) -> int:
    with path.open("w", encoding="utf-8", newline="") as f:
        written, bad = TOOL.write_corpus(f, n, seed, fmt, "hospital", malformed)
    assert bad > 0
    return written


@pytest.fixture(scope="module")
def rb() -> Any:
    return gasrules.load_rulebook()


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("corpus")
    out = {}
    for fmt in ("csv", "jsonl"):
        out[fmt] = d / f"gases.{fmt}"
        _corpus(out[fmt], 1200, fmt)
    return out


# ----------------------------------------------------------------------------- the pool
# Worker functions are module-level so spawned workers can import them by name.


class Counted:
    """A payload that counts how often it was unpickled in this process."""

    unpickled = 0

    def __init__(self, factor: int) -> None:
        self.factor = factor

    def __setstate__(self, state: dict[str, Any]) -> None:
        type(self).unpickled += 1
        self.__dict__.update(state)


def _scale(payload: Counted, chunk: list[int]) -> list[tuple[int, int, int]]:
    # later chunks finish first: numbers near 0 sleep longest
    time.sleep(max(0.0, 0.03 - 0.002 * chunk[0]))
    return [(x * payload.factor, os.getpid(), Counted.unpickled) for x in chunk]


def _explode(payload: Any, chunk: list[int]) -> list[int]:
    if 7 in chunk:
        raise ValueError("chunk with 7")
    return chunk


def _die(payload: Any, chunk: list[int]) -> list[int]:
    if 5 in chunk:
        os._exit(3)
    return chunk


def test_pool_keeps_order_and_sends_the_payload_once_per_worker() -> None:
    with OrderedPool(_scale, Counted(3), workers=2) as pool:
        out = [x for chunk in pool.map(chunked(range(40), 2)) for x in chunk]
    assert [v for v, _, _ in out] == [3 * x for x in range(40)]
    assert len({pid for _, pid, _ in out}) == 2 and os.getpid() not in {pid for _, pid, _ in out}
    assert {n for _, _, n in out} == {1}  # unpickled once in each worker, never per chunk


def test_pool_same_results_in_process_and_on_workers() -> None:
    one = [v for c in OrderedPool(_scale, Counted(5), 1).map(chunked(range(30), 4)) for v, _, _ in c]
    with OrderedPool(_scale, Counted(5), 2) as pool:
        two = [v for c in pool.map(chunked(range(30), 4)) for v, _, _ in c]
    assert one == two == [5 * x for x in range(30)]


def test_pool_reads_input_lazily_within_its_window() -> None:
    pulled = []

    def source() -> Any:
        for i in range(1000):
            pulled.append(i)
            yield [i]

    with OrderedPool(_scale, Counted(1), workers=2, window=3) as pool:
        results = pool.map(source())
        next(results)
        assert len(pulled) <= 4  # window + the one being taken
        results.close()


def test_pool_raises_a_worker_exception_at_its_place_in_the_order() -> None:
    got = []
    with OrderedPool(_explode, None, workers=2) as pool:
        with pytest.raises(ValueError, match="chunk with 7"):
            for chunk in pool.map(chunked(range(20), 2)):
                got.extend(chunk)
    assert got == list(range(6))


def test_pool_worker_death_is_a_pool_error() -> None:
    with OrderedPool(_die, None, workers=2) as pool:
        with pytest.raises(PoolError, match="worker process died"):
            list(pool.map(chunked(range(20), 2)))


# ----------------------------------------------------------------------------- batch


def _data_rows(path: Path) -> int:
    with path.open(encoding="utf-8", newline="") as f:
        if path.suffix == ".csv":
            return sum(1 for row in csv.reader(f) if row) - 1
        return sum(1 for line in f if line.strip())


@pytest.mark.parametrize("fmt_in", ["csv", "jsonl"])
def test_n_rows_in_n_rows_out_identical_on_one_and_two_workers(
    rb: Any, corpus: dict[str, Path], tmp_path: Path, fmt_in: str
) -> None:
    src = corpus[fmt_in]
    outs = {}
    for w in (1, 2):
        outs[w] = tmp_path / f"out{w}.csv"
        summary = run_batch(rb, src, outs[w], BatchOptions(workers=w, chunk_size=97), stderr=io.StringIO())
        assert summary.rows == _data_rows(src) == 1200
    assert outs[1].read_bytes() == outs[2].read_bytes()
    back = read_back(outs[1])
    assert len(back) == 1200
    assert [r["case_id"] for r in back] == [f"D{i:06d}" for i in range(1, 1201)]
    counted = Counter(r["status"] for r in back)
    assert dict(counted) == {k: v for k, v in summary.by_status.items() if v}
    assert counted["rejected"] >= 10  # the corpus' malformed rows, kept inline
    assert all(r["errors"] for r in back if r["status"] == "rejected")


def test_results_are_the_engines_own(rb: Any, corpus: dict[str, Path], tmp_path: Path) -> None:
    src = tmp_path / "first.jsonl"
    src.write_text("\n".join(corpus["jsonl"].read_text(encoding="utf-8").splitlines()[:300]) + "\n")
    out = tmp_path / "out.jsonl"
    run_batch(rb, src, out, BatchOptions(workers=2, full_json=True), stderr=io.StringIO())
    cases = [json.loads(line) for line in src.read_text(encoding="utf-8").splitlines()]
    back = read_back(out)
    for case, row in zip(cases, back, strict=True):
        want = gasrules.interpret(rb, case, trace=True)
        assert row["result"] == json.loads(json.dumps(want))
        assert (row["status"], row["disorders"], row["findings"]) == (
            want["status"],
            want["disorders"],
            [f["code"] for f in want["findings"]],
        )
        assert row["context"] == case["context"]
        assert row["anion_gap"] == want["values"].get("anion_gap")


def test_parquet_out_matches_csv_out(rb: Any, corpus: dict[str, Path], tmp_path: Path) -> None:
    run_batch(rb, corpus["csv"], tmp_path / "o.csv", stderr=io.StringIO())
    run_batch(rb, corpus["csv"], tmp_path / "o.parquet", BatchOptions(workers=2), stderr=io.StringIO())
    as_csv, as_pq = read_back(tmp_path / "o.csv"), read_back(tmp_path / "o.parquet")
    assert len(as_pq) == len(as_csv)
    for a, b in zip(as_csv, as_pq, strict=True):
        assert (a["case_id"], a["ward"], a["status"], a["disorders"]) == (
            b["case_id"],
            b["ward"],
            b["status"],
            ";".join(b["disorders"]),
        )
        assert (float(a["anion_gap"]) if a["anion_gap"] else None) == b["anion_gap"]


def test_passthrough_clash_renamed_and_values_option(rb: Any, tmp_path: Path) -> None:
    src = tmp_path / "g.csv"
    src.write_text("case_id,status,ph,pco2,hco3,na,cl\nX1,archived,7.40,40,24,140,104\n", encoding="utf-8")
    out = tmp_path / "o.csv"
    run_batch(rb, src, out, BatchOptions(values=("anion_gap",)), stderr=io.StringIO())
    header = out.read_text(encoding="utf-8").splitlines()[0].split(",")
    assert header == [
        "status_input",
        "case_id",
        "status",
        "headline",
        "disorders",
        "qualifiers",
        "anion_gap",
        "findings",
        "errors",
    ]
    [row] = read_back(out)
    want = gasrules.interpret(rb, {"case_id": "X1", "ph": 7.4, "pco2": 40, "hco3": 24, "na": 140, "cl": 104})
    assert row["status_input"] == "archived" and float(row["anion_gap"]) == want["values"]["anion_gap"]


def test_progress_bar_only_on_a_terminal(rb: Any, corpus: dict[str, Path], tmp_path: Path) -> None:
    class Tty(io.StringIO):
        def isatty(self) -> bool:
            return True

    quiet = io.StringIO()
    run_batch(rb, corpus["csv"], tmp_path / "a.csv", stderr=quiet)
    assert quiet.getvalue() == ""
    tty = Tty()
    p = Progress(tty, lambda: 0.5)
    p.update(10, force=True)
    p.finish(20)
    drawn = tty.getvalue()  # rich's bar, redrawn in place (carriage return), ended by a newline
    assert " 50%" in drawn and "━" in drawn and "\r" in drawn and "20 rows" in drawn
    assert drawn.endswith("\n\x1b[?25h")  # the cursor is shown again
    forced = io.StringIO()  # --progress on a pipe: no redrawing, one final line
    p = Progress(forced, lambda: 1.0, enabled=True)
    p.finish(20)
    assert forced.getvalue().startswith("100% ") and "\r" not in forced.getvalue()


# ----------------------------------------------------------------------------- the command


def test_cli_summary_and_usage_errors(
    corpus: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    summary = tmp_path / "s.json"
    code = main(
        [
            "batch",
            str(corpus["csv"]),
            str(tmp_path / "o.parquet"),
            "--workers",
            "2",
            "--summary-json",
            str(summary),
        ]
    )
    err = capsys.readouterr().err
    assert code == 4, err  # some rows were rejected (they are in the output)
    assert main(["batch", str(corpus["csv"]), str(tmp_path / "o2.parquet"), "--allow-rejected"]) == 0
    capsys.readouterr()
    data = json.loads(summary.read_text())
    assert data["rows_in"] == data["rows_out"] == 1200 and sum(data["by_status"].values()) == 1200
    assert "1,200 rows in, 1,200 results out" in err and "by disorder" in err and "clinical judgement" in err
    bad = tmp_path / "bad.csv"
    bad.write_text("ph,pco2[mg/dL]\n7.4,40\n", encoding="utf-8")
    assert main(["batch", str(bad), str(tmp_path / "x.csv")]) == 2
    assert "column 2 'pco2[mg/dL]': unit 'mg/dL' does not fit pco2" in capsys.readouterr().err
    assert main(["batch", str(bad), str(tmp_path / "x.csv"), "--format", "xml"]) == 2
    assert main(["batch", str(corpus["csv"]), "--rulebook", str(bad)]) == 5
    assert not (tmp_path / "x.csv").exists()


def test_cli_to_stdout(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    src = tmp_path / "g.csv"
    src.write_text("case_id,ph,pco2,hco3\nS1,7.40,40,24\nS2,7.4O,40,24\n", encoding="utf-8")
    assert main(["batch", str(src)]) == 4  # S2 rejected
    out = capsys.readouterr().out
    rows = list(csv.DictReader(io.StringIO(out)))
    assert [(r["case_id"], r["status"] == "rejected") for r in rows] == [("S1", False), ("S2", True)]


def test_strict_mode_refuses_an_unapproved_rulebook(
    corpus: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main(["batch", str(corpus["csv"]), str(tmp_path / "o.csv"), "--strict"])
    assert code == 6
    assert "strict" in capsys.readouterr().err and not (tmp_path / "o.csv").exists()


def test_decision_records_one_entry_per_row_and_shadow(
    corpus: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from gasrules.governance.audit import verify_log

    src = tmp_path / "first.csv"
    src.write_text("\n".join(corpus["csv"].read_text(encoding="utf-8").splitlines()[:301]) + "\n")
    settings = tmp_path / "settings.yaml"
    log = tmp_path / "decisions.jsonl"
    settings.write_text(
        f"decision_log:\n  path: {log}\n  fsync: false\n"
        f"shadow:\n  rulebook: {ROOT / 'rulebooks' / 'example-site' / 'rulebook.yaml'}\n"
        f"  log: {tmp_path / 'shadow.jsonl'}\n",
        encoding="utf-8",
    )
    assert (
        main(
            [
                "batch",
                str(src),
                str(tmp_path / "o.csv"),
                "--workers",
                "2",
                "--settings",
                str(settings),
                "--allow-rejected",
            ]
        )
        == 0
    )
    err = capsys.readouterr().err
    report = verify_log(log)
    assert report.entries == 300 and not report.errors
    assert "decision records appended" in err and "shadow candidate disagreed on" in err
    assert main(["batch", str(src), str(tmp_path / "plain.csv"), "--allow-rejected"]) == 0
    assert (tmp_path / "o.csv").read_bytes() == (
        tmp_path / "plain.csv"
    ).read_bytes()  # only the active result


# ----------------------------------------------------------------------------- a killed run


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM])
def test_killed_run_leaves_no_complete_looking_file(tmp_path: Path, sig: int) -> None:
    src = tmp_path / "big.csv"
    _corpus(src, 30_000, "csv", seed=3, malformed=0.001)
    target = tmp_path / "results.csv"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys; from gasrules.cli import main; sys.exit(main())",
            "batch",
            str(src),
            str(target),
            "--chunk-size",
            "50",
        ],
        stderr=subprocess.PIPE,
        env={**os.environ, "PYTHONPATH": str(ROOT / "engine")},
    )
    deadline = time.monotonic() + 30
    partial = []
    while time.monotonic() < deadline and proc.poll() is None:
        partial = [p for p in tmp_path.iterdir() if ".partial-" in p.name and p.stat().st_size > 10_000]
        if partial:
            break
        time.sleep(0.02)
    assert partial and proc.poll() is None, "the run ended before it could be killed"
    assert partial[0].name == f".results.csv.partial-{proc.pid}"
    proc.send_signal(sig)
    proc.wait(timeout=30)
    assert not target.exists()
    left = sorted(p.name for p in tmp_path.iterdir())
    if sig == signal.SIGTERM:
        assert left == ["big.csv"]  # the temporary file was removed
    else:
        assert left == sorted(["big.csv", partial[0].name])  # hidden, and named as partial


def test_repeated_headers_and_non_text_passthrough_are_kept(rb: Any, tmp_path: Path) -> None:
    src = tmp_path / "g.csv"
    src.write_text("case_id,note,ph,note\nR1,first,7.40,second\n", encoding="utf-8")
    run_batch(rb, src, tmp_path / "o.csv", BatchOptions(values=()), stderr=io.StringIO())
    [row] = read_back(tmp_path / "o.csv")
    assert (row["note"], row["note_4"]) == ("first", "second")
    mapping = tmp_path / "m.yaml"
    mapping.write_text("passthrough: [bed, tags]\n", encoding="utf-8")
    lines = tmp_path / "g.jsonl"
    lines.write_text(
        '{"case_id": "J1", "bed": 7, "tags": ["a", "b"], "ph": 7.4}\n'
        '{"case_id": "J2", "bed": "7b", "ph": 7.4}\n',
        encoding="utf-8",
    )
    from gasrules.tables.readers import load_mapping

    for out in ("o.parquet", "o2.csv"):
        run_batch(
            rb,
            lines,
            tmp_path / out,
            BatchOptions(values=(), mapping=load_mapping(mapping)),
            stderr=io.StringIO(),
        )
        back = read_back(tmp_path / out)
        assert [(r["bed"], r["tags"]) for r in back] == [
            ("7", '["a","b"]'),
            ("7b", None if out.endswith("parquet") else ""),
        ]


def test_cli_refusals_name_the_problem(
    corpus: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert (
        main(["batch", str(corpus["csv"]), str(tmp_path / "o.csv"), "--values", "anion_gap,gap_of_gaps"]) == 2
    )
    assert "--values: not a derived value of rulebook adult-default: gap_of_gaps" in capsys.readouterr().err
    settings = tmp_path / "s.yaml"
    settings.write_text(f"decision_log:\n  path: {tmp_path / 'log.jsonl'}\n", encoding="utf-8")
    assert (
        main(
            [
                "batch",
                str(corpus["csv"]),
                str(tmp_path / "out"),
                "--dask-local",
                "2",
                "--settings",
                str(settings),
            ]
        )
        == 2
    )
    assert "decision records and shadow mode need a single-machine run" in capsys.readouterr().err
    assert (
        main(["batch", str(corpus["csv"]), str(tmp_path / "out"), "--dask", "tcp://x:1", "--dask-local", "2"])
        == 2
    )
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.yaml"]


# ----------------------------------------------------------------------------- demo messages


def test_demo_messages_are_reproducible_and_read_back(tmp_path: Path, rb: Any) -> None:
    """The shipped FHIR bundles and HL7 v2 messages come from the corpus generator: regenerating
    them gives the same bytes, and each reads back to the same case (demo data, invented)."""
    from gasrules.integration.fhir import case_from_fhir
    from gasrules.integration.hl7v2 import cases_from_hl7

    assert TOOL.run(["messages", "--out", str(tmp_path)]) == 0
    shipped = ROOT / "tools" / "demo" / "generated"
    made = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*") if p.is_file())
    assert made == sorted(p.relative_to(shipped) for p in shipped.rglob("*") if p.is_file())
    assert all((tmp_path / p).read_bytes() == (shipped / p).read_bytes() for p in made)
    reads = list(cases_from_hl7((tmp_path / "hl7" / "all.hl7").read_text(), rb.inputs))
    assert len(reads) == 13 and all(r.issues == () for r in reads)
    for r in reads:
        bundle = json.loads((tmp_path / "fhir" / f"{r.case['case_id']}.json").read_text())
        fhir = case_from_fhir(bundle, rb.inputs)
        assert fhir.issues == ()
        from_hl7 = gasrules.interpret(rb, r.case, trace=False)
        from_fhir = gasrules.interpret(rb, {**fhir.case, "case_id": r.case["case_id"]}, trace=False)
        assert (from_hl7["inputs"], from_hl7["disorders"]) == (from_fhir["inputs"], from_fhir["disorders"])
