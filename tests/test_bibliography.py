"""Citable sources: the shipped bibliography, the keys that cite it, and the migration tool.

No clinical number is asserted here; the fixtures cite invented keys or entries of
rulebooks/bibliography.yaml by key.
"""

from __future__ import annotations

import importlib.util
import json
import os
import subprocess
from pathlib import Path

import pytest
import yaml

import gasrules
import gasrules.verification.suite as S
from conftest import EXAMPLE_SITE, ROOT, SHIPPED
from gasrules.rulebook.bibliography import Bibliography, describe, suggest
from gasrules.rulebook.loader import load_document
from gasrules.rulebook.schema import validate_document

BIBLIOGRAPHY = ROOT / "rulebooks" / "bibliography.yaml"
BENCH = ROOT / "tools" / "bench" / "rulebook.yaml"


def _migrate_module():
    spec = importlib.util.spec_from_file_location("cite_migrate", ROOT / "tools" / "cite_migrate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# ----------------------------------------------------------------------------- the shipped bibliography


def test_shipped_bibliography_matches_its_schema() -> None:
    doc, problems = load_document(BIBLIOGRAPHY)
    assert doc is not None and problems == []
    assert validate_document(doc, "bibliography.schema.json") == []
    entries = doc.data["entries"]
    assert len(entries) >= 40
    assert all(e["details"] in ("read", "from_memory") for e in entries.values())


@pytest.mark.parametrize("path", [SHIPPED, EXAMPLE_SITE, BENCH], ids=["adult", "example-site", "bench"])
def test_every_cited_key_exists(path: Path) -> None:
    rb = gasrules.load_rulebook(path)  # an unknown key would be RB-E051
    assert rb.bibliography is not None and rb.bibliography.files
    suite = S.load_suite(path)
    assert S.check_refs(rb, suite) == []


def test_every_entry_is_cited_by_a_shipped_rulebook_or_case() -> None:
    unused = None
    for path in (SHIPPED, EXAMPLE_SITE, BENCH):
        here = set(S.unused_entries(gasrules.load_rulebook(path), S.load_suite(path)))
        unused = here if unused is None else unused & here
    assert unused == set()


def test_every_parameter_names_a_key_or_says_why_none_exists() -> None:
    for path in (SHIPPED, BENCH):
        rb = gasrules.load_rulebook(path)
        for name, p in rb.parameters.items():
            src = p.source
            if src["evidence"] in ("S", "M"):
                assert src.get("ref"), name
            else:
                assert src.get("ref") or src.get("note"), name


def test_describe_names_authors_title_journal_and_how_known() -> None:
    rb = gasrules.load_rulebook(SHIPPED)
    text = describe(rb.bibliography.entries["figge1998"])
    assert text == (
        "Figge J, Jabor A, Kazda A, et al. Anion gap and hypoalbuminemia. "
        "Crit Care Med 1998;26(11):1807-1810. [details read]"
    )
    assert describe(rb.bibliography.entries["dubose_harrison"]).endswith("[details read]")


def test_document_lists_the_cited_references_per_rule() -> None:
    from gasrules.governance.review_document import build_document, render_markdown

    md = render_markdown(build_document(SHIPPED))
    assert "[batlle1988] Batlle DC, Hizon M, Cohen E, et al. The use of the urinary anion gap" in md
    assert "methods" + ".md" not in md


def test_overlay_inherits_its_base_bibliography_and_adds_its_own(tmp_path: Path) -> None:
    from conftest import MINI_OVERLAYS

    site = (MINI_OVERLAYS / "site.yaml").read_text(encoding="utf-8")
    site = site.replace(
        "extends: ../rulebook.yaml", f"extends: {json.dumps(str(MINI_OVERLAYS.parent / 'rulebook.yaml'))}"
    ).replace("format: gasrules/1\n", "format: gasrules/1\nbibliography: local.yaml\n")
    site = site.replace(
        "source: {ref: winter1990, evidence: S}", "source: {ref: [winter1990, site_study2026], evidence: S}"
    )
    (tmp_path / "site.yaml").write_text(site, encoding="utf-8")
    (tmp_path / "local.yaml").write_text(
        "format: gasrules-bibliography/1\nentries:\n  site_study2026:\n    type: web_page\n"
        '    title: "Analyser verification report (invented for a test)"\n    details: read\n',
        encoding="utf-8",
    )
    rb = gasrules.load_rulebook(tmp_path / "site.yaml", cache=False)
    assert {"winter1990", "site_study2026"} <= set(rb.bibliography.entries)
    assert rb.parameters["ag_high"].source["ref"] == ["winter1990", "site_study2026"]


# ----------------------------------------------------------------------------- case evidence

CASES = """\
cases:
  - id: read-inputs
    note: "Inputs read in a source, interpretation reconstructed."
    evidence: {tag: SR, ref: story2016, note: "inputs read; answers reconstructed"}
    input: {sample_type: arterial, ph: 7.40, pco2: 40, hco3: 24}
    want:
      status: interpreted
      values:
        anion_gap: {value: 12, tolerance: 0.05, evidence: {tag: D, ref: [kraut2007, figge1988], note: "Na - (Cl + HCO3)"}}
  - id: typo
    note: "A key with a typo."
    evidence: {tag: S, ref: batle1988}
    input: {sample_type: arterial, ph: 7.40, pco2: 40, hco3: 24}
    want: {status: interpreted}
"""


def test_case_evidence_keys_are_checked_with_file_line_column(tmp_path: Path) -> None:
    folder = tmp_path / "cases"
    folder.mkdir()
    (folder / "c.yaml").write_text(CASES, encoding="utf-8")
    rb = gasrules.load_rulebook(SHIPPED)
    suite = S.load_suite(SHIPPED, folder)
    assert suite.cases[0].evidence["tag"] == "SR"  # the SR tag is accepted
    got = [p.render().replace(str(folder), "cases") for p in S.check_names(rb, suite)]
    assert got == [
        "cases/c.yaml:9:85: CS-E006 unknown bibliography key 'figge1988' (did you mean figge1998, figge1992, figge1991?) "
        "(at cases[0].want.values.anion_gap.evidence.ref[1]); expected a key of " + _bib_files(rb),
        "cases/c.yaml:12:29: CS-E006 unknown bibliography key 'batle1988' (did you mean batlle1988?) "
        "(at cases[1].evidence.ref); expected a key of " + _bib_files(rb),
    ]
    assert CASES.splitlines()[8][84:].startswith("figge1988") and CASES.splitlines()[11][28:].startswith(
        "batle1988"
    )


def _bib_files(rb: gasrules.CompiledRulebook) -> str:
    return ", ".join(rb.bibliography.files)


def test_case_evidence_needs_a_ref_for_read_tags(tmp_path: Path) -> None:
    folder = tmp_path / "cases"
    folder.mkdir()
    (folder / "c.yaml").write_text(
        CASES.replace("{tag: SR, ref: story2016, note:", "{tag: SR, note:"), encoding="utf-8"
    )
    with pytest.raises(S.SuiteError) as err:
        S.load_suite(SHIPPED, folder)
    assert [p.render().replace(str(folder), "cases") for p in err.value.problems] == [
        "cases/c.yaml:4:15: CS-E002 'ref' is required (at cases[0].evidence)"
    ]


def test_shipped_cases_retagged_sr_where_the_interpretation_was_reconstructed() -> None:
    suite = S.load_suite(SHIPPED)
    sr = {c.id for c in suite.cases if c.evidence["tag"] == "SR"}
    assert len(sr) >= 3
    assert all(c.evidence.get("ref") for c in suite.cases if c.evidence["tag"] in ("S", "SR", "M"))


def test_suggest_names_the_nearest_keys() -> None:
    assert suggest("adrogue2001", ["adrogue2010", "albert1967"]) == " (did you mean adrogue2010?)"
    assert suggest("zzz", ["adrogue2010"]) == ""
    assert "x" not in Bibliography()


# ----------------------------------------------------------------------------- nothing outside the repository


def _tracked_files() -> list[Path]:
    if (ROOT / ".git").exists():
        out = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True).stdout
        return [ROOT / p for p in out.decode("utf-8").split("\0") if p]
    skip = {".venv", ".git", "__pycache__", "build", "dist"}
    return [
        Path(d) / f
        for d, dirs, files in os.walk(ROOT)
        if not (dirs.__setitem__(slice(None), [x for x in dirs if x not in skip]))
        for f in files
    ]


def test_no_tracked_file_cites_the_former_internal_dossier() -> None:
    needle = "methods" + ".md"  # split, so this file does not match itself
    files = _tracked_files()
    assert len(files) > 50
    hits = []
    for path in files:
        try:
            text = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue
        hits += [
            f"{path.relative_to(ROOT)}:{i}" for i, line in enumerate(text.splitlines(), 1) if needle in line
        ]
    assert hits == []


# ----------------------------------------------------------------------------- the migration tool

OLD = """\
parameters:
  x:
    source: {citation: "Adrogue & Madias, J Am Soc Nephrol 2010", evidence: S}
  y:
    source: {citation: "Common practice (METHODS 2.6)", evidence: CP}
rules:
  - doc:
      references: ["Figge et al. 1998", "Common practice"]
cases:
  - evidence: {tag: S, source: "Story, Stewart acid-base: a simplified bedside approach, Anesth Analg 2016 (inputs; answers reconstructed)"}
""".replace("METHODS", "methods" + ".md")


def test_cite_migrate_rewrites_line_by_line_and_is_idempotent() -> None:
    tool = _migrate_module()
    problems: list[str] = []
    new = tool.rewrite(OLD, problems, "x.yaml")
    assert problems == []
    assert new.splitlines() == [
        "parameters:",
        "  x:",
        "    source: {ref: adrogue2010, evidence: S}",
        "  y:",
        '    source: {evidence: CP, note: "Common practice"}',
        "rules:",
        "  - doc:",
        '      references: [figge1998, {note: "Common practice"}]',
        "cases:",
        '  - evidence: {tag: SR, ref: story2016, note: "Story, Stewart acid-base: a simplified bedside approach, '
        'Anesth Analg 2016 (inputs; answers reconstructed)"}',
    ]
    assert tool.rewrite(new, problems, "x.yaml") == new and problems == []
    keys = set(yaml.safe_load(BIBLIOGRAPHY.read_text(encoding="utf-8"))["entries"])
    assert {k for k, _ in tool.PATTERNS} - keys <= {"carvounis2000"}  # test-data only


def test_cite_migrate_reports_what_it_cannot_resolve() -> None:
    tool = _migrate_module()
    problems: list[str] = []
    line = '    source: {citation: "Somebody, Some Journal 1999", evidence: M}\n'
    assert tool.rewrite(line, problems, "x.yaml") == line
    assert problems == ["x.yaml: no bibliography key found in 'Somebody, Some Journal 1999' (evidence M)"]
