"""Rulebook diff: each kind of change gets its class, and a too-small version bump is an error.

Every tuned rulebook here is a copy of the shipped adult rulebook written to tmp_path with a
few exact text edits. The edited numbers are invented tunings for the tests (demo only), not
clinical recommendations; what is checked is the classification, not the clinical value.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from conftest import portable
from gasrules import cli
from gasrules.cli.commands import diff as diff_command
from gasrules.core.resources import default_rulebook_path
from gasrules.governance.diff import diff_paths, render_json, render_markdown, render_text, version_bump
from gasrules.rulebook.build import check_rulebook

SHIPPED = default_rulebook_path()
VERSION_LINE = "  version: 1.0.0\n"  # the metadata version of the shipped rulebook
AG_HIGH = "  ag_high:\n    value: 12\n"  # shipped value; bounds {min: 8, max: 20}
AG_BOUNDS = "  ag_high:\n    value: 12\n    unit: mmol/L\n    bounds: {min: 8, max: 20}\n"
PH_LOW_WHEN = "when: known(ph) and ph < critical_ph_low\n"


def tuned(tmp_path: Path, name: str, edits: list[tuple[str, str]], version: str | None = None) -> Path:
    """A copy of the shipped rulebook with exact edits; each edited text must occur exactly once."""
    text = portable(SHIPPED.read_text(encoding="utf-8"), SHIPPED)
    if version is not None:
        edits = [(VERSION_LINE, f"  version: {version}\n")] + edits
    for old, new in edits:
        assert text.count(old) == 1, f"edit anchor not unique in the shipped rulebook: {old!r}"
        text = text.replace(old, new)
    out = tmp_path / name / "rulebook.yaml"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    return out


def changes(d, kind: str, key: str) -> list:
    return [c for c in d.changes if c.kind == kind and c.key == key]


def test_identical_rulebooks_have_no_change_and_need_no_bump() -> None:
    d = diff_paths(SHIPPED, SHIPPED)
    assert d.changes == []
    assert d.required == "none" and d.version_error is None
    assert d.old.sha256 == d.new.sha256


def test_parameter_inside_bounds_is_patch_and_needs_a_patch_bump(tmp_path: Path) -> None:
    new = tuned(tmp_path, "tuned", [(AG_HIGH, "  ag_high:\n    value: 13\n")])
    d = diff_paths(SHIPPED, new)
    [c] = changes(d, "parameter", "ag_high")
    assert (c.aspect, c.old, c.new, c.unit, c.cls) == ("value", 12, 13, "mmol/L", "patch")
    line = SHIPPED.read_text(encoding="utf-8").split(AG_HIGH)[0].count("\n") + 2  # the body under "ag_high:"
    assert c.old_where.endswith(f"rulebook.yaml:{line}:5") and c.new_where == f"{new}:{line}:5"
    assert d.required == "patch"
    assert "expected at least 1.0.1" in d.version_error
    bumped = tuned(tmp_path, "bumped", [(AG_HIGH, "  ag_high:\n    value: 13\n")], version="1.0.1")
    assert diff_paths(SHIPPED, bumped).version_error is None
    assert [p.render() for p in check_rulebook(bumped) if not p.is_warning] == []


def test_parameter_outside_old_bounds_is_major(tmp_path: Path) -> None:
    new = tuned(
        tmp_path,
        "wide",
        [
            (
                AG_BOUNDS,
                AG_BOUNDS.replace("value: 12", "value: 24").replace("{min: 8, max: 20}", "{min: 8, max: 30}"),
            )
        ],
        version="1.1.0",
    )
    d = diff_paths(SHIPPED, new)
    by_aspect = {c.aspect: c for c in changes(d, "parameter", "ag_high")}
    assert by_aspect["bounds"].cls == "minor"
    assert by_aspect["value"].cls == "major" and "outside" in by_aspect["value"].why
    assert d.required == "major"
    assert "expected at least 2.0.0" in d.version_error


def test_widened_bound_is_minor_and_a_patch_bump_is_not_enough(tmp_path: Path) -> None:
    widened = AG_BOUNDS.replace("{min: 8, max: 20}", "{min: 6, max: 22}")
    d = diff_paths(SHIPPED, tuned(tmp_path, "w", [(AG_BOUNDS, widened)], version="1.0.1"))
    [c] = changes(d, "parameter", "ag_high")
    assert (c.aspect, c.cls, c.why) == ("bounds", "minor", "bound widened")
    assert d.bump == "patch" and d.required == "minor"
    assert "only a patch bump" in d.version_error
    assert (
        diff_paths(SHIPPED, tuned(tmp_path, "w2", [(AG_BOUNDS, widened)], version="1.1.0")).version_error
        is None
    )


def test_narrowed_bound_is_patch(tmp_path: Path) -> None:
    d = diff_paths(SHIPPED, tuned(tmp_path, "n", [(AG_BOUNDS, AG_BOUNDS.replace("max: 20", "max: 16"))]))
    [c] = changes(d, "parameter", "ag_high")
    assert (c.aspect, c.cls) == ("bounds", "patch")


def test_changed_condition_is_major_and_layout_only_is_patch(tmp_path: Path) -> None:
    d = diff_paths(
        SHIPPED,
        tuned(tmp_path, "c", [(PH_LOW_WHEN, "when: known(ph) and ph <= critical_ph_low\n")], version="1.1.0"),
    )
    [c] = changes(d, "rule", "critical.ph_low")
    assert (c.aspect, c.cls) == ("when", "major")
    assert c.new.endswith("ph <= critical_ph_low")
    assert d.required == "major" and "expected at least 2.0.0" in d.version_error
    spaced = diff_paths(
        SHIPPED, tuned(tmp_path, "s", [(PH_LOW_WHEN, "when: known(ph)  and  (ph < critical_ph_low)\n")])
    )
    [c] = changes(spaced, "rule", "critical.ph_low")
    assert (c.aspect, c.cls) == ("when", "patch")


def test_finding_severity_and_text_are_major_headline_minor(tmp_path: Path) -> None:
    rule = (
        '        severity: critical\n        text: "CRITICAL: pH {ph} is below the critical limit {critical_ph_low}. '
        'Notify according to local policy."\n        headline: "Critical pH"\n'
    )
    d = diff_paths(
        SHIPPED,
        tuned(
            tmp_path,
            "f",
            [
                (
                    rule,
                    rule.replace("severity: critical", "severity: warning").replace(
                        "Critical pH", "Very low pH"
                    ),
                )
            ],
            version="2.0.0",
        ),
    )
    got = {c.aspect: c.cls for c in changes(d, "rule", "critical.ph_low")}
    assert got == {"finding critical.ph_low.severity": "major", "finding critical.ph_low.headline": "minor"}
    assert d.version_error is None


def test_new_rule_is_minor_removed_rule_is_major(tmp_path: Path) -> None:
    block = SHIPPED.read_text(encoding="utf-8").split("  - id: critical.ph_high\n")[1].split("  - id: ")[0]
    added = "  - id: critical.ph_low_copy\n" + block.replace(
        "code: critical.ph_high", "code: critical.ph_high_copy"
    )
    new = tuned(
        tmp_path,
        "add",
        [("  - id: critical.ph_high\n", added + "  - id: critical.ph_high\n")],
        version="1.1.0",
    )
    d = diff_paths(SHIPPED, new)
    [c] = changes(d, "rule", "critical.ph_low_copy")
    assert (c.aspect, c.cls) == ("added", "minor")
    assert d.required == "minor" and d.version_error is None
    back = diff_paths(new, SHIPPED)  # the other way round the rule disappears
    [c] = changes(back, "rule", "critical.ph_low_copy")
    assert (c.aspect, c.cls) == ("removed", "major")
    assert back.bump == "backwards" and "backwards" in back.version_error


def test_overlay_tuning_is_patch_with_the_file_that_set_it(tmp_path: Path) -> None:
    def overlay(version: str, ag_high: int) -> Path:
        path = tmp_path / f"site-{version}-{ag_high}.yaml"
        path.write_text(
            "format: gasrules/1\n"
            f"extends: {SHIPPED}\n"
            "metadata: {id: test-site, version: " + version + ", title: Test site (invented), "
            "effective_date: 2026-12-01, status: draft}\n"
            "parameters:\n"
            f"  ag_high: {{value: {ag_high}, rationale: invented tuning for a test, "
            "source: {evidence: INV, note: invented for a test}}\n"
            "suspend:\n  - {rule: critical.ph_high, reason: invented reason for a test}\n",
            encoding="utf-8",
        )
        return path

    v1, v1_same, v101 = overlay("1.0.0", 11), overlay("1.0.0", 10), overlay("1.0.1", 10)
    d = diff_paths(v1, v1_same)
    [c] = [c for c in changes(d, "parameter", "ag_high") if c.aspect == "value"]
    assert (c.old, c.new, c.cls) == (11, 10, "patch")
    assert c.old_where.startswith(str(v1)) and c.new_where.startswith(str(v1_same))
    assert d.required == "patch" and "no version change" in d.version_error
    assert diff_paths(v1, v101).version_error is None
    base = diff_paths(SHIPPED, v1)  # base against a site overlay: classed, bump not checked
    assert base.version_error is None and any("different rulebook ids" in n for n in base.notes)
    [s] = changes(base, "rule", "critical.ph_high")
    assert (s.aspect, s.cls) == ("status", "minor") and "invented reason" in s.new


def test_version_bump_words() -> None:
    assert [
        version_bump("1.2.3", v) for v in ("1.2.3", "1.2.4", "1.3.0", "2.0.0", "1.2.2", "1.2.3-rc.1")
    ] == ["none", "patch", "minor", "major", "backwards", "none"]


def test_renderers_and_cli_exit_codes(tmp_path: Path) -> None:
    new = tuned(tmp_path, "t", [(AG_HIGH, "  ag_high:\n    value: 13\n")])
    d = diff_paths(SHIPPED, new)
    text = render_text(d)
    assert "[patch] ag_high value: 12 mmol/L -> 13 mmol/L" in text
    assert "ERROR: the content change is patch" in text
    md = render_markdown(d)
    assert "| `ag_high` | value | 12 | 13 | mmol/L | patch: moved inside its guard rails [8, 20] |" in md
    assert "never replaces, clinical judgement" in md
    data = json.loads(render_json(d))
    assert data["required"] == "patch" and data["counts"]["patch"] == 1
    runner = CliRunner()
    res = runner.invoke(diff_command.app, [str(SHIPPED), str(new), "--format", "json"])
    assert res.exit_code == 1 and json.loads(res.stdout)["version_error"]
    ok = tuned(tmp_path, "ok", [(AG_HIGH, "  ag_high:\n    value: 13\n")], version="1.0.1")
    assert cli.main(["diff", str(SHIPPED), str(ok), "--format", "markdown"]) == 0
    broken = tmp_path / "broken.yaml"
    broken.write_text("format: gasrules/1\nmetadata: {}\n", encoding="utf-8")
    res = runner.invoke(diff_command.app, [str(SHIPPED), str(broken)])
    assert res.exit_code == 5 and "broken.yaml" in res.output


@pytest.mark.parametrize(
    "edit",
    [
        (
            "    unit: mmol/L\n    bounds: {min: 8, max: 20}\n",
            "    unit: mmol/L\n    bounds: {min: 8, max: 20}\n    label: AG upper limit\n",
        )
    ],
)
def test_parameter_documentation_only_is_patch(tmp_path: Path, edit: tuple[str, str]) -> None:
    d = diff_paths(SHIPPED, tuned(tmp_path, "doc", [edit], version="1.0.1"))
    assert {(c.key, c.aspect, c.cls) for c in d.changes if c.kind == "parameter"} == {
        ("ag_high", "label", "patch")
    }
    assert d.version_error is None


def test_approvals_from_release_manifests_are_metadata(tmp_path: Path) -> None:
    from gasrules.governance.registry import write_manifest

    new = tuned(tmp_path, "a", [(AG_HIGH, "  ag_high:\n    value: 13\n")], version="1.0.1")
    old_sha = diff_paths(SHIPPED, SHIPPED).old.sha256
    releases = tmp_path / "releases"
    write_manifest(
        releases,
        {
            "rulebook": {"id": "adult-default", "version": "1.0.0", "sha256": old_sha},
            "approvers": [{"name": "A. Reviewer (invented)", "role": "clinical lead"}],
            "date": "2026-12-01T00:00:00Z",
        },
    )
    d = diff_paths(SHIPPED, new, releases)
    assert d.old.approvals and d.old.approvals[0]["approvers"][0]["name"] == "A. Reviewer (invented)"
    assert d.new.approvals == []
    [c] = changes(d, "metadata", "approvals")
    assert (c.cls, c.new) == ("none", "not approved")
    assert "A. Reviewer (invented) (clinical lead)" in c.old
    assert d.required == "patch" and d.version_error is None
