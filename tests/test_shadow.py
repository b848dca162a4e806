"""Shadow mode: the candidate runs beside the active rulebook, only the active result is shown,
every disagreement is recorded; strict mode applies to the active rulebook only.

Active: tests/data/release (pH 7.35-7.45, common practice). Candidate: the same with the lower
limit moved to 7.30 (inside its guard rails), so pH 7.32 is acidaemia under the active rulebook
and normal under the candidate; 7.20, 7.40 and 7.55 agree.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

import gasrules
from gasrules.cli import main
from gasrules.governance.release import Approver, release
from gasrules.governance.runtime import Runtime
from gasrules.governance.settings import Settings
from gasrules.governance.shadow import render_summary, summarize

DATA = Path(__file__).resolve().parent / "data" / "release"
CASES = [
    {"case_id": "low", "ph": 7.20},
    {"case_id": "edge", "ph": 7.32, "context": {"mrn": "M77", "ward": "ED"}},
    {"case_id": "mid", "ph": 7.40},
    {"case_id": "high", "ph": 7.55},
]


@pytest.fixture
def candidate(tuned_release_rulebook: Path) -> Path:
    return tuned_release_rulebook


def test_only_the_active_result_is_shown_and_disagreements_recorded(candidate: Path, tmp_path: Path) -> None:
    log = tmp_path / "shadow.jsonl"
    settings = Settings(shadow_rulebook=candidate, shadow_log=log, log_fsync=False)
    active = gasrules.load_rulebook(DATA / "rulebook.yaml")
    with Runtime.from_settings(settings, DATA / "rulebook.yaml") as rt:
        shown = [rt.interpret(c) for c in CASES[:2]] + list(rt.interpret_many(CASES[2:]))
        assert (rt.disagreements, rt._shadow.compared) == (1, 4)
    assert [r["rulebook"]["sha256"] for r in shown] == [active.sha256] * 4
    assert [f["code"] for f in shown[1]["findings"]] == ["ph.acidaemia"]  # the active conclusion
    records = [json.loads(line) for line in log.read_text().splitlines()]
    assert len(records) == 1
    rec = records[0]
    assert rec["case_id"] == "edge"
    assert rec["active"]["findings"] == ["ph.acidaemia"] and rec["candidate"]["findings"] == ["ph.normal"]
    assert rec["candidate"]["rulebook"]["version"] == "1.0.1"
    assert {"field": "findings", "active": ["ph.acidaemia"], "candidate": ["ph.normal"]} in rec["differences"]
    assert "mrn" not in rec["input"]["context"] and rec["input"]["context"]["ward"] == "ED"
    summary = summarize(log)
    assert (summary.disagreements, summary.same_disorders, dict(summary.by_field)) == (1, 1, {"findings": 1})
    assert "same disorders, other differences: 1" in render_summary(summary)


def test_strict_mode_applies_to_the_active_rulebook_not_the_candidate(
    candidate: Path, tmp_path: Path
) -> None:
    rel = tmp_path / "rel"
    book = tmp_path / "active"
    shutil.copytree(DATA, book)
    release(
        book / "rulebook.yaml",
        release_dir=rel,
        approvers=[Approver("B. Reviewer", "clinical lead")],
        authors=["A. Author"],
    )
    settings = Settings(strict=True, release_dir=rel, shadow_rulebook=candidate)  # candidate never released
    with Runtime.from_settings(settings, book / "rulebook.yaml") as rt:
        assert rt.interpret(CASES[1])["findings"][0]["code"] == "ph.acidaemia"
        assert rt.disagreements == 1


def test_shadow_command_run_and_report(
    candidate: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cases = tmp_path / "cases.jsonl"
    cases.write_text("\n".join(json.dumps(c) for c in CASES) + "\n{not json\n", encoding="utf-8")
    log = tmp_path / "d.jsonl"
    code = main(
        [
            "shadow",
            "run",
            str(cases),
            "--rulebook",
            str(DATA / "rulebook.yaml"),
            "--candidate",
            str(candidate),
            "--log",
            str(log),
        ]
    )
    out = capsys.readouterr()
    assert code == 4  # 1 of 5 rows unreadable: above the 1 % corpus limit
    assert "more than the limit of 1 % (setting limits.corpus_unreadable_percent)" in out.err
    assert [line.split("\t")[:2] for line in out.out.splitlines()] == [
        ["low", "interpreted"],
        ["edge", "interpreted"],
        ["mid", "interpreted"],
        ["high", "interpreted"],
        ["cases.jsonl:5", "rejected"],
    ]
    assert out.err.startswith("shadow: 5 case(s), 1 unreadable, 1 disagreement(s) with candidate ")
    code = main(["shadow", "report", str(log), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0 and report["disagreements"] == 1 and report["by_field"] == {"findings": 1}
    assert report["rulebooks"][0]["candidate"].startswith("release-test 1.0.1")


def test_shadow_command_refuses_an_unapproved_active_rulebook(
    candidate: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cases = tmp_path / "cases.jsonl"
    cases.write_text(json.dumps(CASES[0]) + "\n", encoding="utf-8")
    code = main(
        [
            "shadow",
            "run",
            str(cases),
            "--rulebook",
            str(DATA / "rulebook.yaml"),
            "--candidate",
            str(candidate),
            "--strict",
        ]
    )
    assert code == 6
    assert "strict.no_release_dir" in capsys.readouterr().err
