"""The release gate, the manifest and archive it writes, suspension commands, and strict mode
after a real release.

The rulebook is tests/data/release (pH state only; its thresholds are the common-practice arterial
pH reference interval 7.35-7.45). Its three suite cases pass with full rule coverage.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

import gasrules
from gasrules.cli import main
from gasrules.governance import registry
from gasrules.governance.release import Approver, ReleaseRefused, release
from gasrules.governance.runtime import Runtime, RuntimeRefusal
from gasrules.governance.settings import Settings

DATA = Path(__file__).resolve().parent / "data" / "release"
LEAD = Approver("B. Reviewer", "clinical lead")


@pytest.fixture
def book(tmp_path: Path) -> Path:
    target = tmp_path / "book"
    shutil.copytree(DATA, target)
    return target / "rulebook.yaml"


def set_text(path: Path, old: str, new: str) -> None:
    text = path.read_text(encoding="utf-8")
    assert text.count(old) == 1, old
    path.write_text(text.replace(old, new), encoding="utf-8")


def test_gate_releases_writes_sealed_manifest_and_archives(book: Path, tmp_path: Path) -> None:
    rel = tmp_path / "rel"
    out = release(
        book, release_dir=rel, approvers=[LEAD], authors=["A. Author"], now=lambda: "2026-02-01T08:00:00Z"
    )
    m = out.manifest
    rb = gasrules.load_rulebook(book)
    assert m["rulebook"]["sha256"] == rb.sha256 and m["rulebook"]["version"] == "1.0.0"
    assert m["suite"]["cases"] == 3 and m["suite"]["passed"] == 3 and m["suite"]["failed"] == 0
    assert (m["suite"]["rules"], m["suite"]["rules_covered"]) == (3, 3)
    assert len(m["suite"]["content_sha256"]) == 64 and m["suite"]["files"] == ["cases/ph.yaml"]
    assert m["change"]["class"] == "initial" and m["previous"] is None
    assert m["author"] == ["A. Author"] and m["approvers"] == [
        {"name": "B. Reviewer", "role": "clinical lead"}
    ]
    assert m["date"] == "2026-02-01T08:00:00Z"
    written = json.loads(out.manifest_path.read_text())
    assert written["manifest_sha256"] == registry.manifest_hash(written)
    archived = registry.load_archived(rel / "archive", rb.sha256)
    assert archived.sha256 == rb.sha256
    # the archived copy interprets like the original (pH 7.20: below 7.35, common practice)
    case = {"case_id": "x", "ph": 7.20}
    assert gasrules.interpret(archived, case)["findings"] == gasrules.interpret(rb, case)["findings"]


def test_author_cannot_approve_their_own_change(book: Path, tmp_path: Path) -> None:
    with pytest.raises(ReleaseRefused) as exc:
        release(
            book,
            release_dir=tmp_path / "rel",
            approvers=[Approver("a.  author", "clinical lead"), LEAD],
            authors=["A. Author"],
        )
    assert exc.value.reasons == [
        ("approval.self", "a.  author is an author of this change and cannot approve it")
    ]
    assert not (tmp_path / "rel" / "manifests").exists()
    # authors default to the owners with an author role in the metadata
    with pytest.raises(ReleaseRefused, match="gasrules release tests is an author"):
        release(book, release_dir=tmp_path / "rel", approvers=[Approver("gasrules release tests", "lead")])


def test_failing_case_and_uncovered_rule_are_both_reported(book: Path, tmp_path: Path) -> None:
    set_text(book.parent / "cases" / "ph.yaml", "input: {ph: 7.40}", "input: {ph: 7.30}")
    set_text(
        book,
        "presentation:",
        """  - id: ph.extreme_low
    status: active
    step: ph_state
    title: "Extreme acidaemia"
    when: ph < ph_low - 0.5
    findings:
      - {code: ph.extreme_low, category: ph_state, severity: critical, text: "pH {ph}."}

presentation:""",
    )
    with pytest.raises(ReleaseRefused) as exc:
        release(book, release_dir=tmp_path / "rel", approvers=[LEAD], authors=["A. Author"])
    codes = [c for c, _ in exc.value.reasons]
    assert codes == ["suite.failed", "suite.rule_coverage"]
    text = dict(exc.value.reasons)
    assert text["suite.failed"] == (
        "1 of 3 suite cases fail: ph-normal: finding ph.normal; ph-normal: rule ph.normal; "
        "ph-normal: rule ph.acidaemia"
    )
    assert "never fired: ph.extreme_low" in text["suite.rule_coverage"]
    assert "never fired: ph.extreme_low, ph.normal" in text["suite.rule_coverage"]


def test_second_release_needs_the_version_bump_and_records_the_diff_class(book: Path, tmp_path: Path) -> None:
    rel = tmp_path / "rel"
    first = release(book, release_dir=rel, approvers=[LEAD], authors=["A. Author"])
    set_text(book, "    value: 7.35\n", "    value: 7.34\n")  # inside the 7.30-7.38 guard rails
    with pytest.raises(ReleaseRefused) as exc:
        release(book, release_dir=rel, approvers=[LEAD], authors=["A. Author"])
    assert [c for c, _ in exc.value.reasons] == ["version.bump"]
    assert "expected at least 1.0.1" in exc.value.reasons[0][1]
    set_text(book, "version: 1.0.0", "version: 1.0.1")
    second = release(book, release_dir=rel, approvers=[LEAD], authors=["A. Author"])
    assert second.manifest["change"]["class"] == "patch" and second.manifest["change"]["bump"] == "patch"
    assert {"kind": "parameter", "key": "ph_low", "aspect": "value", "class": "patch"} in second.manifest[
        "change"
    ]["changes"]
    assert second.manifest["previous"]["manifest"] == first.manifest_path.name
    assert second.manifest["previous"]["rulebook"]["version"] == "1.0.0"
    assert "ph_low" in second.diff_markdown
    # both versions stay replayable from the archive
    for m in (first.manifest, second.manifest):
        assert (
            registry.load_archived(rel / "archive", m["rulebook"]["sha256"]).version
            == m["rulebook"]["version"]
        )


def test_same_content_is_never_released_twice(book: Path, tmp_path: Path) -> None:
    release(book, release_dir=tmp_path / "rel", approvers=[LEAD], authors=["A. Author"])
    with pytest.raises(ReleaseRefused, match="release.exists|already released"):
        release(book, release_dir=tmp_path / "rel", approvers=[LEAD], authors=["A. Author"])


def test_strict_mode_refuses_a_rulebook_edited_after_its_release(book: Path, tmp_path: Path) -> None:
    rel = tmp_path / "rel"
    release(book, release_dir=rel, approvers=[LEAD], authors=["A. Author"])
    settings = Settings(strict=True, release_dir=rel)
    Runtime.from_settings(settings, book).close()
    set_text(book, "    value: 7.45\n", "    value: 7.46\n")  # edited, version unchanged
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime.from_settings(settings, book)
    assert exc.value.code == "strict.not_approved" and "edited after approval" in exc.value.reason


def test_release_command_exit_codes_and_text(
    book: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rel = str(tmp_path / "rel")
    args = ["release", str(book), "--release-dir", rel, "--author", "A. Author"]
    assert main(args + ["--approver", "A. Author", "--role", "clinical lead"]) == 1
    err = capsys.readouterr().err
    assert (
        err
        == "release refused:\n  approval.self: A. Author is an author of this change and cannot approve it\n"
    )
    assert main(args + ["--approver", "B. Reviewer"]) == 2
    assert "1 --approver and 0 --role given" in capsys.readouterr().err
    assert main(args + ["--approver", "B. Reviewer", "--role", "clinical lead", "--json"]) == 0
    manifest = json.loads(capsys.readouterr().out)
    assert manifest["released"] is True and manifest["approvers"][0]["role"] == "clinical lead"
    assert main(["release", str(book), "--approver", "B", "--role", "r"]) == 2  # no release directory
    assert "no release directory" in capsys.readouterr().err


def test_suspend_command_rule_and_rulebook(
    book: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rel = tmp_path / "rel"
    release(book, release_dir=rel, approvers=[LEAD], authors=["A. Author"])
    base = ["suspend", str(book), "--release-dir", str(rel), "--by", "B. Reviewer"]
    assert main(base + ["--rule", "ph.normal", "--reason", "short"]) == 1
    assert "at least 10 characters" in capsys.readouterr().err
    assert main(base + ["--rule", "ph.nope", "--reason", "testing the switch"]) == 1
    assert "has no rule 'ph.nope'" in capsys.readouterr().err
    assert main(base + ["--rule", "ph.normal", "--reason", "wording under review"]) == 0
    out = capsys.readouterr().out
    assert "recorded: suspend rule ph.normal of release-test 1.0.0 by B. Reviewer" in out
    assert "rule ph.normal suspended: wording under review" in out
    with Runtime.from_settings(Settings(strict=True, release_dir=rel), book) as rt:
        result = rt.interpret({"case_id": "n", "ph": 7.40})  # inside 7.35-7.45 (common practice)
    assert result["findings"] == []
    assert [e["outcome"] for e in result["trace"] if e["rule"] == "ph.normal"] == ["suspended"]
    assert main(base + ["--reason", "whole rulebook withdrawn for review"]) == 0
    capsys.readouterr()
    with pytest.raises(RuntimeRefusal, match="withdrawn for review"):
        Runtime.from_settings(Settings(release_dir=rel), book)
    assert main(base + ["--lift", "--reason", "review finished, reinstated"]) == 0
    assert main(base + ["--lift", "--rule", "ph.normal", "--reason", "review finished, reinstated"]) == 0
    assert main(base + ["--lift", "--rule", "ph.normal", "--reason", "review finished, reinstated"]) == 1
    assert "is not suspended" in capsys.readouterr().err
    events = registry.read_suspensions(rel)
    assert [(e["action"], e["rule"]) for e in events] == [
        ("suspend", "ph.normal"),
        ("suspend", None),
        ("lift", None),
        ("lift", "ph.normal"),
    ]
    with Runtime.from_settings(Settings(strict=True, release_dir=rel), book) as rt:
        assert rt.interpret({"case_id": "n", "ph": 7.40})["findings"][0]["code"] == "ph.normal"


# ---------------------------------------------------------------- names compared as read; the roster


@pytest.mark.parametrize(
    "disguise",
    [
        "A. Аuthor",  # Cyrillic capital A
        "A.\u200b Author",  # zero-width space
        "A. \u00adAuthor",  # soft hyphen (a format character)
        "Ａ. Ａｕｔｈｏｒ",  # full-width letters (NFKC)
        "A. AUTHOR",  # case
        "A. Auth0r",  # digit zero for letter O (confusable skeleton)
    ],
)
def test_an_author_in_disguise_cannot_approve(disguise: str, book: Path, tmp_path: Path) -> None:
    with pytest.raises(ReleaseRefused) as exc:
        release(
            book, release_dir=tmp_path / "rel", approvers=[Approver(disguise, "lead")], authors=["A. Author"]
        )
    assert [code for code, _ in exc.value.reasons] == ["approval.self"]


def test_the_same_approver_twice_in_disguise_is_a_duplicate(book: Path, tmp_path: Path) -> None:
    with pytest.raises(ReleaseRefused) as exc:
        release(
            book,
            release_dir=tmp_path / "rel",
            authors=["A. Author"],
            approvers=[LEAD, Approver("B. Reviewer\u200d", "second")],
        )
    assert [code for code, _ in exc.value.reasons] == ["approval.duplicate"]


def _roster(path: Path) -> Path:
    path.write_text(
        'people:\n  - {id: "p-001", name: "A. Author"}\n'
        '  - {id: "p-002", name: "B. Reviewer", aliases: ["Bea Reviewer"]}\n',
        encoding="utf-8",
    )
    return path


def test_roster_refuses_names_not_on_it_and_records_ids(
    book: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from gasrules.governance.people import load_roster

    roster = load_roster(_roster(tmp_path / "people.yaml"))
    with pytest.raises(ReleaseRefused) as exc:
        release(
            book,
            release_dir=tmp_path / "rel",
            approvers=[Approver("C. Stranger", "lead")],
            authors=["A. Author"],
            roster=roster,
        )
    assert exc.value.reasons[0] == (
        "approval.not_on_roster",
        f"approver 'C. Stranger' is not on the site roster {tmp_path / 'people.yaml'}",
    )
    out = release(
        book,
        release_dir=tmp_path / "rel",
        approvers=[Approver("Bea Reviewer", "lead")],
        authors=["A. Author"],
        roster=roster,
    )
    assert out.manifest["approvers"] == [{"name": "Bea Reviewer", "role": "lead", "id": "p-002"}]
    assert out.manifest["author_ids"] == ["p-001"]
    # through the command, the roster comes from the settings
    book2 = tmp_path / "book2"
    shutil.copytree(DATA, book2)
    code = main(
        [
            "release",
            str(book2 / "rulebook.yaml"),
            "--approver",
            "C. Stranger",
            "--role",
            "lead",
            "--author",
            "A. Author",
            "--release-dir",
            str(tmp_path / "rel2"),
        ],
    )
    assert code == 0  # no roster set: anyone may approve


def test_roster_setting_is_enforced_by_the_command(
    book: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("GASRULES_ROSTER", str(_roster(tmp_path / "people.yaml")))
    code = main(
        [
            "release",
            str(book),
            "--approver",
            "C. Stranger",
            "--role",
            "lead",
            "--author",
            "A. Author",
            "--release-dir",
            str(tmp_path / "rel"),
        ]
    )
    assert code == 1 and "approval.not_on_roster" in capsys.readouterr().err
    (tmp_path / "bad.yaml").write_text("people:\n  - {name: 'No Id'}\n", encoding="utf-8")
    monkeypatch.setenv("GASRULES_ROSTER", str(tmp_path / "bad.yaml"))
    code = main(
        [
            "release",
            str(book),
            "--approver",
            "B. Reviewer",
            "--role",
            "lead",
            "--author",
            "A. Author",
            "--release-dir",
            str(tmp_path / "rel"),
        ]
    )
    err = capsys.readouterr().err
    assert code == 2 and "bad.yaml:2:5: roster: people[0] needs a non-empty id and name" in err


# ---------------------------------------------------------------- coverage: covered apart from declared unreachable


def test_coverage_reports_declared_unreachable_apart(
    book: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from gasrules.governance.review_document import build_document, render_markdown

    # drop the case that makes ph.alkalaemia fire and declare that outcome unreachable instead
    cases = book.parent / "cases" / "ph.yaml"
    text = cases.read_text(encoding="utf-8")
    cut = text.index("  - id: ph-high")
    cases.write_text(
        text[:cut] + 'unreachable:\n  - {rule: ph.alkalaemia, outcome: fired, reason: "test: declared"}\n',
        encoding="utf-8",
    )
    assert main(["verify", str(book)]) in (0, 1)
    out = capsys.readouterr().out
    assert "Rule coverage: 2 covered + 1 declared unreachable of 3 active rules" in out
    m = release(book, release_dir=tmp_path / "rel", approvers=[LEAD], authors=["A. Author"]).manifest
    assert (m["suite"]["rules_covered"], m["suite"]["rules_declared_unreachable"]) == (3, 1)
    assert m["suite"]["rule_coverage"] == "2 covered + 1 declared unreachable of 3"
    assert (
        m["suite"]["threshold_coverage"]["summary"] == "0 covered + 0 declared unreachable of 12"
    )  # no probes
    md = render_markdown(build_document(book))
    assert "| Rule coverage | 2 covered + 1 declared unreachable of 3 active rules |" in md
