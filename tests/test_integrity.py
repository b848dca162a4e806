"""What was approved is what runs: the identity hash (scheme 2) covers the whole resolved
rulebook except lifecycle metadata; releases, archives and decision records made under scheme 1
(tests/data/legacy_scheme1, made with the engine before scheme 2) still verify and replay.

The rulebook is the small test rulebook (tests/data/mini); no clinical value is asserted here
except the two fixture results, whose headlines are the mini rulebook's own texts.
"""

from __future__ import annotations

import copy
import json
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import yaml

import gasrules
from gasrules.governance import registry
from gasrules.governance.audit import replay_log, verify_log
from gasrules.governance.runtime import Runtime, RuntimeRefusal
from gasrules.governance.settings import Settings

DATA = Path(__file__).resolve().parent / "data"
MINI = DATA / "mini" / "rulebook.yaml"
LEGACY = DATA / "legacy_scheme1"


def _write(path: Path, data: dict[str, Any]) -> Path:
    if isinstance(data.get("bibliography"), str):  # written elsewhere: the mini bibliography by its full path
        data = {**data, "bibliography": str((MINI.parent / data["bibliography"]).resolve())}
    path.write_text(yaml.safe_dump(data, sort_keys=False, allow_unicode=True), encoding="utf-8")
    return path


def _first(mapping: dict[str, Any]) -> str:
    return next(iter(mapping))


# one edit per top-level section of a rulebook, each something a user sees or that decides a result
EDITS: dict[str, Callable[[dict[str, Any]], None]] = {
    "metadata.title": lambda d: d["metadata"].__setitem__("title", d["metadata"]["title"] + " (edited)"),
    "metadata.intended_use": lambda d: d["metadata"]["intended_use"].__setitem__("population", "Children"),
    "metadata.owners": lambda d: d["metadata"]["owners"].append({"name": "Someone Else", "role": "authors"}),
    "steps.core": lambda d: d["steps"][_first(d["steps"])].__setitem__("core", False),
    "steps.label": lambda d: d["steps"][_first(d["steps"])].__setitem__("label", "Renamed step"),
    "inputs.label": lambda d: d["inputs"]["ph"].__setitem__("label", "pH (edited)"),
    "parameters.rationale": lambda d: d["parameters"][_first(d["parameters"])].__setitem__(
        "rationale", "edited"
    ),
    "derived.label": lambda d: d["derived"][_first(d["derived"])].__setitem__("label", "Edited label"),
    "rules.finding_text": lambda d: d["rules"][-1]["findings"][0].__setitem__("text", "Edited finding text"),
    "presentation.headline": lambda d: d["presentation"]["headline"].__setitem__(
        "no_disorder", "Metabolic acidosis"
    ),
    "display_units": lambda d: d.__setitem__("display_units", {"mm[Hg]": "kPa"}),
    "suspend": lambda d: d.__setitem__("suspend", [{"rule": d["rules"][-1]["id"], "reason": "edited"}]),
}


@pytest.fixture(scope="module")
def mini_data() -> dict[str, Any]:
    return yaml.safe_load(MINI.read_text(encoding="utf-8"))


@pytest.mark.parametrize("edit", sorted(EDITS))
def test_every_section_edited_after_approval_is_refused_in_strict_mode(
    edit: str, tmp_path: Path, mini_data: dict[str, Any]
) -> None:
    approved = _write(tmp_path / "approved.yaml", mini_data)
    rb = gasrules.load_rulebook(approved)
    release_dir = tmp_path / "rel"
    registry.write_manifest(release_dir, {"format": registry.MANIFEST_FORMAT, "rulebook": rb.identity})
    Runtime(rb, Settings(strict=True, release_dir=release_dir)).close()  # the approved one runs
    edited = copy.deepcopy(mini_data)
    EDITS[edit](edited)
    changed = gasrules.load_rulebook(_write(tmp_path / "edited.yaml", edited))
    assert changed.sha256 != rb.sha256, edit
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime(changed, Settings(strict=True, release_dir=release_dir))
    assert exc.value.code == "strict.not_approved"
    assert "edited after approval" in exc.value.reason


@pytest.mark.parametrize(
    "key,value",
    [("status", "approved"), ("changelog", [{"version": "0.1.0", "date": "2026-12-02", "summary": "x"}])],
)
def test_lifecycle_metadata_is_not_hashed(
    key: str, value: Any, tmp_path: Path, mini_data: dict[str, Any]
) -> None:
    rb = gasrules.load_rulebook(_write(tmp_path / "a.yaml", mini_data))
    edited = copy.deepcopy(mini_data)
    edited["metadata"][key] = value
    assert gasrules.load_rulebook(_write(tmp_path / "b.yaml", edited)).sha256 == rb.sha256


def test_manifest_records_the_hash_scheme(tmp_path: Path, mini_rb: Any) -> None:
    import json

    path = registry.write_manifest(
        tmp_path, {"format": registry.MANIFEST_FORMAT, "rulebook": mini_rb.identity}
    )
    manifest = json.loads(path.read_text(encoding="utf-8"))
    assert manifest["hash_scheme"] == 2
    assert manifest["manifest_sha256"] == registry.manifest_hash(manifest)


# ---------------------------------------------------------------- scheme 1, made before the change


@pytest.fixture
def legacy(tmp_path: Path) -> Path:
    target = tmp_path / "legacy"
    shutil.copytree(LEGACY, target)
    return target


def test_legacy_manifest_archive_and_log_still_verify(legacy: Path) -> None:
    entries = registry.read_manifests(legacy / "releases")
    assert len(entries) == 1 and entries[0].problem == ""
    assert registry.manifest_scheme(entries[0]) == 1
    old_sha = entries[0].rulebook["sha256"]
    archived = registry.load_archived(legacy / "releases" / "archive", old_sha)
    assert archived.sha256_v1 == old_sha and archived.sha256 != old_sha
    report = verify_log(legacy / "decisions.jsonl")
    assert report.ok and report.entries == 2


def test_legacy_release_still_admits_the_same_rulebook_in_strict_mode(legacy: Path) -> None:
    rb = gasrules.load_rulebook(legacy / "rulebook.yaml")
    with Runtime(rb, Settings(strict=True, release_dir=legacy / "releases")) as rt:
        assert rt.admission.manifest is not None
        assert rt.interpret({"ph": 7.40, "pco2": 40, "hco3": 24})["status"] == "interpreted"


def test_legacy_release_refuses_a_headline_edited_after_approval(legacy: Path) -> None:
    path = legacy / "rulebook.yaml"
    text = path.read_text(encoding="utf-8")
    path.write_text(
        text.replace('no_disorder: "No acid-base disorder identified"', 'no_disorder: "Metabolic acidosis"'),
        encoding="utf-8",
    )
    rb = gasrules.load_rulebook(path)
    assert (
        rb.sha256_v1 == registry.read_manifests(legacy / "releases")[0].rulebook["sha256"]
    )  # scheme 1 blind
    with pytest.raises(RuntimeRefusal) as exc:
        Runtime(rb, Settings(strict=True, release_dir=legacy / "releases"))
    assert "hash scheme 1" in exc.value.reason


def test_legacy_decision_records_replay_with_the_archive(legacy: Path) -> None:
    report = replay_log(
        legacy / "decisions.jsonl",
        registry.archive_loader(legacy / "releases" / "archive"),
        gasrules.interpret,
    )
    assert report.ok, report.outcomes
    assert report.counts["same"] == 2


# ---------------------------------------------------------------- the governed Python API


def test_runtime_is_the_governed_python_api(tmp_path: Path, mini_data: dict[str, Any]) -> None:
    path = _write(tmp_path / "book.yaml", mini_data)
    assert gasrules.Runtime is Runtime and "Runtime" in gasrules.__all__
    release_dir = tmp_path / "rel"
    with pytest.raises(gasrules.RuntimeRefusal):  # strict, nothing approved
        gasrules.Runtime.open(path, env={"GASRULES_STRICT": "1", "GASRULES_RELEASE_DIR": str(release_dir)})
    rb = gasrules.load_rulebook(path)
    registry.write_manifest(release_dir, {"format": registry.MANIFEST_FORMAT, "rulebook": rb.identity})
    log = tmp_path / "d.jsonl"
    with gasrules.Runtime.open(
        path,
        env={
            "GASRULES_STRICT": "1",
            "GASRULES_RELEASE_DIR": str(release_dir),
            "GASRULES_DECISION_LOG": str(log),
            "GASRULES_LOG_FSYNC": "0",
        },
    ) as rt:
        got = rt.interpret({"ph": 7.40, "pco2": 40, "hco3": 24})
    assert got == gasrules.interpret(rb, {"ph": 7.40, "pco2": 40, "hco3": 24})  # the pure function agrees
    assert verify_log(log).entries == 1


def test_interpret_command_and_service_go_through_the_runtime(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, mini_data: dict[str, Any]
) -> None:
    """With no settings at all, both still open the governed Runtime."""
    from typer.testing import CliRunner

    from gasrules.cli.commands import interpret as interpret_command
    from gasrules.governance import runtime as runtime_module
    from gasrules.service.handlers import ServiceConfig, make_interpreter

    opened: list[Any] = []
    real = runtime_module.Runtime.from_settings.__func__

    def spy(cls: Any, settings: Any, rulebook: Any = None) -> Any:
        opened.append(rulebook)
        return real(cls, settings, rulebook)

    monkeypatch.setattr(runtime_module.Runtime, "from_settings", classmethod(spy))
    path = _write(tmp_path / "book.yaml", mini_data)
    result = CliRunner().invoke(
        interpret_command.app, ["--rulebook", str(path), "--ph", "7.4", "--pco2", "40", "--hco3", "24"]
    )
    assert result.exit_code == 0, result.output
    interp = make_interpreter(ServiceConfig(rulebook=path), environ={})
    interp.close()
    assert len(opened) == 2


def test_read_limits_come_from_the_settings_file(tmp_path: Path, mini_data: dict[str, Any]) -> None:
    from gasrules.governance.settings import load_settings

    path = _write(tmp_path / "book.yaml", mini_data)
    site = tmp_path / "site.yaml"
    site.write_text("limits: {yaml_nodes: 50, rulebook_bytes: 100000}\n", encoding="utf-8")
    with pytest.raises(gasrules.RulebookError) as exc:
        Runtime.from_settings(load_settings(site, env={}), path)
    assert exc.value.errors[0].code == "RB-E009" and "more than 50 YAML nodes" in exc.value.errors[0].message
    site.write_text(f"rulebook_roots: [{json.dumps(str(tmp_path / 'elsewhere'))}]\n", encoding="utf-8")
    with pytest.raises(gasrules.RulebookError) as exc:
        Runtime.from_settings(load_settings(site, env={}), path)
    assert exc.value.errors[0].code == "RB-E007"


def test_runtime_prepare_logs_only_when_delivered(tmp_path: Path, mini_rb: Any) -> None:
    log = tmp_path / "d.jsonl"
    with Runtime(mini_rb, Settings(decision_log=log, log_fsync=False)) as rt:
        result, deliver = rt.prepare({"ph": 7.40, "pco2": 40, "hco3": 24}, trace=False)
        assert result["trace"] == [] and verify_log(log).entries == 0
        deliver()
    assert verify_log(log).entries == 1
