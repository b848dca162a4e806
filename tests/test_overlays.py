"""Overlays and guard rails: a site tunes a base rulebook only inside the base's bounds.

Uses the mini rulebook and its overlays under tests/data/mini/overlays (site.yaml: accepted
overrides and a suspension; out_of_bounds.yaml and bad_choice.yaml: refused ones) and the
shipped example-site overlay. Locations are compared as Location fields (file, line, column),
which do not depend on the directory the tests run from, except where a test changes to the
repository root to compare the exact rendered text.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import pytest

import gasrules
from conftest import EXAMPLE_SITE, MINI, MINI_OVERLAYS, ROOT, SHIPPED, portable
from gasrules.evaluation.render import render_result
from gasrules.rulebook.bibliography import load_bibliographies
from gasrules.rulebook.identity import canonical_content, identity_content
from gasrules.rulebook.overlay import load_chain, resolve

SITE = MINI_OVERLAYS / "site.yaml"

# DuBose, Acidosis and alkalosis, Harrison's (table of mixed disorders), example 1:
# Na 140, K 4.0, Cl 106, HCO3 14, PaCO2 24, pH 7.39 -> anion gap 20, high-gap acidosis with
# respiratory alkalosis (Winter 1.5 x 14 + 8 = 29 +/- 2: Albert, Dell & Winters, Ann Intern Med 1967).
DUBOSE_E1 = {"ph": 7.39, "pco2": 24, "hco3": 14, "na": 140, "cl": 106}
# Story, Stewart acid-base: a simplified bedside approach, Anesth Analg 2016: Na 133, Cl 110,
# HCO3 15, albumin 22 g/L, pH 7.20, PCO2 40 -> anion gap 8, Figge-corrected 13.5 (Figge, Jabor,
# Kazda & Fencl, Crit Care Med 1998: + 0.25 x (44 - 22)).
STORY_E7 = {"ph": 7.20, "pco2": 40, "hco3": 15, "na": 133, "cl": 110, "albumin": 22}


COMPARISON_KEYS = ("quantity", "value", "compared", "op", "threshold", "threshold_value", "margin")


def core(comparisons: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The contract keys of trace comparisons (the engine may add more, e.g. whether one decided)."""
    return [{k: c[k] for k in COMPARISON_KEYS} for c in comparisons]


@pytest.fixture(scope="module")
def site_mini() -> Any:
    return gasrules.load_rulebook(SITE, cache=False)


def _line(path: Path, snippet: str) -> int:
    text = path.read_text(encoding="utf-8")
    assert text.count(snippet) == 1, snippet
    return text[: text.index(snippet)].count("\n") + 1


def _events(result: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {e["rule"]: e for e in result["trace"]}


# ----------------------------------------------------------------------------- accepted overrides


def test_override_inside_bounds_is_recorded_with_its_file_and_line(site_mini: Any, mini_rb: Any) -> None:
    p = site_mini.parameters["ag_high"]
    assert p.value == 11.0 and mini_rb.parameters["ag_high"].value == 12.0
    assert Path(p.set_by.file).resolve() == SITE.resolve()
    assert (p.set_by.line, p.set_by.col) == (_line(SITE, "    value: 11\n"), 12)
    # the declaration (unit, bounds, source of the bounds) stays the base's
    assert Path(p.location.file).resolve() == MINI.resolve()
    assert p.bounds == (8.0, 20.0)
    # a parameter the overlay does not touch is still set by the base
    q = site_mini.parameters["winter_slope"]
    assert Path(q.set_by.file).resolve() == MINI.resolve()
    assert q.set_by.line == _line(MINI, "    value: 1.5\n")


def test_override_is_shown_in_the_trace(site_mini: Any) -> None:
    result = gasrules.interpret(site_mini, DUBOSE_E1)
    event = _events(result)["anion_gap.high"]
    assert event["outcome"] == "fired"
    assert event["parameters"]["ag_high"] == {
        "value": 11.0,
        "unit": "mmol/L",
        "set_by": str(site_mini.parameters["ag_high"].set_by),
    }
    assert event["parameters"]["ag_high"]["set_by"].split(":")[0].endswith("overlays/site.yaml")
    # DuBose E1 (anion gap 20 > 11): high-gap acidosis with respiratory alkalosis, as in the base
    assert result["disorders"] == ["metabolic_acidosis_high_anion_gap", "respiratory_alkalosis"]


def test_override_changes_the_decision_at_its_threshold(site_mini: Any, mini_rb: Any) -> None:
    # Anion gap exactly 12 (Na 140, Cl 108, HCO3 20): not above the base limit 12 (Kraut & Madias,
    # Clin J Am Soc Nephrol 2007), above the site's 11 (Winter et al., Arch Intern Med 1990).
    # pH 7.34 fits Henderson-Hasselbalch for HCO3 20 / PCO2 38 (6.1 + log10(20 / (0.0307 x 38)) = 7.334,
    # NCCLS form with S 0.0307): consistent, acidaemic.
    case = {"ph": 7.34, "pco2": 38, "hco3": 20, "na": 140, "cl": 108}
    base, site = gasrules.interpret(mini_rb, case), gasrules.interpret(site_mini, case)
    assert base["values"]["anion_gap"] == site["values"]["anion_gap"] == 12.0
    assert "metabolic_acidosis_normal_anion_gap" in base["disorders"]
    assert "metabolic_acidosis_high_anion_gap" in site["disorders"]


def test_choice_override(site_mini: Any, mini_rb: Any) -> None:
    assert site_mini.parameters["albumin_correction"].value == "none"
    base, site = gasrules.interpret(mini_rb, STORY_E7), gasrules.interpret(site_mini, STORY_E7)
    # Story 2016 / Figge 1998: AG 8, corrected 13.5 -> high gap with the correction
    assert base["values"]["anion_gap_albumin_corrected"] == 13.5
    assert "metabolic_acidosis_high_anion_gap" in base["disorders"]
    # the site does not correct: the gap 8 is read as normal
    assert "anion_gap_albumin_corrected" not in site["values"]
    assert "metabolic_acidosis_normal_anion_gap" in site["disorders"]


def test_by_value_override(site_mini: Any, mini_rb: Any) -> None:
    # Venous pH 7.30: not below the base venous limit 7.30, below the site's 7.31
    # (venous interval: common practice). PCO2 46 / HCO3 22 -> HH pH 7.293 (NCCLS form): consistent.
    case = {"ph": 7.30, "pco2": 46, "hco3": 22, "sample_type": "venous"}
    base, site = gasrules.interpret(mini_rb, case), gasrules.interpret(site_mini, case)
    assert _events(base)["ph_state.acidaemia"]["outcome"] == "not_fired"
    event = _events(site)["ph_state.acidaemia"]
    assert event["outcome"] == "fired"
    assert event["parameters"]["ph_low"]["value"] == 7.31
    assert event["parameters"]["ph_low"]["selected_by"] == "sample_type=venous"
    assert core(event["comparisons"]) == [
        {
            "quantity": "ph",
            "value": 7.30,
            "compared": 7.30,
            "op": "<",
            "threshold": "ph_low",
            "threshold_value": 7.31,
            "margin": -0.01,
        }
    ]


def test_by_value_override_keeps_the_base_as_source_of_other_values(site_mini: Any) -> None:
    result = gasrules.interpret(site_mini, {"ph": 7.40, "pco2": 40, "hco3": 24, "sample_type": "arterial"})
    set_by = _events(result)["ph_state.acidaemia"]["parameters"]["ph_low"]["set_by"]
    assert set_by.split(":")[0].endswith("mini/rulebook.yaml")


def test_resolved_records_which_file_set_each_parameter() -> None:
    docs, problems = load_chain(SITE)
    assert problems == [] and [Path(d.file).name for d in docs] == ["rulebook.yaml", "site.yaml"]
    resolved, problems = resolve(docs)
    assert problems == []
    by_file = {name: Path(ref.doc.file).name for name, ref in resolved.param_set_by.items()}
    # `value` set by the site for two parameters; for ph_low the site set only the venous by-value
    assert {n for n, f in by_file.items() if f == "site.yaml"} == {"ag_high", "albumin_correction"}
    assert Path(resolved.param_by_set_by["ph_low"]["venous"].doc.file).name == "site.yaml"
    assert resolved.base_ids == ["mini-acid-base@0.1.0"]


def test_overlay_adds_parameters_and_rules(tmp_path: Path) -> None:
    overlay = tmp_path / "add.yaml"
    overlay.write_text(
        f"format: gasrules/1\nextends: {json.dumps(str(MINI))}\n"
        "metadata: {id: mini-add, version: 0.1.0, title: Adds a rule, effective_date: 2026-12-01, status: draft}\n"
        "parameters:\n"
        "  ph_critical_low:\n"
        "    value: 7.10\n"
        '    unit: "[pH]"\n'
        "    bounds: {min: 6.9, max: 7.25}\n"
        '    rationale: "Life-threatening acidaemia."\n'
        '    source: {evidence: CP, note: "Common practice"}\n'
        "rules:\n"
        "  - id: critical.ph_low\n"
        "    status: active\n"
        "    step: ph_state\n"
        "    when: ph < ph_critical_low\n"
        "    findings:\n"
        '      - {code: critical.ph_low, category: critical, severity: critical, text: "pH {ph} is critical."}\n',
        encoding="utf-8",
    )
    rb = gasrules.load_rulebook(overlay, cache=False)
    assert Path(rb.parameters["ph_critical_low"].set_by.file).resolve() == overlay.resolve()
    # pH 7.05 is below the common-practice critical limit 7.10 (common practice)
    result = gasrules.interpret(rb, {"ph": 7.05})
    assert [f["code"] for f in result["findings"] if f["severity"] == "critical"] == ["critical.ph_low"]


# ----------------------------------------------------------------------------- refused overrides


def test_outside_bounds_names_both_files(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(ROOT)
    got = [p.render() for p in gasrules.check_rulebook("tests/data/mini/overlays/out_of_bounds.yaml")]
    assert got == [
        "tests/data/mini/overlays/out_of_bounds.yaml:12:12: RB-E040 override of 'ag_high' to 25 is outside the "
        "base guard rails [8, 20] set at tests/data/mini/rulebook.yaml:185:13 (at parameters.ag_high.value); "
        "expected a value from 8 to 20",
        "tests/data/mini/overlays/out_of_bounds.yaml:16:47: RB-E040 override of 'ph_low' to 7.1 is outside the "
        "base guard rails [7.28, 7.38] set at tests/data/mini/rulebook.yaml:118:13 "
        "(at parameters.ph_low.by.values.venous); expected a value from 7.28 to 7.38",
    ]
    # the named lines are the override and the base's bounds
    assert _line(MINI_OVERLAYS / "out_of_bounds.yaml", "    value: 25\n") == 12
    assert _line(MINI, "    bounds: {min: 8, max: 20}\n") == 185
    assert _line(MINI, "    bounds: {min: 7.28, max: 7.38}\n") == 118
    with pytest.raises(gasrules.RulebookError):
        gasrules.load_rulebook("tests/data/mini/overlays/out_of_bounds.yaml", cache=False)


@pytest.mark.parametrize("value", [8, 20, 8.0, 19.99])
def test_bounds_are_inclusive(value: float, tmp_path: Path) -> None:
    overlay = tmp_path / "edge.yaml"
    overlay.write_text(
        f"format: gasrules/1\nextends: {json.dumps(str(MINI))}\n"
        "metadata: {id: mini-edge, version: 0.1.0, title: Edge, effective_date: 2026-12-01, status: draft}\n"
        f'parameters:\n  ag_high: {{value: {value}, rationale: "At the edge."}}\n',
        encoding="utf-8",
    )
    assert gasrules.load_rulebook(overlay, cache=False).parameters["ag_high"].value == float(value)


@pytest.mark.parametrize("value", [7.99, 20.01, -12, 1e9])
def test_just_outside_bounds_refused(value: float, tmp_path: Path) -> None:
    overlay = tmp_path / "edge.yaml"
    overlay.write_text(
        f"format: gasrules/1\nextends: {json.dumps(str(MINI))}\n"
        "metadata: {id: mini-edge, version: 0.1.0, title: Edge, effective_date: 2026-12-01, status: draft}\n"
        f'parameters:\n  ag_high: {{value: {value}, rationale: "Outside."}}\n',
        encoding="utf-8",
    )
    assert [p.code for p in gasrules.check_rulebook(overlay)] == ["RB-E040"]


def test_bad_choice_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(ROOT)
    got = [p.render() for p in gasrules.check_rulebook("tests/data/mini/overlays/bad_choice.yaml")]
    assert got[0] == (
        "tests/data/mini/overlays/bad_choice.yaml:13:12: RB-E042 'carvounis' is not a choice of "
        "parameter 'albumin_correction' (at parameters.albumin_correction.value); "
        "expected one of figge, none"
    )


def test_bad_choice_and_unknown_suspension_reported_together() -> None:
    assert [p.code for p in gasrules.check_rulebook(MINI_OVERLAYS / "bad_choice.yaml")] == [
        "RB-E042",
        "RB-E043",
    ]


# ----------------------------------------------------------------------------- suspension


def test_suspended_rule_with_reason(site_mini: Any, mini_rb: Any) -> None:
    # P/F 50 / 0.5 = 100 < 200: the Berlin "moderate" limit (ARDS Definition Task Force, JAMA 2012)
    case = dict(DUBOSE_E1, po2=50, fio2=0.5, sample_type="arterial")
    base, site = gasrules.interpret(mini_rb, case), gasrules.interpret(site_mini, case)
    assert _events(base)["oxygenation.pf_moderate"]["outcome"] == "fired"
    assert "oxygenation.pf_low" in [f["code"] for f in base["findings"]]
    assert _events(site)["oxygenation.pf_moderate"] == {
        "rule": "oxygenation.pf_moderate",
        "step": "oxygenation",
        "title": "P/F in the Berlin moderate band or below",
        "outcome": "suspended",
        "reason": "Oxygenation is reported by the site's ventilation protocol.",
    }
    assert "oxygenation.pf_low" not in [f["code"] for f in site["findings"]]
    # a suspended rule is not a gap in the interpretation
    assert site["status"] == "interpreted"
    assert all(n["what"] != "Oxygenation" for n in site["not_assessed"])
    rule = next(r for r in site_mini.rules if r.id == "oxygenation.pf_moderate")
    assert (rule.status, rule.suspended_reason) == (
        "suspended",
        "Oxygenation is reported by the site's ventilation protocol.",
    )


def test_suspension_needs_a_reason(tmp_path: Path) -> None:
    overlay = tmp_path / "no_reason.yaml"
    overlay.write_text(
        f"format: gasrules/1\nextends: {json.dumps(str(MINI))}\n"
        "metadata: {id: mini-x, version: 0.1.0, title: X, effective_date: 2026-12-01, status: draft}\n"
        "suspend:\n  - {rule: oxygenation.pf_moderate}\n",
        encoding="utf-8",
    )
    problems = gasrules.check_rulebook(overlay)
    assert [(p.code, p.message) for p in problems] == [("RB-E010", "'reason' is required")]


# ----------------------------------------------------------------------------- identity


def _variant(tmp_path: Path, name: str, old: str, new: str, source: Path = MINI) -> Path:
    text = portable(source.read_text(encoding="utf-8"), source)
    assert text.count(old) == 1, old
    path = tmp_path / name
    path.write_text(text.replace(old, new), encoding="utf-8")
    return path


def _sha(path: Path) -> str:
    return gasrules.load_rulebook(path, cache=False).sha256


def test_sha256_is_over_canonical_json_of_resolved_content(mini_rb: Any) -> None:
    # Identity scheme 2 (integrity issue): sha256 of canonical JSON (sorted keys, no insignificant
    # whitespace) of the whole resolved rulebook, metadata.status and metadata.changelog excluded.
    docs, _ = load_chain(MINI)
    resolved, _ = resolve(docs)
    content = identity_content(resolved)
    assert {"metadata", "inputs", "parameters", "derived", "rules", "steps", "presentation"} <= set(content)
    assert not {"status", "changelog"} & set(content["metadata"])
    assert {"id", "version", "title", "owners", "intended_use"} <= set(content["metadata"])
    # scheme 1 (kept for releases made before) covered the clinical content only
    assert not {"status", "owners", "changelog", "metadata"} & set(canonical_content(resolved))
    # numbers are written as floats, so 12 and 12.0 (one value) hash alike
    floats = json.loads(json.dumps(content), parse_int=float)
    text = json.dumps(floats, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    # the bibliography the rulebook cites is shown to users, so its content is part of the identity
    bib, problems = load_bibliographies(docs)
    assert problems == [] and bib.entries
    entries = json.dumps(bib.entries, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    content_sha = hashlib.sha256(text.encode("utf-8")).hexdigest()
    expected = hashlib.sha256(
        f"{content_sha}+bibliography:{hashlib.sha256(entries.encode()).hexdigest()}".encode()
    ).hexdigest()
    assert mini_rb.sha256 == expected
    assert mini_rb.identity == {"id": "mini-acid-base", "version": "0.1.0", "sha256": mini_rb.sha256}


@pytest.mark.parametrize(
    "old, new",
    [
        ("  status: draft\n", "  status: approved\n"),
        ("  status: draft\n", "  status: active\n"),
        (
            '    - {version: 0.1.0, date: 2026-12-01, summary: "First mini rulebook for engine tests."}\n',
            '    - {version: 0.1.0, date: 2026-12-01, summary: "First mini rulebook for engine tests."}\n'
            '    - {version: 0.1.0, date: 2026-12-02, summary: "Approved."}\n',
        ),
        ("# A small real rulebook", "# (a comment changes nothing)\n# A small real rulebook"),
        ("    value: 12\n", "    value:     12   # same number, other spacing\n"),
        ("    bounds: {min: 8, max: 20}\n", "    bounds:\n      max: 20\n      min: 8\n"),
    ],
)
def test_sha256_unchanged_by_lifecycle_metadata(old: str, new: str, tmp_path: Path, mini_rb: Any) -> None:
    assert _sha(_variant(tmp_path, "rb.yaml", old, new)) == mini_rb.sha256


def test_sha256_unchanged_by_number_spelling(tmp_path: Path, mini_rb: Any) -> None:
    assert _sha(_variant(tmp_path, "rb.yaml", "    value: 12\n", "    value: 12.0\n")) == mini_rb.sha256


@pytest.mark.parametrize(
    "old, new",
    [
        ("    value: 12\n", "    value: 11\n"),  # ag_high
        ("    bounds: {min: 8, max: 20}\n", "    bounds: {min: 8, max: 18}\n"),
        ("    expr: na - (cl + hco3)\n", "    expr: na - cl - hco3\n"),
        ("    when: ph < ph_low\n", "    when: ph <= ph_low\n"),
        ("  version: 0.1.0\n", "  version: 0.1.1\n"),
        (
            '    - {name: "gasrules engine tests", role: "authors"}\n',  # owners are hashed (scheme 2)
            '    - {name: "gasrules engine tests", role: "authors"}\n    - {name: "A reviewer", role: "sign-off"}\n',
        ),
        (
            "    status: active\n    step: ph_state\n    title: Acidaemia\n",
            "    status: suspended\n    step: ph_state\n    title: Acidaemia\n",
        ),
    ],
)
def test_sha256_changed_by_content(old: str, new: str, tmp_path: Path, mini_rb: Any) -> None:
    assert _sha(_variant(tmp_path, "rb.yaml", old, new)) != mini_rb.sha256


def test_overlay_sha256(tmp_path: Path, site_mini: Any, mini_rb: Any) -> None:
    assert site_mini.sha256 != mini_rb.sha256
    text = SITE.read_text(encoding="utf-8").replace(
        "extends: ../rulebook.yaml", f"extends: {json.dumps(str(MINI))}"
    )
    same = tmp_path / "same.yaml"
    same.write_text(text.replace("  status: draft\n", "  status: approved\n"), encoding="utf-8")
    assert _sha(same) == site_mini.sha256
    other = tmp_path / "other.yaml"
    other.write_text(text.replace("    value: 11\n", "    value: 10\n"), encoding="utf-8")
    assert _sha(other) != site_mini.sha256


# ----------------------------------------------------------------------------- the shipped example overlay


def test_example_site_loads(site_rb: Any, shipped_rb: Any) -> None:
    assert site_rb.id == "example-site-halden-cross"
    assert [Path(f).name for f in site_rb.files] == ["rulebook.yaml", "rulebook.yaml"]
    assert Path(site_rb.parameters["ag_high"].set_by.file).resolve() == EXAMPLE_SITE.resolve()
    assert Path(site_rb.parameters["winter_slope"].set_by.file).resolve() == SHIPPED.resolve()
    assert site_rb.parameters["ag_high"].value == 11.0 and shipped_rb.parameters["ag_high"].value == 12.0


def test_example_site_text_in_kpa_json_canonical(site_rb: Any) -> None:
    result = gasrules.interpret(site_rb, dict(DUBOSE_E1, k=4.0))
    # JSON: canonical units. Winter 1.5 x 14 + 8 = 29 mmHg (Albert, Dell & Winters 1967)
    assert result["values"]["expected_pco2"] == 29.0
    assert result["units"]["expected_pco2"] == "mm[Hg]"
    assert result["inputs"]["pco2"] == 24.0
    # Text: 29 mmHg / 7.50062 = 3.87 kPa and 24 / 7.50062 = 3.20 kPa (1 mmHg = 133.322387415 Pa, ISO 80000-4)
    text = render_result(site_rb, result)
    assert "3.87 kPa" in text and "3.20 kPa" in text
    expected_line = next(line for line in text.splitlines() if line.strip().startswith("Expected PaCO2 for"))
    assert expected_line.endswith("3.87 kPa")
    assert "mmHg" not in text
    suspended = [e for e in result["trace"] if e["outcome"] == "suspended"]
    assert [e["rule"] for e in suspended] == ["ventilation.ve_for_target"]


def test_shipped_rulebook_text_in_mmhg(shipped_rb: Any) -> None:
    text = render_result(shipped_rb, gasrules.interpret(shipped_rb, dict(DUBOSE_E1, k=4.0)))
    assert "29.0 mmHg" in text and "kPa" not in text


def test_bibliography_content_is_part_of_the_identity(tmp_path: Path) -> None:
    """Editing a cited entry (here the year of one publication) changes the rulebook hash."""
    base = gasrules.load_rulebook(MINI, cache=False)
    shutil.copytree(MINI.parent, tmp_path / "mini")
    bib = tmp_path / "mini" / "bibliography.yaml"
    text = bib.read_text(encoding="utf-8")
    assert text.count("year: 1998") == 1
    bib.write_text(text.replace("year: 1998", "year: 1999"), encoding="utf-8")
    assert gasrules.load_rulebook(tmp_path / "mini" / "rulebook.yaml", cache=False).sha256 != base.sha256


# ---------------------------------------------------------------- intended use of an overlay


def _overlay_with_use(tmp_path: Path, population: str) -> Path:
    path = tmp_path / "site.yaml"
    path.write_text(
        "format: gasrules/1\n"
        f"extends: {json.dumps(str(MINI))}\n"
        "metadata:\n  id: use-site\n  version: 0.1.0\n  title: Use site\n  effective_date: 2026-12-01\n"
        "  status: draft\n  intended_use:\n"
        f'    population: {json.dumps(population)}\n    setting: "Engine tests; not for clinical use"\n',
        encoding="utf-8",
    )
    return path


def test_overlay_intended_use_is_shown_in_diff_and_review_document(tmp_path: Path) -> None:
    from gasrules.governance.diff import diff_paths, render_text
    from gasrules.governance.review_document import build_document, render_markdown

    changed = _overlay_with_use(tmp_path, "Children (engine tests only)")
    text = render_text(diff_paths(MINI, changed))
    assert "[minor] intended_use value" in text and "Children (engine tests only)" in text
    md = render_markdown(build_document(changed))
    assert "| Intended use of the base (differs) | population: Adults (engine tests only)" in md
    same = _overlay_with_use(tmp_path, "Adults (engine tests only)")  # the base's own words
    assert "intended_use value" not in render_text(diff_paths(MINI, same))
    assert "Intended use of the base" not in render_markdown(build_document(same))
