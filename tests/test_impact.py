"""Impact replay: every row counted (malformed ones reported, never dropped), transitions and rules
cross-checked against direct interpretation, identical results on 1 and 2 workers, expected
transitions turning surprises into exit 1.

The corpus is invented demo data from tools/make_demo_data.py (seeded). The tuned rulebook is a
copy of the shipped one with the anion-gap upper limit moved from 12 to 13 mmol/L, inside its
guard rails (an invented tuning for the test; both values lie within the 8-12 / 3-11 intervals
discussed in Kraut & Madias, Clin J Am Soc Nephrol 2007, which is what makes it a plausible site
change). No clinical value is asserted: the checks compare the replay with the engine itself.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from conftest import portable
from gasrules.cli.commands import impact as impact_command
from gasrules.core.resources import default_rulebook_path
from gasrules.evaluation.evaluator import interpret
from gasrules.governance.impact import (
    ExpectedError,
    conclusion_label,
    load_expected,
    render_html,
    render_text,
    replay,
)
from gasrules.rulebook.build import load_rulebook
from gasrules.verification.casegen import generate_corpus

ROOT = Path(__file__).resolve().parent.parent
SHIPPED = default_rulebook_path()
N, SEED, SHARE = 600, 5, 0.05


def make_corpus(path: Path, fmt: str, n: int = N, seed: int = SEED, share: float = SHARE) -> Path:
    subprocess.run(
        [
            sys.executable,
            str(ROOT / "tools" / "make_demo_data.py"),
            "corpus",
            "--n",
            str(n),
            "--seed",
            str(seed),
            "--format",
            fmt,
            "--malformed-share",
            str(share),
            "--out",
            str(path),
        ],
        check=True,
        capture_output=True,
    )
    return path


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("impact")
    text = portable(SHIPPED.read_text(encoding="utf-8"), SHIPPED)
    anchor = "  ag_high:\n    value: 12\n"
    assert text.count(anchor) == 1
    tuned = d / "tuned" / "rulebook.yaml"
    tuned.parent.mkdir()
    tuned.write_text(
        text.replace(anchor, "  ag_high:\n    value: 13\n").replace(
            "  version: 1.0.0\n", "  version: 1.0.1\n", 1
        ),
        encoding="utf-8",
    )
    return {
        "tuned": tuned,
        "csv": make_corpus(d / "corpus.csv", "csv"),
        "jsonl": make_corpus(d / "corpus.jsonl", "jsonl"),
    }


def malformed_ids(n: int = N, seed: int = SEED, share: float = SHARE) -> dict[str, str]:
    """case id -> malformation kind, from the same seeded generator the tool uses."""
    return {
        case["case_id"]: kind for kind, _key, case in generate_corpus(n, seed, malformed_share=share) if kind
    }


def test_malformed_csv_rows_are_counted_and_listed_never_dropped(data: dict[str, Path]) -> None:
    rb = load_rulebook(SHIPPED)
    report = replay(rb, rb, data["csv"])
    bad = malformed_ids()
    assert 10 <= len(bad) <= 50  # enough to mean something; all fit in the listing
    assert report.rows == N  # N rows in, N counted
    assert sum(report.status_pairs.values()) == N
    assert report.rejected["both"] == len(bad) == sum(report.rejected.values())
    assert {m["case_id"] for m in report.malformed} == set(bad)
    short_or_long = sum(1 for k in bad.values() if k in ("unknown_key", "missing_value"))
    assert report.unreadable == short_or_long
    for m in report.malformed:
        assert m["where"].startswith("corpus.csv:") and m["errors"]
    text = render_text(report)
    assert f"Rejected rows: {len(bad)}" in text


def test_malformed_jsonl_rows_are_rejected_with_the_field_named(data: dict[str, Path]) -> None:
    rb = load_rulebook(SHIPPED)
    report = replay(rb, rb, data["jsonl"])
    assert report.rows == N
    listed = {m["case_id"]: m for m in report.malformed}
    gen = {
        case["case_id"]: (kind, key, case)
        for kind, key, case in generate_corpus(N, SEED, malformed_share=SHARE)
        if kind
    }
    for cid, (kind, key, case) in gen.items():
        if kind == "missing_value" and case[key] is None:
            continue  # JSON null is "not measured": interpreted, not rejected
        assert cid in listed, (cid, kind)
        assert key in listed[cid]["errors"], (cid, kind, listed[cid]["errors"])


def test_identical_rulebooks_change_nothing(data: dict[str, Path]) -> None:
    rb = load_rulebook(SHIPPED)
    report = replay(rb, rb, data["csv"])
    assert (report.changed_any, report.transitions, report.rules, report.cuts) == (0, {}, {}, [])


def test_transitions_match_direct_interpretation(data: dict[str, Path]) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(data["tuned"])
    report = replay(old, new, data["jsonl"])
    assert report.transitions, "raising the anion-gap limit must move some cases in this corpus"
    assert sum(t.count for t in report.transitions.values()) == report.changed_disorders
    cases = {}
    with open(data["jsonl"], encoding="utf-8") as f:
        for line in f:
            obj = json.loads(line)
            cases[obj["case_id"]] = obj
    direct = 0
    for case in cases.values():
        a, b = interpret(old, case, trace=False), interpret(new, case, trace=False)
        direct += conclusion_label(a["status"], a["disorders"]) != conclusion_label(
            b["status"], b["disorders"]
        )
    assert direct == report.changed_disorders
    for t in report.transitions.values():
        assert len(t.examples) == min(t.count, 5)
        assert any(r.startswith("anion_gap.") for r in t.rules), t
        for cid in t.examples:
            a, b = interpret(old, cases[cid]), interpret(new, cases[cid])
            assert (
                conclusion_label(a["status"], a["disorders"]),
                conclusion_label(b["status"], b["disorders"]),
            ) == (t.old, t.new)
    assert "anion_gap.high_gap_acidosis" in report.rules or "anion_gap.hidden_high_gap" in report.rules


def test_near_threshold_cases_lie_within_the_window(data: dict[str, Path]) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(data["tuned"])
    report = replay(old, new, data["csv"])
    assert {c.threshold for c in report.cuts} == {"ag_high"}
    assert any(report.near_counts.values())
    for i, examples in report.near_examples.items():
        for _case, margin in examples:
            assert abs(margin) <= 1.0 + 1e-9  # the limit moved by 1 mmol/L


@pytest.mark.slow
def test_same_report_with_one_and_two_workers(data: dict[str, Path]) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(data["tuned"])
    one = replay(old, new, data["csv"], workers=1, chunk_size=37)
    two = replay(old, new, data["csv"], workers=2, chunk_size=37)
    assert one.as_dict(timing=False) == two.as_dict(timing=False)
    assert one.rows == N and one.changed_any > 0


def test_expected_transitions_turn_surprises_into_exit_1(data: dict[str, Path], tmp_path: Path) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(data["tuned"])
    report = replay(old, new, data["csv"])
    args = [
        str(SHIPPED),
        str(data["tuned"]),
        str(data["csv"]),
        "--workers",
        "1",
        "--no-progress",
        "--no-cohorts",
    ]
    res = CliRunner().invoke(impact_command.app, args)  # this corpus has 5 % malformed rows on purpose
    assert res.exit_code == 4 and "more than the limit of 1 %" in res.output, res.output
    runner = CliRunner(env={"GASRULES_CORPUS_UNREADABLE_PERCENT": "50"})
    res = runner.invoke(impact_command.app, args)
    assert res.exit_code == 0, res.output
    everything = tmp_path / "all.yaml"
    everything.write_text(
        "expected:\n  - {from: '*', to: '*', reason: any change is fine}\n", encoding="utf-8"
    )
    assert runner.invoke(impact_command.app, args + ["--expected", str(everything)]).exit_code == 0
    first = report.sorted_transitions()[0]
    old_codes = [] if first.old == "(no disorder)" else first.old.split(" + ")
    new_codes = [] if first.new == "(no disorder)" else first.new.split(" + ")
    only_one = tmp_path / "one.yaml"
    only_one.write_text(
        json.dumps({"expected": [{"from": old_codes, "to": new_codes, "reason": "the limit moved"}]}),
        encoding="utf-8",
    )
    res = runner.invoke(impact_command.app, args + ["--expected", str(only_one)])
    assert res.exit_code == (0 if len(report.transitions) == 1 else 1)
    assert "[expected]" in res.stdout
    capped = tmp_path / "capped.yaml"
    capped.write_text("expected:\n  - {from: '*', to: '*', max_cases: 0}\n", encoding="utf-8")
    res = runner.invoke(impact_command.app, args + ["--expected", str(capped), "--format", "json"])
    assert res.exit_code == 1 and json.loads(res.stdout)["unexpected"] == len(report.transitions)
    broken = tmp_path / "broken.yaml"
    broken.write_text("expected:\n  - {from: [x], into: [y]}\n", encoding="utf-8")
    with pytest.raises(ExpectedError, match=r"expected\[0\]: each entry needs 'from' and 'to'"):
        load_expected(broken)
    res = runner.invoke(impact_command.app, args + ["--expected", str(broken)])
    assert res.exit_code == 2 and "expected[0]" in res.output


def test_html_is_self_contained(data: dict[str, Path]) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(data["tuned"])
    page = render_html(replay(old, new, data["csv"]))
    assert page.startswith("<!doctype html>") and page.rstrip().endswith("</html>")
    assert "<script src" not in page and "<link" not in page and "http" not in page
    assert "never replaces, clinical judgement" in page


def test_unreadable_corpus_is_a_usage_error(tmp_path: Path) -> None:
    res = CliRunner().invoke(
        impact_command.app, [str(SHIPPED), str(SHIPPED), str(tmp_path / "nope.csv"), "-w", "1"]
    )
    assert res.exit_code == 2 and "nope.csv" in res.output


def test_demo_corpus_format_follows_the_file_name(tmp_path: Path) -> None:
    """The README's corpus step (--out corpus.csv, no --format) writes CSV, not JSON Lines."""
    for name, first in (("c.csv", "case_id,"), ("c.jsonl", "{")):
        subprocess.run(
            [
                sys.executable,
                str(ROOT / "tools" / "make_demo_data.py"),
                "corpus",
                "--n",
                "3",
                "--out",
                str(tmp_path / name),
            ],
            check=True,
            capture_output=True,
        )
        assert (tmp_path / name).read_text(encoding="utf-8").startswith(first)
