"""Population-level validation: the cohort file, the generator, the operating-characteristics table
and `verify`, `document`, `release` and `impact` showing it.

The machinery is tested on tests/data/cohorts (a rulebook whose five rules each name a disorder
from one common-practice reference limit, so what it names on a generated case can be recounted
by hand). The shipped rulebooks are only checked for the table's shape and for generator
problems, never for meeting or failing their goals (their rules are being changed).

Published relations checked below (the cohort file states the same, with evidence tags):
Henderson-Hasselbalch pH = 6.1 + log10(HCO3 / (0.0307 x PCO2)) (Severinghaus, Stupfel & Bradley,
J Appl Physiol 1956); Winter's PCO2 = 1.5 x HCO3 + 8 +/- 2 (Albert, Dell & Winters, Ann Intern
Med 1967); metabolic alkalosis PCO2 = 40 + 0.7 x (HCO3 - 24) +/- 2 (Berend, de Vries & Gans,
N Engl J Med 2014); HCO3 +1 and +3.5 per 10 mmHg in acute and chronic respiratory acidosis
(Brackett, Cohen & Schwartz, N Engl J Med 1965; Adrogue & Madias, J Am Soc Nephrol 2010), -2 and
-4 per 10 mmHg in respiratory alkalosis (Adrogue & Madias 2010), each +/- 2 (common practice);
delta ratio 1-1.6 in an uncomplicated high-gap acidosis (Rastegar, J Am Soc Nephrol 2007).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml
from typer.testing import CliRunner

import gasrules
from gasrules.cli.commands import verify as V
from gasrules.verification import cohort_table as T
from gasrules.verification import cohorts as C

HERE = Path(__file__).resolve().parent
BOOK = HERE / "data" / "cohorts" / "rulebook.yaml"
ROOT = HERE.parent
ADULT = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
SITE = ROOT / "rulebooks" / "example-site" / "rulebook.yaml"
ROUND = 0.05 + 1e-9  # half a reporting step of a 1-decimal input
runner = CliRunner()


@pytest.fixture(scope="module")
def rb():
    return gasrules.load_rulebook(BOOK)


@pytest.fixture(scope="module")
def plan():
    return C.load_plan(BOOK)


def _cohort(plan, cid):
    return next(c for c in plan.cohorts if c.id == cid)


def _copy(tmp_path: Path) -> Path:
    shutil.copytree(BOOK.parent, tmp_path / "book")
    return tmp_path / "book" / "rulebook.yaml"


def _overlay(tmp_path: Path, base: Path, cohorts_text: str | None) -> Path:
    folder = tmp_path / "site"
    folder.mkdir()
    (folder / "rulebook.yaml").write_text(
        f"format: gasrules/1\nextends: {base}\nmetadata:\n  id: cohort-test-site\n  version: 0.1.0\n"
        "  title: Cohort test site\n  effective_date: 2026-12-01\n  status: draft\n"
        "  owners: [{name: tests, role: authors}]\n"
        "  intended_use: {population: tests, setting: tests}\n"
        "  changelog: [{version: 0.1.0, date: 2026-12-01, summary: first}]\n",
        encoding="utf-8",
    )
    if cohorts_text is not None:
        (folder / "cohorts.yaml").write_text(cohorts_text, encoding="utf-8")
    return folder / "rulebook.yaml"


# ----------------------------------------------------------------------------- generator


def test_same_seed_same_cases_and_cohorts_draw_independently(rb, plan):
    c = _cohort(plan, "metabolic_acidosis_high_gap")
    assert C.generate(rb, plan, c, 50) == C.generate(rb, plan, c, 50)
    other = C.CohortPlan(**{**plan.__dict__, "seed": plan.seed + 1})
    assert C.generate(rb, other, c, 50) != C.generate(rb, plan, c, 50)
    # a cohort's stream depends on its id and the seed only, not on the cohorts listed before it
    alone = C.CohortPlan(**{**plan.__dict__, "cohorts": [c]})
    assert C.generate(rb, alone, c, 50) == C.generate(rb, plan, c, 50)


def test_healthy_cases_inside_the_intervals_and_henderson_hasselbalch(rb, plan):
    cases = C.generate(rb, plan, _cohort(plan, "healthy"), 2000)
    assert len(cases) == 2000
    for x in cases:
        # the test rulebook's intervals (common practice): pH 7.35-7.45, PCO2 35-45, HCO3 22-26
        assert 7.35 <= x["ph"] <= 7.45 and 35 <= x["pco2"] <= 45 and 22 <= x["hco3"] <= 26
        # literal intervals of the cohort file: Na 136-144, K 3.5-5.0 (common practice), uncorrected gap
        # 8 to ag_high 12 (Kraut & Madias, Clin J Am Soc Nephrol 2007), albumin 35-50 g/L, PO2 85-100 (common practice)
        assert (
            136 <= x["na"] <= 144
            and 3.5 <= x["k"] <= 5.0
            and 35 <= x["albumin"] <= 50
            and 85 <= x["po2"] <= 100
        )
        assert 8 - ROUND <= x["na"] - x["cl"] - x["hco3"] <= 12 + ROUND
        # pH = 6.1 + log10(HCO3 / (0.0307 x PCO2)) (Severinghaus et al., J Appl Physiol 1956), to 2 decimals
        assert abs(x["ph"] - (6.1 + np.log10(x["hco3"] / (0.0307 * x["pco2"])))) <= 0.005 + 1e-9
        assert x["fio2"] == 0.21 and x["sample_type"] == "arterial"
        assert all(round(x[k], 1) == x[k] for k in ("pco2", "hco3", "na", "k", "cl", "albumin", "po2"))


def test_metabolic_acidosis_inside_winters_band_with_the_gap_raised_by_the_delta_ratio(rb, plan):
    for x in C.generate(rb, plan, _cohort(plan, "metabolic_acidosis_high_gap"), 2000):
        assert 8 <= x["hco3"] <= 18
        # Winter's formula 1.5 x HCO3 + 8 +/- 2 (Albert, Dell & Winters, Ann Intern Med 1967)
        assert abs(x["pco2"] - (1.5 * x["hco3"] + 8)) <= 2 + 1.5 * ROUND + ROUND
        # gap = 8..12 + (1 to 1.6) x (24 - HCO3) (Kraut & Madias 2007; Rastegar, J Am Soc Nephrol 2007)
        gap, fall = x["na"] - x["cl"] - x["hco3"], 24 - x["hco3"]
        assert 8 + 1.0 * fall - 3 * ROUND <= gap <= 12 + 1.6 * fall + 3 * ROUND


@pytest.mark.parametrize(
    "cid, slope", [("respiratory_acidosis_acute", 0.1), ("respiratory_alkalosis_chronic", 0.4)]
)
def test_respiratory_cohorts_inside_their_published_band(rb, plan, cid, slope):
    # acute respiratory acidosis: HCO3 +1 per 10 mmHg (Brackett et al., N Engl J Med 1965); chronic respiratory
    # alkalosis: -4 per 10 mmHg (Adrogue & Madias, J Am Soc Nephrol 2010); band +/- 2 (common practice)
    c = _cohort(plan, cid)
    for x in C.generate(rb, plan, c, 2000):
        assert abs(x["hco3"] - (24 + slope * (x["pco2"] - 40))) <= 2 + slope * ROUND + ROUND
        assert x["chronicity"] == c.spec["set"]["chronicity"]


def test_mixes_lie_beyond_the_band_by_the_stated_margin(rb, plan):
    # high-gap acidosis with respiratory alkalosis: PCO2 below Winter's 1.5 x HCO3 + 8 - 2 by at least 4 (margin)
    for x in C.generate(rb, plan, _cohort(plan, "high_gap_acidosis_with_respiratory_alkalosis"), 1000):
        assert (
            1.5 * x["hco3"] + 8 - 2 - 4 - 4 - 3 * ROUND
            <= x["pco2"]
            <= 1.5 * x["hco3"] + 8 - 2 - 4 + 3 * ROUND
        )
    # respiratory acidosis with metabolic alkalosis: HCO3 above 24 + 0.35 x (PCO2 - 40) + 2 (Adrogue & Madias 2010)
    # by 4 to 10 (margin 4, spread 6)
    for x in C.generate(rb, plan, _cohort(plan, "respiratory_acidosis_with_metabolic_alkalosis"), 1000):
        top = 24 + 0.35 * (x["pco2"] - 40) + 2
        assert top + 4 - 2 * ROUND <= x["hco3"] <= top + 10 + 2 * ROUND


def test_shipped_cohort_file_generates_plausible_cases_for_both_rulebooks(shipped_rb, site_rb):
    for path, book in ((ADULT, shipped_rb), (SITE, site_rb)):
        p = C.load_plan(path)
        assert C.check_plan(book, p) == []
        assert p.file.endswith("adult/cohorts.yaml")
        for c in p.cohorts:
            for x in C.generate(book, p, c, 300):
                for k, v in x.items():
                    if k == "case_id":
                        continue
                    spec = book.inputs[k]
                    assert spec.kind != "number" or spec.plausible_min <= v <= spec.plausible_max, (
                        c.id,
                        k,
                        v,
                    )


# ----------------------------------------------------------------------------- the table


def _res(*codes: str, status: str = "interpreted") -> dict:
    return {"status": status, "disorders": list(codes), "headline": " + ".join(codes) or "none"}


def test_row_arithmetic_on_hand_built_results():
    c = C.Cohort("mix", "mix", "a mix", ("a", "b"), {"all_named": 75.0}, {}, None)
    t = T.Tally(c)
    for r in (_res("a", "b"), _res("a", "b"), _res("a"), _res("a", "b", "c"), _res(status="rejected")):
        t.add({"case_id": "x", "ph": 7.4}, r)
    row = T.row(t)
    # 5 cases: primary 'a' in 4 (80 %), both named in 3 (60 %), nothing outside {a, b} in 4 (80 %), none in 1
    assert (row["n"], row["primary"], row["all_named"], row["no_second"], row["no_disorder"]) == (
        5,
        80.0,
        60.0,
        80.0,
        20.0,
    )
    assert row["failed_goals"] == ["all_named"] and not row["passed"]
    assert row["status"]["rejected"] == 20.0 and row["generator_problems"] == 1
    assert row["generator_example"]["case"] == {"ph": 7.4}
    assert [(w["disorders"], w["count"]) for w in row["wrong"]] == [([], 1), (["a"], 1), (["a", "b", "c"], 1)]


def test_table_matches_a_recount_by_hand(rb, plan):
    table = T.run_cohorts(rb, plan, size=300)
    rows = {r["id"]: r for r in table["rows"]}
    for c in plan.cohorts:
        cases = C.generate(rb, plan, c, 300)
        named = [_by_hand(x) for x in cases]
        want = set(c.expect)
        r = rows[c.id]
        assert r["n"] == 300 and r["status"]["interpreted"] == 100.0 and r["generator_problems"] == 0
        assert r["no_disorder"] == T.percent(sum(not n for n in named), 300)
        assert r["no_second"] == T.percent(sum(n <= want for n in named), 300)
        assert r["all_named"] == T.percent(sum(want <= n for n in named), 300)
    # every healthy case is inside the intervals the rules use, so none is named (strict < and >)
    assert rows["healthy"]["no_disorder"] == 100.0 and rows["healthy"]["passed"]
    # HCO3 8-18 is below 22 and the gap at least 8 + 1 x 6 = 14 above 12: the primary is always named
    assert rows["metabolic_acidosis_high_gap"]["primary"] == 100.0
    assert not rows["metabolic_acidosis_high_gap"]["passed"] and not table["passed"]


def _by_hand(x: dict) -> set[str]:
    """The test rulebook's five rules, written out (limits: common practice; gap 12: Kraut & Madias 2007)."""
    gap = round(x["na"] - (x["cl"] + x["hco3"]), 1)
    out = set()
    if x["hco3"] < 22:
        out.add("metabolic_acidosis_high_anion_gap" if gap > 12 else "metabolic_acidosis_normal_anion_gap")
    if x["hco3"] > 26:
        out.add("metabolic_alkalosis")
    if x["pco2"] > 45:
        out.add("respiratory_acidosis")
    if x["pco2"] < 35:
        out.add("respiratory_alkalosis")
    return out


def test_one_and_two_workers_give_the_same_table(rb, plan):
    small = C.CohortPlan(**{**plan.__dict__, "cohorts": plan.cohorts[:2]})
    assert T.run_cohorts(rb, small, size=100, workers=1) == T.run_cohorts(rb, small, size=100, workers=2)


# ----------------------------------------------------------------------------- the file and overlays


def test_overlay_inherits_cohorts_and_may_raise_a_goal(tmp_path):
    site = _overlay(
        tmp_path,
        BOOK,
        "format: gasrules-cohorts/1\ngoals:\n  healthy: {no_disorder: 99.5}\n"
        "cohort_goals:\n  high_gap_acidosis_with_respiratory_alkalosis: {all_named: 97}\n",
    )
    p = C.load_plan(site)
    assert p.file == str(BOOK.parent / "cohorts.yaml") and len(p.cohorts) == 6
    goals = {c.id: c.goal for c in p.cohorts}
    assert goals["healthy"] == {"no_disorder": 99.5}
    assert goals["high_gap_acidosis_with_respiratory_alkalosis"] == {"all_named": 97}
    assert goals["respiratory_acidosis_acute"] == {"primary": 95, "no_second": 95}


def test_overlay_lowering_a_goal_is_an_error_with_its_location(tmp_path):
    site = _overlay(
        tmp_path,
        BOOK,
        "format: gasrules-cohorts/1\ngoals:\n  simple: {primary: 90}\n"
        "cohort_goals:\n  healthy: {no_disorder: 50}\n",
    )
    with pytest.raises(C.CohortError) as exc:
        C.load_plan(site)
    text = [p.render() for p in exc.value.problems]
    assert len(text) == 2 and all("CO-E003" in t for t in text)
    assert any("site/cohorts.yaml:3:" in t and "primary 90 % lowers the inherited 95 %" in t for t in text)
    assert any(
        "site/cohorts.yaml:5:" in t and "no_disorder 50 % lowers the inherited 99 %" in t for t in text
    )
    out = runner.invoke(V.app, [str(site)])
    assert out.exit_code == 1 and "CO-E003" in out.output


def test_schema_and_name_errors_name_file_line_and_column(tmp_path, rb):
    book = _copy(tmp_path)
    f = book.parent / "cohorts.yaml"
    text = f.read_text(encoding="utf-8")
    f.write_text(text.replace("size: 400", "size: 400\nsizes: 3"), encoding="utf-8")
    with pytest.raises(C.CohortError) as exc:
        C.load_plan(book)
    (p,) = exc.value.problems
    # an unknown key is reported at the mapping that holds it (here the document, whose first key is line 4)
    assert (
        p.code == "CO-E002"
        and "'sizes' was unexpected" in p.message
        and "book/cohorts.yaml:4:1" in p.render()
    )
    f.write_text(
        text.replace("high: ag_high", "high: ag_top").replace(
            "- metabolic_acidosis_high_anion_gap\n  driver", "- metabolic_acidosis_hi\n  driver", 1
        ),
        encoding="utf-8",
    )
    problems = C.check_plan(rb, C.load_plan(book))
    assert sorted(p.code for p in problems) == ["CO-E004", "CO-E004"]
    assert any("'ag_top', not a numeric parameter" in p.message and p.location.line > 0 for p in problems)
    assert any(
        "'metabolic_acidosis_hi'" in p.message and "metabolic_alkalosis" in p.expected for p in problems
    )


def test_implausible_range_is_refused(tmp_path, rb):
    book = _copy(tmp_path)
    f = book.parent / "cohorts.yaml"
    f.write_text(
        f.read_text(encoding="utf-8").replace("- 50\n    - 80", "- 50\n    - 300", 1), encoding="utf-8"
    )
    (p,) = C.check_plan(rb, C.load_plan(book))
    assert p.code == "CO-E006" and "5 to 250 mm[Hg]" in p.expected


# ----------------------------------------------------------------------------- commands


def test_verify_prints_the_table_and_fails_on_a_goal(tmp_path):
    out = runner.invoke(V.app, [str(BOOK), "--workers", "1"])
    assert out.exit_code == 1
    assert "FAIL metabolic_acidosis_high_gap" in out.output and "PASS healthy" in out.output
    assert "wrong: " in out.output and "Goals: 3/6 cohorts meet them" in out.output
    quick = runner.invoke(V.app, [str(BOOK), "--no-cohorts"])
    assert quick.exit_code == 0 and "Cohorts" not in quick.output
    js = json.loads(runner.invoke(V.app, [str(BOOK), "--json", "--cohort-size", "50"]).output)
    assert (
        js["cohorts"]["size"] == 50 and len(js["cohorts"]["rows"]) == 6 and js["cohorts"]["passed"] is False
    )


def test_verify_passes_when_every_goal_is_met(tmp_path):
    book = _copy(tmp_path)
    f = book.parent / "cohorts.yaml"
    data = yaml.safe_load(f.read_text(encoding="utf-8"))
    data["cohorts"] = [c for c in data["cohorts"] if c["kind"] != "simple"]
    f.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    out = runner.invoke(V.app, [str(book), "--workers", "1"])
    assert out.exit_code == 0, out.output
    assert "Goals: 3/3 cohorts meet them" in out.output


def test_document_shows_the_table(rb):
    from gasrules.governance.review_document import build_document, render_html, render_markdown

    doc = build_document(BOOK, cohorts=True)
    md, page = render_markdown(doc), render_html(doc)
    assert "## Simulated cohorts" in md and "| metabolic_acidosis_high_gap | 400 |" in md and "**FAIL**" in md
    assert "<h2>Simulated cohorts" in page and '<tr class="fail"><td>metabolic_acidosis_high_gap</td>' in page
    assert build_document(BOOK).cohorts is None


def test_release_requires_the_goals_and_records_the_table(tmp_path):
    from gasrules.governance.release import Approver, ReleaseRefused, release

    book = _copy(tmp_path)
    lead = Approver("B. Reviewer", "clinical lead")
    with pytest.raises(ReleaseRefused) as exc:
        release(book, release_dir=tmp_path / "rel", approvers=[lead], authors=["A. Author"])
    reasons = [r for r in exc.value.reasons if r[0] == "cohorts.goal"]
    assert [r[1].split(":")[0] for r in reasons] == [
        "cohort metabolic_acidosis_high_gap",
        "cohort respiratory_acidosis_acute",
        "cohort respiratory_alkalosis_chronic",
    ]
    f = book.parent / "cohorts.yaml"
    data = yaml.safe_load(f.read_text(encoding="utf-8"))
    data["cohorts"] = [c for c in data["cohorts"] if c["kind"] != "simple"]
    f.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    out = release(book, release_dir=tmp_path / "rel", approvers=[lead], authors=["A. Author"])
    m = out.manifest["cohorts"]
    assert m["passed"] and [r["id"] for r in m["rows"]] == [c["id"] for c in data["cohorts"]]
    assert all("generator_example" not in r for r in m["rows"])


def test_impact_shows_the_figures_side_by_side(tmp_path):
    from gasrules.cli.commands import impact as I

    base = _copy(tmp_path)
    site = _overlay(tmp_path, base, None)
    text = site.read_text(encoding="utf-8")
    site.write_text(
        text + "parameters:\n  pco2_low: {value: 30, rationale: 'a lower limit', "
        "source: {evidence: CP, note: 'Common practice'}}\n",
        encoding="utf-8",
    )
    corpus = tmp_path / "c.jsonl"
    corpus.write_text('{"case_id": "1", "ph": 7.4, "pco2": 40, "hco3": 24}\n', encoding="utf-8")
    out = runner.invoke(I.app, [str(base), str(site), str(corpus), "-w", "1", "--no-progress"])
    assert out.exit_code == 0, out.output
    line = next(x for x in out.output.splitlines() if "metabolic_acidosis_high_gap" in x and "no other" in x)
    old, new = (float(v) for v in line.split()[4:6])
    # PCO2 below 30 instead of 35 names fewer respiratory alkaloses: more cases with no other disorder
    assert new > old
    js = json.loads(
        runner.invoke(
            I.app, [str(base), str(site), str(corpus), "-w", "1", "--no-progress", "-f", "json"]
        ).output
    )
    assert {r["cohort"] for r in js["cohorts"]} == {c.id for c in C.load_plan(base).cohorts}


# ----------------------------------------------------------------------------- shipped rulebooks (10,000 each, once)


@pytest.fixture(scope="module", params=[ADULT, SITE], ids=["adult", "example-site"])
def shipped_table(request):
    book = gasrules.load_rulebook(request.param)
    return T.table_for(request.param, book, workers=T.default_workers())


def test_shipped_cohorts_run_whole_without_generator_problems(shipped_table):
    # the table's shape only: whether the goals are met is the rulebook authors' business
    assert shipped_table["size"] == 10000 and len(shipped_table["rows"]) == 13
    assert all(r["n"] == 10000 for r in shipped_table["rows"])
    assert shipped_table["generator_problems"] == 0
    assert all(
        r["status"]["inconsistent"] == 0 and r["status"]["rejected"] == 0 for r in shipped_table["rows"]
    )
