"""Settings and the runtime: strict mode, suspensions, decision records through Runtime.

The rulebook is the shipped adult rulebook (copied where a test edits it). The one clinical
case is DuBose, "Acidosis and alkalosis", Harrison's, table of mixed disorders, example 1
(also the adult rulebook's reference case E1): pH 7.39, PaCO2 24, HCO3 14, Na 140, K 4.0, Cl 106,
a high-gap metabolic acidosis with respiratory alkalosis.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.governance import registry
from gasrules.governance.audit import verify_log
from gasrules.governance.runtime import Runtime, RuntimeRefusal
from gasrules.governance.settings import Settings, SettingsError, load_settings

ADULT = Path(__file__).resolve().parents[1] / "rulebooks" / "adult" / "rulebook.yaml"
SALT = "strict-test-salt-0123456789"

# DuBose, Harrison's, table of mixed disorders, example 1 (rulebook case E1)
E1 = {
    "case_id": "E1",
    "sample_type": "arterial",
    "ph": 7.39,
    "pco2": 24,
    "hco3": 14,
    "na": 140,
    "k": 4.0,
    "cl": 106,
    "context": {"mrn": "MRN000123", "ward": "ICU"},
}
E1_DISORDERS = {"metabolic_acidosis_high_anion_gap", "respiratory_alkalosis"}  # DuBose, Harrison's, example 1


def approve(release_dir: Path, rb: Any) -> Path:
    """A minimal intact manifest (the release gate itself is tested in test_release.py)."""
    return registry.write_manifest(
        release_dir,
        {"format": registry.MANIFEST_FORMAT, "rulebook": rb.identity, "date": "2026-01-05T10:00:00Z"},
    )


@pytest.fixture
def copy_rulebook(tmp_path: Path) -> Path:
    target = tmp_path / "book" / "rulebook.yaml"
    target.parent.mkdir()
    shutil.copy(ADULT, target)
    shutil.copy(
        ADULT.parent.parent / "bibliography.yaml", tmp_path / "bibliography.yaml"
    )  # ../bibliography.yaml
    return target


def edit_parameter(path: Path, name: str, new: str) -> None:
    """Change one parameter's value in place, on the line the loader says holds it."""
    rb = gasrules.load_rulebook(path)
    loc = rb.parameters[name].set_by
    lines = path.read_text(encoding="utf-8").split("\n")
    line = lines[loc.line - 1]
    start = loc.col - 1
    end = start
    while end < len(line) and line[end] not in " #,}":
        end += 1
    lines[loc.line - 1] = line[:start] + new + line[end:]
    path.write_text("\n".join(lines), encoding="utf-8")


# ---------------------------------------------------------------- settings


def test_settings_file_env_and_flags_in_order(tmp_path: Path) -> None:
    f = tmp_path / "site.yaml"
    f.write_text(
        "strict: true\nreleases: {dir: rel}\ndecision_log:\n  path: logs/d.jsonl\n"
        "  context_policy: keep\nshadow: {rulebook: cand.yaml}\n",
        encoding="utf-8",
    )
    s = load_settings(f, env={})
    assert s.strict is True
    assert s.release_dir == tmp_path / "rel"  # relative to the file
    assert s.archive == tmp_path / "rel" / "archive"
    assert s.decision_log == tmp_path / "logs" / "d.jsonl"
    assert s.shadow_rulebook == tmp_path / "cand.yaml"
    s = load_settings(f, env={"GASRULES_STRICT": "off", "GASRULES_CONTEXT_POLICY": "drop"})
    assert (s.strict, s.context_policy) == (False, "drop")
    s = load_settings(f, env={"GASRULES_STRICT": "off"}, strict=True)
    assert s.strict is True and s.sources[-1] == "flag:strict"


def test_settings_errors_name_the_setting_and_place(tmp_path: Path) -> None:
    f = tmp_path / "bad.yaml"
    f.write_text("strict: true\ndecision_log:\n  path: d.jsonl\n  context_policy: hide\n", encoding="utf-8")
    with pytest.raises(SettingsError) as exc:
        load_settings(f, env={})
    assert (
        str(exc.value) == f"{f}:4:19: setting decision_log.context_policy: unknown policy 'hide'; "
        "accepted: keep | mask | drop"
    )
    f.write_text("strikt: true\n", encoding="utf-8")
    with pytest.raises(
        SettingsError,
        match=r"bad.yaml:1:9: setting strikt: unknown setting; accepted: "
        r"decision_log, interfaces, limits, releases, rulebook, rulebook_roots, serve, shadow, strict",
    ):
        load_settings(f, env={})
    with pytest.raises(
        SettingsError, match="GASRULES_STRICT: setting GASRULES_STRICT: 'maybe' is not a yes/no"
    ):
        load_settings(env={"GASRULES_STRICT": "maybe"})
    with pytest.raises(SettingsError, match="GASRULES_MASK_SALT.*at least 16 characters"):
        load_settings(
            env={"GASRULES_DECISION_LOG": str(tmp_path / "d.jsonl"), "GASRULES_CONTEXT_POLICY": "mask"}
        )


def test_salt_is_never_read_from_a_file(tmp_path: Path) -> None:
    f = tmp_path / "s.yaml"
    f.write_text("decision_log: {salt: abcdefabcdefabcdef}\n", encoding="utf-8")
    with pytest.raises(SettingsError, match="setting decision_log.salt: unknown setting"):
        load_settings(f, env={})
    assert "abcdef" not in repr(load_settings(env={"GASRULES_MASK_SALT": "abcdefabcdefabcdef"}))


# ---------------------------------------------------------------- strict mode


def test_strict_without_release_dir_refuses() -> None:
    rb = gasrules.load_rulebook(ADULT)
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime(rb, Settings(strict=True))
    assert exc.value.code == "strict.no_release_dir" and exc.value.exit_code == 6


def test_strict_refuses_unapproved_and_accepts_approved(tmp_path: Path) -> None:
    rb = gasrules.load_rulebook(ADULT)
    settings = Settings(strict=True, release_dir=tmp_path)
    with pytest.raises(RuntimeRefusal, match="no release has been approved there yet"):
        Runtime(rb, settings)
    manifest = approve(tmp_path, rb)
    with Runtime(rb, settings) as rt:
        assert rt.admission.manifest == manifest
        result = rt.interpret(E1)
    assert set(result["disorders"]) == E1_DISORDERS


def test_rulebook_edited_after_approval_is_refused(tmp_path: Path, copy_rulebook: Path) -> None:
    rb = gasrules.load_rulebook(copy_rulebook)
    approve(tmp_path / "rel", rb)
    edit_parameter(copy_rulebook, "ag_high", "13")  # inside its bounds: still a valid rulebook
    edited = gasrules.load_rulebook(copy_rulebook)
    assert edited.sha256 != rb.sha256 and edited.version == rb.version
    settings = Settings(strict=True, release_dir=tmp_path / "rel")
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime.from_settings(settings, copy_rulebook)
    assert exc.value.code == "strict.not_approved"
    assert "was approved with content sha256 " + rb.sha256[:16] in exc.value.reason
    assert "edited after approval" in exc.value.reason
    # without strict mode the same rulebook runs
    with Runtime.from_settings(Settings(release_dir=tmp_path / "rel"), copy_rulebook) as rt:
        assert rt.rulebook.sha256 == edited.sha256


def test_manifest_edited_after_release_does_not_approve(tmp_path: Path) -> None:
    rb = gasrules.load_rulebook(ADULT)
    path = approve(tmp_path, rb)
    data = json.loads(path.read_text())
    data["approvers"] = [{"name": "someone else", "role": "clinical lead"}]
    path.write_text(json.dumps(data))
    with pytest.raises(RuntimeRefusal, match="does not match its manifest_sha256"):
        Runtime(rb, Settings(strict=True, release_dir=tmp_path))


# ---------------------------------------------------------------- suspensions


def _suspend(
    release_dir: Path, rb: Any, rule: str | None, action: str = "suspend", variant: str = ""
) -> dict[str, Any]:
    event = {
        "action": action,
        "rulebook": rb.identity,
        "rule": rule,
        "reason": "under review",
        "by": "A. Tester",
        "time": "2026-01-06T09:00:00Z",
    }
    if variant:
        event["variant_sha256"] = variant
    return registry.append_suspension(release_dir, event)


def test_suspended_rulebook_is_refused_even_without_strict(tmp_path: Path) -> None:
    rb = gasrules.load_rulebook(ADULT)
    _suspend(tmp_path, rb, None)
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime(rb, Settings(release_dir=tmp_path))
    assert exc.value.code == "rulebook.suspended"
    assert "suspended by A. Tester at 2026-01-06T09:00:00Z: under review" in exc.value.reason
    _suspend(tmp_path, rb, None, action="lift")
    Runtime(rb, Settings(release_dir=tmp_path)).close()


def test_suspended_rule_runs_from_the_archived_variant(tmp_path: Path) -> None:
    rb = gasrules.load_rulebook(ADULT)
    approve(tmp_path, rb)
    variant = registry.archive_rulebook(
        tmp_path / "archive", ADULT, [("prompt.high_gap_acidosis", "under review")]
    )
    _suspend(tmp_path, rb, "prompt.high_gap_acidosis", variant=variant)
    with Runtime(rb, Settings(strict=True, release_dir=tmp_path)) as rt:
        assert rt.rulebook.sha256 == variant != rb.sha256
        result = rt.interpret(E1)
    event = next(e for e in result["trace"] if e["rule"] == "prompt.high_gap_acidosis")
    assert event["outcome"] == "suspended" and event["reason"] == "under review"
    assert "prompt.high_gap_acidosis" not in {f["code"] for f in result["findings"]}
    assert set(result["disorders"]) == E1_DISORDERS


def test_tampered_suspension_register_fails_closed(tmp_path: Path) -> None:
    rb = gasrules.load_rulebook(ADULT)
    _suspend(tmp_path, rb, None)
    _suspend(tmp_path, rb, None, action="lift")
    reg = registry.register_path(tmp_path)
    lines = reg.read_bytes().splitlines(keepends=True)
    reg.write_bytes(lines[0])  # the lift removed: the first event stands alone
    with pytest.raises(RuntimeRefusal, match="rulebook.suspended"):
        Runtime(rb, Settings(release_dir=tmp_path))
    reg.write_bytes(lines[1] + lines[0])  # reordered
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime(rb, Settings(release_dir=tmp_path))
    assert exc.value.code == "registry.damaged" and "suspensions.jsonl:1" in exc.value.reason


# ---------------------------------------------------------------- decision records via the runtime


def test_runtime_appends_masked_decision_records(tmp_path: Path) -> None:
    settings = load_settings(
        env={
            "GASRULES_DECISION_LOG": str(tmp_path / "d.jsonl"),
            "GASRULES_CONTEXT_POLICY": "mask",
            "GASRULES_MASK_SALT": SALT,
            "GASRULES_LOG_FSYNC": "0",
        }
    )
    with Runtime.from_settings(settings, ADULT) as rt:
        shown = list(rt.interpret_many([E1, {"case_id": "bad", "ph": "high"}, E1], trace=False))
    assert [r["case_id"] for r in shown] == ["E1", "bad", "E1"]
    assert all(r["trace"] == [] for r in shown)  # the contract keeps the key, empty when not asked for
    assert verify_log(tmp_path / "d.jsonl").ok
    entries = [json.loads(line) for line in (tmp_path / "d.jsonl").read_text().splitlines()]
    assert len(entries) == 3
    assert entries[0]["input"]["context"]["mrn"].startswith("hmac-sha256:")
    assert entries[0]["input"]["context"]["ward"] == "ICU"
    assert entries[0]["result"]["trace"], "the log keeps the trace even when the caller does not"
    assert entries[1]["result"]["status"] == "rejected"
    assert "MRN000123" not in (tmp_path / "d.jsonl").read_text()
