"""Rows are never half-read: CSV encodings, delimiters, decimal commas, huge fields, bytes that
are not UTF-8, formula-like cells, exit codes. The rulebook is the shipped adult one; the one
clinical case is pH 7.40, PCO2 40 mmHg, HCO3 24 mmol/L (common practice normal values), and
no test asserts more than whether it was read (not rejected).
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest

from gasrules.cli import main
from gasrules.tables.readers import TableError, analytes_of, open_table, read_back


def _batch(src: Path, out: Path, *extra: str) -> int:
    return main(["batch", str(src), str(out), *extra])


def _rows(path: Path) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))


@pytest.mark.parametrize("delimiter,bom", [(";", True), ("\t", False), (",", True)])
def test_delimiter_and_bom_are_detected(delimiter: str, bom: bool, tmp_path: Path) -> None:
    src = tmp_path / "in.csv"
    text = (
        delimiter.join(["case_id", "ph", "pco2", "hco3", "ward"])
        + "\n"
        + delimiter.join(["A1", "7.40", "40", "24", "ICU"])
        + "\n"
    )
    src.write_bytes((b"\xef\xbb\xbf" if bom else b"") + text.encode("utf-8"))
    assert _batch(src, tmp_path / "out.csv") == 0
    [row] = _rows(tmp_path / "out.csv")
    assert (row["case_id"], row["status"] != "rejected", row["ward"]) == ("A1", True, "ICU")


def test_utf16_file_is_refused(tmp_path: Path, shipped_rb: object) -> None:
    src = tmp_path / "in.csv"
    src.write_bytes("case_id,ph\nA1,7.40\n".encode("utf-16"))
    with pytest.raises(TableError) as exc:
        open_table(src, analytes_of(shipped_rb))
    assert "the file is UTF-16" in str(exc.value)


def test_header_collapsed_into_one_column_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    src = tmp_path / "in.csv"
    src.write_text("case_id ph pco2 hco3\nA1;7.40;40;24\n", encoding="utf-8")
    assert _batch(src, tmp_path / "out.csv") == 2
    assert (
        "in.csv:1: the header is one column but line 2 holds semicolon delimiters" in capsys.readouterr().err
    )
    assert not (tmp_path / "out.csv").exists()


def test_decimal_comma_when_asked_and_refused_when_ambiguous(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    src = tmp_path / "in.csv"
    src.write_text("case_id;ph;pco2;hco3\nA1;7,40;40,0;24\n", encoding="utf-8")
    assert _batch(src, tmp_path / "plain.csv") == 4  # "7,40" is not a number without the option
    assert _rows(tmp_path / "plain.csv")[0]["status"] == "rejected"
    assert _batch(src, tmp_path / "out.csv", "--decimal-comma") == 0
    assert _rows(tmp_path / "out.csv")[0]["status"] != "rejected"
    comma = tmp_path / "comma.csv"
    comma.write_text('case_id,ph\nA1,"7,40"\n', encoding="utf-8")
    capsys.readouterr()
    assert _batch(comma, tmp_path / "x.csv", "--decimal-comma") == 2
    assert "--decimal-comma is ambiguous in a comma-delimited file" in capsys.readouterr().err


def test_huge_quoted_field_and_non_utf8_cell_reject_only_their_row(tmp_path: Path) -> None:
    src = tmp_path / "in.csv"
    big = "x" * 1_100_000
    src.write_bytes(
        b"case_id,ph,pco2,hco3,note\n"
        b"A1,7.40,40,24,ok\n"
        b'A2,7.40,40,24,"' + big.encode() + b'\nsecond line of the note"\n'
        b"A3,7.40,40,24,caf\xe9\n"
        b"A4,7.40,40,24,fine\n"
    )
    assert _batch(src, tmp_path / "out.jsonl") == 4
    rows = read_back(tmp_path / "out.jsonl")
    assert [r["status"] == "rejected" for r in rows] == [False, True, True, False]  # 4 rows in, 4 out
    assert "longer than the limit of 1048576 bytes" in rows[1]["errors"][0]["message"]
    assert rows[1]["errors"][0]["message"].startswith("in.csv:3:")
    assert "cell 5 holds byte 0xe9, which is not UTF-8" in rows[2]["errors"][0]["message"]
    assert rows[3]["case_id"] == "A4"


def test_formula_like_passthrough_cells_are_neutralised(tmp_path: Path) -> None:
    src = tmp_path / "in.csv"
    src.write_text(
        'case_id,ph,pco2,hco3,a,b,c,d,e\nA1,7.40,40,24,=HYPERLINK("x"),-4.2,-cmd,@SUM(A1),+1\n',
        encoding="utf-8",
    )
    assert _batch(src, tmp_path / "out.csv") == 0
    [row] = _rows(tmp_path / "out.csv")
    assert [row[k] for k in "abcde"] == ['\'=HYPERLINK("x")', "-4.2", "'-cmd", "'@SUM(A1)", "+1"]
    assert _batch(src, tmp_path / "raw.csv", "--no-formula-guard") == 0
    assert _rows(tmp_path / "raw.csv")[0]["a"] == '=HYPERLINK("x")'


def test_a_file_where_every_row_is_rejected_never_exits_0(tmp_path: Path) -> None:
    src = tmp_path / "in.csv"
    src.write_text("case_id,ph\nA1,seven\nA2,eight\n", encoding="utf-8")
    assert _batch(src, tmp_path / "out.csv", "--allow-rejected") == 4
    mixed = tmp_path / "mixed.csv"
    mixed.write_text("case_id,ph,pco2,hco3\nA1,seven,40,24\nA2,7.40,40,24\n", encoding="utf-8")
    assert _batch(mixed, tmp_path / "m.csv") == 4
    assert _batch(mixed, tmp_path / "m2.csv", "--allow-rejected") == 0


@pytest.mark.parametrize(
    "header,likely",
    [
        ("paco2", "pco2"),
        ("PaCO2 (kPa)", "pco2"),
        ("bicarb", "hco3"),
        ("HCO3-", "hco3"),
        ("Sodium", "na"),
        ("albumn", "albumin"),
        ("lactat", "lactate"),
    ],
)
def test_a_column_that_looks_like_an_input_is_an_error(
    header: str, likely: str, tmp_path: Path, shipped_rb: object
) -> None:
    src = tmp_path / "in.csv"
    src.write_text(f"case_id,ph,{header}\nA1,7.40,1\n", encoding="utf-8")
    with pytest.raises(TableError) as exc:
        open_table(src, analytes_of(shipped_rb))
    assert f"column 3 '{header}': looks like input '{likely}'" in str(exc.value)


def test_a_look_alike_column_mapped_or_declared_passthrough_is_accepted(
    tmp_path: Path, shipped_rb: object
) -> None:
    from gasrules.tables.readers import mapping_from_data

    src = tmp_path / "in.csv"
    src.write_text("case_id,ph,paco2,area\nA1,7.40,40,x\n", encoding="utf-8")
    mapping = mapping_from_data({"columns": {"paco2": {"input": "pco2"}}, "passthrough": ["area"]})
    with open_table(src, analytes_of(shipped_rb), mapping=mapping) as table:
        [row] = list(table)
    assert row.case["pco2"] == "40" and row.passthrough == {"area": "x"}
    assert table.passthrough == ["area"]


# ---------------------------------------------------------------- killed runs

_POOL_SCRIPT = """
import os, sys, time
from gasrules.tables.pool import OrderedPool

def slow(payload, chunk):
    with open(os.path.join(payload, f"w{os.getpid()}"), "w") as fh:
        fh.write("up")
    time.sleep(60)
    return chunk

if __name__ == "__main__":
    with OrderedPool(slow, sys.argv[1], 2) as pool:
        for _ in pool.map([[1], [2], [3], [4]]):
            pass
"""


def _running(pid: int) -> bool:
    import os

    try:
        os.kill(pid, 0)
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[-1].split()[0] != b"Z"
    except (ProcessLookupError, FileNotFoundError):
        return False


def test_workers_exit_when_the_parent_is_killed(tmp_path: Path) -> None:
    import os
    import signal
    import subprocess
    import sys
    import time

    script = tmp_path / "parent.py"
    script.write_text(_POOL_SCRIPT, encoding="utf-8")
    root = Path(__file__).resolve().parents[1]
    proc = subprocess.Popen(
        [sys.executable, str(script), str(tmp_path)], env={**os.environ, "PYTHONPATH": str(root / "engine")}
    )
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and len(list(tmp_path.glob("w*"))) < 2:
        time.sleep(0.05)
    workers = [int(p.name[1:]) for p in tmp_path.glob("w*")]
    assert len(workers) == 2 and all(_running(w) for w in workers)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=10)
    gone_by = time.monotonic() + 5
    while time.monotonic() < gone_by and any(_running(w) for w in workers):
        time.sleep(0.05)
    assert not any(_running(w) for w in workers), "orphaned worker processes"


def test_next_run_removes_hidden_partials_of_killed_runs(tmp_path: Path) -> None:
    import subprocess
    import sys

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    target = tmp_path / "out.csv"
    stale = tmp_path / f".out.csv.partial-{dead.pid}"
    stale.write_text("half a result", encoding="utf-8")
    live = tmp_path / ".out.csv.partial-1"  # pid 1 is running: its partial stays
    live.write_text("another run", encoding="utf-8")
    other = tmp_path / f".other.csv.partial-{dead.pid}"  # another target: not ours to remove
    other.write_text("x", encoding="utf-8")
    src = tmp_path / "in.csv"
    src.write_text("case_id,ph,pco2,hco3\nA1,7.40,40,24\n", encoding="utf-8")
    assert _batch(src, target) == 0
    assert not stale.exists() and live.exists() and other.exists() and target.exists()


def test_a_stray_quote_inside_an_unquoted_field_does_not_merge_rows(tmp_path: Path) -> None:
    src = tmp_path / "in.csv"
    src.write_text(
        "case_id,ph,pco2,hco3,height\n"
        "A1,7.40,40,24,5'11\"\n"
        "A2,7.40,40,24,6'0\"\n"
        'A3,7.40,40,24,"two\nlines"\n',
        encoding="utf-8",
    )
    assert _batch(src, tmp_path / "out.jsonl") == 0
    rows = read_back(tmp_path / "out.jsonl")
    assert [(r["case_id"], r["height"]) for r in rows] == [
        ("A1", "5'11\""),
        ("A2", "6'0\""),
        ("A3", "two\nlines"),
    ]
