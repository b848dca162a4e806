"""Boundary probes: changed cut-points are found, and cases land on them under both versions.

The tuned rulebooks are copies of the shipped one with invented tunings (demo only). The probe
values asserted are arithmetic on those tunings: cut +/- one reporting step (common practice for
boundary testing, as in shared/governance.md, idea 1). The anion gap is Na - (Cl + HCO3)
(Kraut & Madias, Clin J Am Soc Nephrol 2007), so Cl is the input moved to place it.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from conftest import portable
from gasrules.cli.commands import probes as probes_command
from gasrules.core.resources import default_rulebook_path
from gasrules.governance.probes import (
    changed_cutpoints,
    default_bases,
    feeders,
    place,
    render_text,
    run_probes,
)
from gasrules.rulebook.build import load_rulebook

SHIPPED = default_rulebook_path()
AG_HIGH = "  ag_high:\n    value: 12\n"  # shipped value 12 mmol/L, bounds 8-20
PH_LOW = '    by: {input: sample_type, values: {venous: 7.30, mixed_venous: 7.30}}\n    rationale: "Lower limit of pH'


@pytest.fixture(scope="module")
def tuned(tmp_path_factory: pytest.TempPathFactory) -> Path:
    text = portable(SHIPPED.read_text(encoding="utf-8"), SHIPPED)
    for old, new in (
        (AG_HIGH, "  ag_high:\n    value: 13\n"),
        (PH_LOW, PH_LOW.replace("venous: 7.30, mixed", "venous: 7.31, mixed")),
        ("  version: 1.0.0\n", "  version: 1.0.1\n"),
    ):
        assert text.count(old) == 1, old
        text = text.replace(old, new)
    path = tmp_path_factory.mktemp("tuned") / "rulebook.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def test_changed_cutpoints_per_parameter_and_selector(tuned: Path) -> None:
    cuts = changed_cutpoints(load_rulebook(SHIPPED), load_rulebook(tuned))
    ag = {(c.owner, c.old, c.new) for c in cuts if c.threshold == "ag_high"}
    assert ("anion_gap.mildly_raised", 12.0, 13.0) in ag
    ph = [c for c in cuts if c.threshold == "ph_low"]
    assert ph and all(c.selector == ("sample_type", "venous") and (c.old, c.new) == (7.30, 7.31) for c in ph)
    assert not [c for c in cuts if c.threshold not in ("ag_high", "ph_low")]


def test_identical_rulebooks_have_nothing_to_probe() -> None:
    rb = load_rulebook(SHIPPED)
    assert changed_cutpoints(rb, rb) == []
    assert run_probes(rb, rb, []) == []


def test_derived_quantity_is_placed_by_bisection_on_a_feeding_input() -> None:
    rb = load_rulebook(SHIPPED)
    assert "cl" in feeders(rb, "anion_gap")
    # Na 140, Cl 104, HCO3 24: anion gap 12 (Kraut & Madias 2007 formula); target 13.4 -> Cl 102.6
    base = {"sample_type": "arterial", "ph": 7.4, "pco2": 40, "hco3": 24, "na": 140, "cl": 104, "k": 4}
    case = place(rb, base, "anion_gap", 13.4, "cl")
    assert case is not None and case["cl"] == pytest.approx(102.6)
    assert case["na"] == 140 and case["hco3"] == 24


def test_probes_flip_between_the_cuts_and_agree_outside(tuned: Path) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(tuned)
    bases = list(default_bases([SHIPPED.parent / "cases"], n_generated=50))
    [probe] = run_probes(old, new, bases, only=["anion_gap.mildly_raised"])
    assert probe.via == "cl"
    targets = [p.target for p in probe.points]
    assert targets == [11.9, 12.0, 12.1, 12.9, 13.0, 13.1]  # 12 and 13 +/- one step of 0.1
    assert all(p.reached for p in probe.points)
    differs = {p.target: p.differs for p in probe.points}
    # strictly above 12 and up to 13 the rule fires under 1.0.0 only; elsewhere both agree
    assert differs == {11.9: False, 12.0: False, 12.1: True, 12.9: True, 13.0: True, 13.1: False}
    flipped = [p for p in probe.points if p.differs][0]
    assert (flipped.old["owner_outcome"], flipped.new["owner_outcome"]) == ("fired", "not_fired")


def test_selector_cut_uses_that_selector(tuned: Path) -> None:
    old, new = load_rulebook(SHIPPED), load_rulebook(tuned)
    bases = list(default_bases([SHIPPED.parent / "cases"], n_generated=50))
    probes = run_probes(old, new, bases, only=["ph_state.acidaemia"])
    [probe] = probes
    assert probe.via is None and probe.points
    assert all(p.case["sample_type"] == "venous" for p in probe.points)
    assert [p.target for p in probe.points if p.differs] == [7.30]  # venous cut 7.30 -> 7.31
    text = render_text(probes, old.version, new.version)
    assert "ph_state.acidaemia: ph < ph_low [sample_type=venous]: 7.3 -> 7.31 [pH]" in text


def test_cli_json(tuned: Path) -> None:
    res = CliRunner().invoke(
        probes_command.app,
        [
            str(SHIPPED),
            str(tuned),
            "--only",
            "anion_gap.high_gap_acidosis",
            "--generated",
            "20",
            "--format",
            "json",
        ],
    )
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["old_version"] == "1.0.0" and data["new_version"] == "1.0.1"
    [p] = data["probes"]
    assert p["cut"]["threshold"] == "ag_high" and any(pt["differs"] for pt in p["points"])


def test_literal_threshold_change_is_a_changed_cut(tmp_path: Path) -> None:
    """A literal in a condition (discouraged, but legal) is paired by owner and position."""
    text = portable(SHIPPED.read_text(encoding="utf-8"), SHIPPED)
    anchor = "when: known(ph) and ph < critical_ph_low\n"
    assert text.count(anchor) == 1
    paths = []
    for name, literal in (("a", "7.1"), ("b", "7.05")):  # invented literals for the test
        p = tmp_path / name / "rulebook.yaml"
        p.parent.mkdir()
        p.write_text(text.replace(anchor, f"when: known(ph) and ph < {literal}\n"), encoding="utf-8")
        paths.append(p)
    old, new = load_rulebook(paths[0]), load_rulebook(paths[1])
    [cut] = changed_cutpoints(old, new)
    assert (cut.owner, cut.kind, cut.quantity, cut.old, cut.new) == (
        "critical.ph_low",
        "constant",
        "ph",
        7.1,
        7.05,
    )
    [probe] = run_probes(old, new, default_bases([], n_generated=200))
    assert [p.target for p in probe.points] == [7.04, 7.05, 7.06, 7.09, 7.1, 7.11]
    assert [p.target for p in probe.points if p.differs] == [7.05, 7.06, 7.09]
