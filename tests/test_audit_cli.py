"""`gasrules audit verify|replay|repair` on logs written by the runtime with a released rulebook:
a clean log, a tampered, a truncated and a reordered one, a torn tail, and replay from the archive.

Rulebook: tests/data/release (pH state; common-practice arterial pH interval 7.35-7.45).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

import gasrules
from gasrules.cli import main
from gasrules.governance.decision_log import DecisionLog, RecordConfig, anchor_path
from gasrules.governance.release import Approver, release
from gasrules.governance.runtime import Runtime
from gasrules.governance.settings import Settings

DATA = Path(__file__).resolve().parent / "data" / "release"
# pH values either side of the common-practice interval 7.35-7.45
CASES = [
    {"case_id": f"c{i}", "ph": ph, "context": {"mrn": f"M{i}"}}
    for i, ph in enumerate([7.20, 7.40, 7.55, 7.30, 7.41], 1)
]


@pytest.fixture
def logged(tmp_path: Path) -> tuple[Path, Path]:
    """(decision log of five cases, release directory with the archive)."""
    book = tmp_path / "book"
    shutil.copytree(DATA, book)
    rel = tmp_path / "rel"
    release(
        book / "rulebook.yaml",
        release_dir=rel,
        approvers=[Approver("B. Reviewer", "clinical lead")],
        authors=["A. Author"],
    )
    log = tmp_path / "decisions.jsonl"
    settings = Settings(strict=True, release_dir=rel, decision_log=log, log_fsync=False)
    with Runtime.from_settings(settings, book / "rulebook.yaml") as rt:
        list(rt.interpret_many(CASES))
    return log, rel


def lines(log: Path) -> list[bytes]:
    return log.read_bytes().splitlines(keepends=True)


def run(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str]:
    code = main(["audit", *args])
    out = capsys.readouterr()
    return code, out.out + out.err


def test_clean_log_verifies_and_replays(
    logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    log, rel = logged
    code, out = run(capsys, "verify", str(log))
    assert code == 0 and out.startswith(f"{log}: ok, 5 entries, last ")
    code, out = run(capsys, "replay", str(log), "--archive", str(rel / "archive"))
    assert (code, out) == (0, f"{log}: 5 same\n")
    assert "M1" not in log.read_text(), "identifiers in context are dropped by default"


def test_tampered_entry_is_named(logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    log, _ = logged
    rows = lines(log)
    entry = json.loads(rows[2])
    entry["result"]["findings"] = []  # hide what the engine said
    rows[2] = json.dumps(entry, sort_keys=True, separators=(",", ":")).encode() + b"\n"
    log.write_bytes(b"".join(rows))
    code, out = run(capsys, "verify", str(log))
    assert code == 1
    assert f"{log}:3: entry_hash_mismatch (seq 3): the entry was modified" in out
    assert out.endswith("first problem: line 3: entry_hash_mismatch: the log was altered or damaged\n")


def test_truncated_log_is_named(logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    log, _ = logged
    log.write_bytes(b"".join(lines(log)[:3]))  # last two entries cut off, anchor untouched
    code, out = run(capsys, "verify", str(log), "--json")
    report = json.loads(out)
    assert code == 1 and report["entries"] == 3
    assert report["first_problem"]["code"] == "truncated" and report["first_problem"]["line"] == 4
    assert "the anchor says 5 entries" in report["first_problem"]["message"]


def test_reordered_log_is_named(logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    log, _ = logged
    rows = lines(log)
    rows[1], rows[2] = rows[2], rows[1]
    log.write_bytes(b"".join(rows))
    code, out = run(capsys, "verify", str(log))
    assert code == 1
    assert (
        f"{log}:2: chain_break (seq 3): seq 3 found where 2 was expected: entries reordered or duplicated"
        in out
    )


def test_torn_tail_is_told_apart_from_tampering_and_repaired(
    logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    log, rel = logged
    with open(log, "ab") as fh:
        fh.write(b'{"kind":"decision","seq":6,"inp')  # a crash in the middle of an append
    code, out = run(capsys, "verify", str(log))
    assert code == 1 and "torn_tail" in out
    assert out.endswith(
        "first problem: line 6: torn_tail: a crash left a torn last line (run: gasrules audit repair)\n"
    )
    code, out = run(capsys, "repair", str(log))
    assert code == 0 and "truncated_torn_tail" in out and "recorded as entry 6" in out
    code, out = run(capsys, "verify", str(log))
    assert code == 0 and "repair entry seq 6: truncated_torn_tail" in out
    code, out = run(capsys, "replay", str(log), "--archive", str(rel / "archive"))
    assert code == 0 and out == f"{log}: 5 same\n"


def test_replay_reports_a_result_the_rulebook_would_not_give(
    tmp_path: Path, logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    _, rel = logged
    rb = gasrules.load_rulebook(DATA / "rulebook.yaml")
    case = {"case_id": "odd", "ph": 7.20}  # below 7.35: acidaemia (common practice)
    result = gasrules.interpret(rb, case)
    result["findings"] = [
        dict(result["findings"][0], code="ph.normal")
    ]  # a wrong conclusion, logged honestly
    log = tmp_path / "odd.jsonl"
    with DecisionLog(log, RecordConfig(fsync=False)) as dl:
        dl.append(case, result, rulebook=rb)
    code, out = run(capsys, "replay", str(log), "--archive", str(rel / "archive"))
    assert code == 1
    assert out == (
        f"{log}: 1 differs\n  line 1 (seq 1): differs\n    findings: ['ph.normal'] -> ['ph.acidaemia']\n"
    )


def test_replay_without_the_archived_rulebook(
    logged: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log, _ = logged
    empty = tmp_path / "empty-archive"
    empty.mkdir()
    code, out = run(capsys, "replay", str(log), "--archive", str(empty))
    assert code == 1 and out.startswith(f"{log}: 5 rulebook_missing\n")
    code, out = run(capsys, "replay", str(log))
    assert code == 2 and "no archive" in out


def test_missing_anchor_is_an_error(logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    log, _ = logged
    anchor_path(log).unlink()
    code, out = run(capsys, "verify", str(log))
    assert code == 1 and "anchor_missing" in out


# ---------------------------------------------------------------- malformed lines, keyed anchors


@pytest.mark.parametrize(
    "bad",
    [
        b"[" * 100_000 + b"]" * 100_000 + b"\n",
        b"\xff\xfe not utf-8\n",
        b'{"seq": ' + b"9" * 5000 + b"}\n",
        b"null\n",
        b"{}\n",
    ],
)
def test_verify_reports_any_malformed_line_as_a_finding(
    bad: bytes, logged: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    log, _ = logged
    content = lines(log)
    log.write_bytes(b"".join(content[:2]) + bad + b"".join(content[3:]))
    code, out = run(capsys, "verify", str(log))
    assert code == 1 and "Traceback" not in out
    assert f"{log}:3: malformed_" in out


def test_keyed_anchor_detects_a_rewritten_log_and_anchor(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from gasrules.governance.audit import verify_log
    from gasrules.governance.decision_log import _write_anchor
    from gasrules.governance.settings import SettingsError, load_settings

    keys, logs = tmp_path / "keys", tmp_path / "logs"
    keys.mkdir()
    logs.mkdir()
    key_file = keys / "anchor.key"
    key_file.write_text("k" * 32 + "\n", encoding="utf-8")
    log = logs / "decisions.jsonl"
    settings = load_settings(
        env={
            "GASRULES_DECISION_LOG": str(log),
            "GASRULES_ANCHOR_KEY_FILE": str(key_file),
            "GASRULES_LOG_FSYNC": "0",
        }
    )
    book = gasrules.load_rulebook(DATA / "rulebook.yaml")
    with Runtime(book, settings) as rt:
        list(rt.interpret_many(CASES[:3]))
    assert run(capsys, "verify", str(log), "--anchor-key-file", str(key_file))[0] == 0
    # an attacker with write access to the log's folder drops the last entry and writes an anchor
    # that agrees with what is left, but has no key
    content = lines(log)
    log.write_bytes(b"".join(content[:2]))
    last = json.loads(content[1])
    _write_anchor(anchor_path(log), 2, last["entry_sha256"], log.stat().st_size, False)
    assert verify_log(log).ok  # without the key nothing looks wrong
    code, out = run(capsys, "verify", str(log), "--anchor-key-file", str(key_file))
    assert code == 1 and "anchor_unkeyed" in out
    _write_anchor(anchor_path(log), 2, last["entry_sha256"], log.stat().st_size, False, b"x" * 32)
    code, out = run(capsys, "verify", str(log), "--anchor-key-file", str(key_file))
    assert code == 1 and "anchor_hmac_mismatch" in out
    # the key must live outside the log's folder
    inside = logs / "anchor.key"
    inside.write_text("k" * 32, encoding="utf-8")
    with pytest.raises(SettingsError) as exc:
        load_settings(env={"GASRULES_DECISION_LOG": str(log), "GASRULES_ANCHOR_KEY_FILE": str(inside)})
    assert "inside the decision log's folder" in str(exc.value)
