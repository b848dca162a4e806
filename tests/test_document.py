"""The review document: parameters with value, unit, guard rails, source and setting file; rules
in plain language; changes since a previous version with a corpus impact; HTML self-contained.

Rulebook: tests/data/release (pH state; common-practice arterial pH interval 7.35-7.45) and the
shipped example-site overlay (for "which file set each parameter").
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

import gasrules
from gasrules.cli import main
from gasrules.governance.review_document import build_document, condition_text, render_html, render_markdown

DATA = Path(__file__).resolve().parent / "data" / "release"
ROOT = Path(__file__).resolve().parents[1]
SITE = ROOT / "rulebooks" / "example-site" / "rulebook.yaml"


@pytest.fixture
def tuned(tuned_release_rulebook: Path) -> Path:
    return tuned_release_rulebook


def test_parameters_carry_value_unit_bounds_source_and_setter() -> None:
    md = render_markdown(build_document(DATA / "rulebook.yaml"))
    row = next(line for line in md.splitlines() if line.startswith("| `ph_low`"))
    assert row == (
        "| `ph_low` | 7.35 [pH] | 7.3 to 7.38 | Common practice (arterial pH reference interval 7.35-7.45) "
        f"(CP) | {gasrules.load_rulebook(DATA / 'rulebook.yaml').parameters['ph_low'].set_by.file}:28 | "
        "Lower limit of the arterial pH reference interval. |"
    )


def test_overlay_parameters_name_the_file_that_set_them() -> None:
    doc = build_document(SITE)
    by_name = {p["name"]: p for p in doc.parameters}
    assert by_name["ag_high"]["set_by"].startswith(
        str(gasrules.load_rulebook(SITE).parameters["ag_high"].set_by.file)
    )
    assert "example-site" in by_name["ag_high"]["set_by"]
    assert "adult" in by_name["ph_low"]["set_by"] and "example-site" not in by_name["ph_low"]["set_by"]


def test_rules_in_plain_language() -> None:
    rb = gasrules.load_rulebook(DATA / "rulebook.yaml")
    assert condition_text(rb, "ph < ph_low") == "pH < ph_low [7.35 [pH]]"
    assert condition_text(rb, 'known(ph) and has("ph.normal")') == "pH is known and 'ph.normal' was concluded"
    md = render_markdown(build_document(DATA / "rulebook.yaml"))
    block = md.split("#### `ph.acidaemia`: Acidaemia", 1)[1].split("####", 1)[0]
    assert "* **Concludes:** The blood is more acid than the reference interval allows." in block
    assert "* **Why:** A pH below the lower reference limit defines acidaemia." in block
    assert "* **When:** pH < ph_low [7.35 [pH]]" in block
    assert "* **Finding** `ph.acidaemia` (warning): pH {ph} is below {ph_low}: acidaemia." in block
    assert "* **References:** Common practice" in block
    assert md.startswith("# pH state (release tests): review document\n\n> Decision support only")


def test_changes_since_and_impact(tuned: Path, tmp_path: Path) -> None:
    corpus = tmp_path / "corpus.csv"
    # pH 7.32 and 7.33 sit between the old (7.35) and new (7.30) lower limit; the rest do not move
    corpus.write_text("case_id,ph\na,7.20\nb,7.32\nc,7.33\nd,7.40\ne,not-a-number\n", encoding="utf-8")
    doc = build_document(tuned, since=DATA / "rulebook.yaml", corpus=corpus)
    assert doc.changes is not None and doc.changes["required"] == "patch"
    assert doc.impact is not None
    assert (doc.impact["cases"], doc.impact["changed_findings"], doc.impact["changed_disorders"]) == (5, 2, 0)
    md = render_markdown(doc)
    assert "## Changes since release-test 1.0.0" in md
    assert "| patch | parameter | `ph_low` | value | 7.35 | 7.3 |" in md
    assert "5 cases (0 unreadable, counted not dropped): 0 change their disorders, 2 their findings." in md


def test_html_is_self_contained_and_escaped(tuned: Path) -> None:
    page = render_html(build_document(tuned, since=DATA / "rulebook.yaml"))
    assert page.startswith("<!DOCTYPE html>") and page.rstrip().endswith("</html>")
    assert "<script" not in page and not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", page)
    assert "pH &lt; ph_low [7.3 [pH]]" in page  # escaped, with the new value
    assert '<span class="patch">patch</span>' in page


def test_document_command(tuned: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "review"
    assert main(["document", str(tuned), "--since", str(DATA / "rulebook.yaml"), "--out", str(out)]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["release-test-1.0.1.html", "release-test-1.0.1.md"]
    capsys.readouterr()
    assert main(["document", str(DATA / "rulebook.yaml")]) == 0
    assert capsys.readouterr().out.startswith("# pH state (release tests): review document")
    assert main(["document", str(DATA / "rulebook.yaml"), "--corpus", "x.csv"]) == 2
    assert "--corpus needs --since" in capsys.readouterr().err
    broken = tmp_path / "broken.yaml"
    broken.write_text("format: gasrules/1\nmetadata: {id: x}\n", encoding="utf-8")
    assert main(["document", str(broken)]) == 5
