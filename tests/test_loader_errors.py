"""Rulebook problems: one test per error class, with the exact text an author reads.

Each test writes a tiny rulebook (``HEAD`` plus the faulty part) into a temporary directory,
runs the checker from that directory (so the file shows as ``rb.yaml``), and compares the
rendered problems with golden strings ``file:line:col: CODE message (at path); expected ...``.
Every golden location is also checked against the text: the line and column must point at the
faulty token, so a golden string cannot drift to the wrong place.

The clinical numbers in HEAD are placeholders of the usual adult limits (pH 7.35, PCO2 45
mmHg: common practice); no test asserts a clinical conclusion here.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
import yaml

import gasrules
from gasrules.cli import main
from gasrules.core.errors import CODES, Location, Problem, RulebookError

HEAD = """\
format: gasrules/1
metadata:
  id: tiny
  version: 1.0.0
  title: Tiny rulebook
  effective_date: 2026-12-01
  status: draft
steps:
  ph_state: {label: pH state, core: true}
inputs:
  ph: {label: pH, unit: "[pH]", precision: 2, plausible: {min: 6.5, max: 8.0}}
  pco2: {label: PCO2, unit: "mm[Hg]", precision: 1, plausible: {min: 5, max: 250}}
  sample_type: {label: Sample type, kind: code, codes: [arterial, venous]}
parameters:
  ph_low: {value: 7.35, unit: "[pH]", bounds: {min: 7.28, max: 7.38}, rationale: "Lower pH limit.", source: {evidence: CP, note: "Common practice"}}
  pco2_high: {value: 45, unit: "mm[Hg]", bounds: {min: 42, max: 60}, rationale: "Upper PCO2 limit.", source: {evidence: CP, note: "Common practice"}}
rules:
  - id: ph.low
    status: active
    step: ph_state
    title: Acidaemia
    when: ph < ph_low
    findings:
      - {code: ph.low, category: ph_state, severity: warning, text: "pH {ph} is below {ph_low}."}
  - id: pco2.high
    status: active
    step: ph_state
    when: pco2 > pco2_high
    findings:
      - {code: pco2.high, category: primary, severity: warning, text: "PCO2 {pco2} is above {pco2_high}."}
"""
# HEAD has 30 lines: whatever a test appends starts on line 31.
assert HEAD.count("\n") == 30

OVERLAY_HEAD = """\
format: gasrules/1
extends: rb.yaml
metadata:
  id: tiny-site
  version: 1.0.0
  title: Tiny site overlay
  effective_date: 2026-12-01
  status: draft
"""
# OVERLAY_HEAD has 8 lines: whatever a test appends starts on line 9.


def rule(
    rule_id: str, when: str, *, extra: str = "", code: str | None = None, category: str = "ph_state"
) -> str:
    """One rule block to append after HEAD (8 lines, plus ``extra`` lines before findings)."""
    return (
        f"  - id: {rule_id}\n"
        "    status: active\n"
        "    step: ph_state\n"
        f"    when: {when}\n"
        f"{extra}"
        "    findings:\n"
        f"      - code: {code or rule_id}\n"
        f"        category: {category}\n"
        "        severity: info\n"
        '        text: "A note."\n'
    )


@pytest.fixture
def here(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Run from the temporary directory so that files show by their bare names."""
    monkeypatch.chdir(tmp_path)
    return tmp_path


def check(here: Path, text: str, name: str = "rb.yaml") -> list[str]:
    (here / name).write_text(text, encoding="utf-8")
    return [p.render() for p in gasrules.check_rulebook(name)]


def points_at(here: Path, rendered: str, token: str) -> None:
    """The golden location really points at ``token`` in the file."""
    m = re.match(r"^([^:]+):(\d+):(\d+): ", rendered)
    assert m, rendered
    lines = (here / m.group(1)).read_text(encoding="utf-8").splitlines()
    line, col = int(m.group(2)), int(m.group(3))
    assert lines[line - 1][col - 1 :].startswith(token), (rendered, lines[line - 1])


def test_head_is_clean(here: Path) -> None:
    assert check(here, HEAD) == []


def test_every_code_is_documented_once() -> None:
    # The codes this file tests are the documented ones (errors.CODES), and each has a text.
    tested = {
        "RB-E001",
        "RB-E002",
        "RB-E003",
        "RB-E004",
        "RB-E005",
        "RB-E006",
        "RB-E007",
        "RB-E008",
        "RB-E009",
        "RB-E010",
        "RB-E011",
        "RB-E020",
        "RB-E021",
        "RB-E022",
        "RB-E023",
        "RB-E024",
        "RB-E025",
        "RB-E026",
        "RB-E030",
        "RB-E031",
        "RB-E032",
        "RB-E033",
        "RB-E034",
        "RB-E035",
        "RB-E036",
        "RB-E037",
        "RB-E040",
        "RB-E041",
        "RB-E042",
        "RB-E043",
        "RB-E044",
        "RB-E045",
        "RB-E046",
        "RB-E047",
        "RB-E048",
        "RB-E050",
        "RB-E051",
        "RB-E052",
        "RB-E070",
        "RB-E071",
        "RB-E072",
        "RB-E073",
        "RB-W101",
        "RB-W102",
        "RB-W103",
    }
    assert set(CODES) == tested
    assert all(CODES[c] for c in CODES)


def test_render_format() -> None:
    p = Problem("RB-E022", "unknown name 'x' in r", Location("a.yaml", 3, 9, "rules[0].when"), "a name")
    assert p.render() == "a.yaml:3:9: RB-E022 unknown name 'x' in r (at rules[0].when); expected a name"
    assert (
        Problem("RB-E003", "cannot read file: gone", Location("b.yaml")).render()
        == "b.yaml: RB-E003 cannot read file: gone"
    )


# ----------------------------------------------------------------------------- stage 1: loading


def test_e001_yaml_syntax(here: Path) -> None:
    got = check(here, HEAD + "  - id: broken\n    when: [ph < ph_low\n")
    if getattr(yaml, "__with_libyaml__", False):  # libyaml's wording (the loader prefers it)
        assert got == [
            "rb.yaml:33:1: RB-E001 YAML syntax error: while parsing a flow sequence "
            "did not find expected ',' or ']'"
        ]
    else:
        assert len(got) == 1 and got[0].startswith("rb.yaml:33:1: RB-E001 YAML syntax error: while parsing")


def test_e001_tab_indentation(here: Path) -> None:
    got = check(here, HEAD + "\t- id: tabbed\n")
    assert len(got) == 1 and got[0].startswith("rb.yaml:31:1: RB-E001 YAML syntax error:")


def test_e002_duplicate_key(here: Path) -> None:
    got = check(here, HEAD + rule("ph.twice", "ph < ph_low", extra="    status: suspended\n"))
    assert got == [
        "rb.yaml:35:5: RB-E002 duplicate key 'status' (first at line 32) "
        "(at rules[2].status); expected each key once per mapping"
    ]
    points_at(here, got[0], "status: suspended")


def test_e002_every_duplicate_reported(here: Path) -> None:
    text = HEAD.replace("  title: Tiny rulebook\n", "  title: Tiny rulebook\n  title: Again\n")
    text += rule("ph.twice", "ph < ph_low", extra="    when: ph > 7\n")
    got = check(here, text)
    assert got == [
        "rb.yaml:6:3: RB-E002 duplicate key 'title' (first at line 5) (at metadata.title); "
        "expected each key once per mapping",
        "rb.yaml:36:5: RB-E002 duplicate key 'when' (first at line 35) (at rules[2].when); "
        "expected each key once per mapping",
    ]


def test_e003_unreadable_file(here: Path) -> None:
    assert [p.render() for p in gasrules.check_rulebook("absent.yaml")] == [
        "absent.yaml: RB-E003 cannot read file: No such file or directory"
    ]
    (here / "folder.yaml").mkdir()
    assert [p.render() for p in gasrules.check_rulebook("folder.yaml")] == [
        "folder.yaml: RB-E003 cannot read file: Is a directory"
    ]


def test_e004_extends_missing_file(here: Path) -> None:
    got = check(here, OVERLAY_HEAD.replace("extends: rb.yaml", "extends: nowhere.yaml"), "site.yaml")
    assert got == [
        "nowhere.yaml: RB-E003 cannot read file: No such file or directory",
        "site.yaml:2:10: RB-E004 extends names a file that cannot be read: nowhere.yaml (at extends); "
        "expected a path relative to the overlay file",
    ]
    points_at(here, got[1], "nowhere.yaml")


def test_e004_extends_cycle(here: Path) -> None:
    (here / "a.yaml").write_text(OVERLAY_HEAD.replace("rb.yaml", "b.yaml"), encoding="utf-8")
    got = check(here, OVERLAY_HEAD.replace("rb.yaml", "a.yaml").replace("tiny-site", "tiny-b"), "b.yaml")
    assert got == [
        "a.yaml:2:10: RB-E004 extends cycle back to b.yaml (at extends); "
        "expected a chain of overlays ending in a base rulebook"
    ]
    points_at(here, got[0], "b.yaml")


def test_e004_extends_itself(here: Path) -> None:
    got = check(here, OVERLAY_HEAD.replace("rb.yaml", "self.yaml"), "self.yaml")
    assert got == [
        "self.yaml:2:10: RB-E004 extends cycle back to self.yaml (at extends); "
        "expected a chain of overlays ending in a base rulebook"
    ]


# ----------------------------------------------------------------------------- stage 2: schema


def test_e010_schema_enum(here: Path) -> None:
    got = check(
        here,
        HEAD.replace(
            "    status: active\n    step: ph_state\n    title: Acidaemia",
            "    status: enabled\n    step: ph_state\n    title: Acidaemia",
        ),
    )
    assert got == [
        "rb.yaml:19:13: RB-E010 'enabled' is not one of ['active', 'suspended', 'retired'] "
        "(at rules[0].status); expected one of active, suspended, retired"
    ]
    points_at(here, got[0], "enabled")


def test_e010_all_schema_problems_at_once(here: Path) -> None:
    text = HEAD.replace("  version: 1.0.0", "  version: one")
    text += "  - id: no.step\n    status: active\n    colour: red\n    findings: []\n"
    got = check(here, text)
    assert got == [
        "rb.yaml:4:12: RB-E010 'one' does not match '^(0|[1-9][0-9]*)\\\\.(0|[1-9][0-9]*)\\\\.(0|[1-9][0-9]*)"
        "(-[0-9A-Za-z.-]+)?$' (at metadata.version); expected text matching "
        "^(0|[1-9][0-9]*)\\.(0|[1-9][0-9]*)\\.(0|[1-9][0-9]*)(-[0-9A-Za-z.-]+)?$",
        "rb.yaml:31:5: RB-E010 'step' is required (at rules[2])",
        "rb.yaml:31:5: RB-E010 unknown key ('colour' was unexpected) (at rules[2])",
    ]
    points_at(here, got[0], "one")
    points_at(here, got[1], "id: no.step")


def test_e010_number_input_needs_unit(here: Path) -> None:
    got = check(
        here,
        HEAD.replace('  ph: {label: pH, unit: "[pH]", precision: 2, ', "  ph: {label: pH, precision: 2, "),
    )
    assert got == ["rb.yaml:11:7: RB-E010 'unit' is required (at inputs.ph)"]


# ----------------------------------------------------------------------------- stage 3: expressions


@pytest.mark.parametrize(
    "when, golden, token",
    [
        (
            "ph < ",
            "rb.yaml:34:11: RB-E020 syntax error in expression 'ph < ': invalid syntax (at rules[2].when); "
            "expected an expression such as 'pco2 > pco2_high and ph < ph_low'",
            "ph <",
        ),
        (
            "ph.real < ph_low",
            "rb.yaml:34:11: RB-E021 'Attribute' is not allowed in expressions (at rules[2].when); "
            "expected numbers, names, + - * / **, comparisons, and/or/not, if-else, allowed functions",
            "ph.real",
        ),
        (
            "round(ph) < ph_low",
            "rb.yaml:34:11: RB-E023 function 'round' is not allowed (at rules[2].when); "
            "expected one of abs, min, max, sqrt, exp, log, log10, known, has",
            "round",
        ),
        (
            "ph ** 9 < ph_low",
            "rb.yaml:34:11: RB-E024 power 9 is too large (at rules[2].when); "
            "expected an exponent of at most 8",
            "ph ** 9",
        ),
        (
            'has("ph.high")',
            'rb.yaml:34:11: RB-E025 has("ph.high") names a code no rule asserts (at rules[2].when); '
            "expected a finding or disorder code asserted by some rule",
            "has(",
        ),
        (
            'ph == "low"',
            "rb.yaml:34:11: RB-E026 'low' is compared with something that is not a coded input or choice "
            "(at rules[2].when); expected a coded input or a choice parameter on the other side",
            "ph ==",
        ),
        (
            'sample_type == "capillary"',
            "rb.yaml:34:11: RB-E042 'capillary' is not a code of 'sample_type' "
            "(at rules[2].when); expected one of arterial, venous",
            "sample_type",
        ),
        (
            "ph < pco2_high",
            "rb.yaml:34:11: RB-E036 extra.rule compares ph [[pH]] < pco2_high [mm[Hg]] "
            "(at rules[2].when); expected both sides in [pH]",
            "ph < pco2_high",
        ),
    ],
)
def test_expression_errors(here: Path, when: str, golden: str, token: str) -> None:
    got = check(here, HEAD + rule("extra.rule", json.dumps(when)))
    assert got == [golden]
    points_at(here, got[0], json.dumps(when)[:1] + token)  # the location is the quoted scalar


def test_e024_too_long_and_too_deep(here: Path) -> None:
    long_when = " + ".join(["ph"] * 700) + " < ph_low"
    deep_when = "(" * 41 + "ph" + ")" * 41 + " < ph_low"
    got = check(here, HEAD + rule("too.long", long_when) + rule("too.deep", deep_when))
    assert got == [
        f"rb.yaml:34:11: RB-E024 expression is {len(long_when)} characters long (at rules[2].when); "
        "expected at most 2000",
        "rb.yaml:43:11: RB-E024 expression is nested too deeply (at rules[3].when); expected at most 40 levels",
    ]


# ----------------------------------------------------------------------------- stage 3: semantic checks


def test_e030_duplicate_rule_id(here: Path) -> None:
    got = check(here, HEAD + rule("ph.low", "ph < ph_low", code="ph.low.again"))
    assert got == [
        "rb.yaml:31:9: RB-E030 duplicate rule id 'ph.low' (first at rb.yaml:18:5) "
        "(at rules[2].id); expected a unique, stable rule id"
    ]
    points_at(here, got[0], "ph.low")


def test_e030_name_is_input_and_parameter(here: Path) -> None:
    text = HEAD.replace(
        "parameters:\n",
        'parameters:\n  ph: {value: 7.4, unit: "[pH]", bounds: {min: 7.3, max: 7.5}, '
        'rationale: "Clash.", source: {evidence: CP, note: "Common practice"}}\n',
    )
    got = check(here, text)
    assert got == [
        "rb.yaml:15:7: RB-E030 'ph' is both a input and a parameter (at parameters.ph); "
        "expected each name declared once"
    ]


def test_e031_cycle_between_derived_values(here: Path) -> None:
    text = (
        HEAD
        + rule("uses.a", "a_value > pco2_high")
        + (
            "derived:\n"
            '  a_value: {expr: b_value + 1, unit: "mm[Hg]", precision: 1}\n'
            '  b_value: {expr: a_value - 1, unit: "mm[Hg]", precision: 1}\n'
        )
    )
    got = check(here, text)
    assert got == [
        "rb.yaml:41:12: RB-E031 cycle among derived:a_value, derived:b_value, rule:uses.a "
        "(at derived.a_value); expected derived values and has() dependencies that form no loop"
    ]
    points_at(here, got[0], "{expr: b_value")


def test_e031_cycle_through_has(here: Path) -> None:
    text = HEAD + rule("first", 'has("second")') + rule("second", 'has("first")')
    got = check(here, text)
    assert got == [
        "rb.yaml:31:5: RB-E031 cycle among rule:first, rule:second (at rules[2]); "
        "expected derived values and has() dependencies that form no loop"
    ]


def test_e032_rule_needs_undeclared_input(here: Path) -> None:
    got = check(here, HEAD + rule("needs.lactate", "ph < ph_low", extra="    needs: [lactate]\n"))
    assert got == [
        "rb.yaml:31:5: RB-E032 rule 'needs.lactate' needs undeclared input 'lactate' (at rules[2]); "
        "expected an input or derived value declared in the rulebook"
    ]
    points_at(here, got[0], "id: needs.lactate")


def test_e033_unknown_placeholder(here: Path) -> None:
    text = HEAD + rule("placeholder", "ph < ph_low").replace('"A note."', '"Lactate {lactate} is high."')
    got = check(here, text)
    assert got == [
        "rb.yaml:31:5: RB-E033 unknown placeholder '{lactate}' in finding 'placeholder' (at rules[2]); "
        "expected an input, parameter or derived value name"
    ]


def test_e034_undeclared_step(here: Path) -> None:
    text = HEAD + rule("wrong.step", "ph < ph_low").replace("step: ph_state", "step: oxygenation")
    got = check(here, text)
    assert got == [
        "rb.yaml:31:5: RB-E034 rule 'wrong.step' names undeclared step 'oxygenation' (at rules[2]); "
        "expected one of ph_state"
    ]


def test_e035_unknown_disorder_and_qualifier(here: Path) -> None:
    presentation = (
        "presentation:\n"
        "  disorder_labels: {respiratory_acidosis: Respiratory acidosis}\n"
        "  qualifier_labels: {acute: acute, chronic: chronic}\n"
    )
    text = (
        HEAD
        + rule(
            "resp.acid",
            "pco2 > pco2_high",
            extra="    disorders: [respiratory_acidosis]\n    qualifiers: {respiratory_acidosis: subacute}\n",
        )
        + rule("met.alk", "ph > ph_low", extra="    disorders: [metabolic_alkalosis]\n")
        + presentation
    )
    got = check(here, text)
    assert got == [
        "rb.yaml:31:5: RB-E035 rule 'resp.acid' qualifies 'respiratory_acidosis' as 'subacute' (at rules[2]); "
        "expected a disorder code and a qualifier from presentation.qualifier_labels",
        "rb.yaml:42:5: RB-E035 rule 'met.alk' asserts unknown disorder 'metabolic_alkalosis' (at rules[3]); "
        "expected one of respiratory_acidosis",
    ]


def test_e037_finding_code_with_two_categories(here: Path) -> None:
    text = HEAD + rule("second.low", "ph < ph_low", code="ph.low", category="primary")
    got = check(here, text)
    assert got == [
        "rb.yaml:31:5: RB-E037 finding 'ph.low' is primary/info here but ph_state/warning at "
        "rb.yaml:18:5 (at rules[2]); expected one category and severity per code"
    ]


def test_e045_parameter_outside_its_own_bounds(here: Path) -> None:
    got = check(here, HEAD.replace("ph_low: {value: 7.35", "ph_low: {value: 7.25"))
    assert got == [
        "rb.yaml:15:19: RB-E045 parameter 'ph_low' = 7.25 lies outside its own bounds [7.28, 7.38] "
        "(at parameters.ph_low.value); expected a value from 7.28 to 7.38"
    ]
    points_at(here, got[0], "7.25")


# ----------------------------------------------------------------------------- overlays and guard rails


def overlay(here: Path, body: str) -> list[str]:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    return check(here, OVERLAY_HEAD + body, "site.yaml")


def test_e040_override_outside_bounds_names_both_files(here: Path) -> None:
    got = overlay(here, 'parameters:\n  ph_low: {value: 7.2, rationale: "Too low."}\n')
    assert got == [
        "site.yaml:10:19: RB-E040 override of 'ph_low' to 7.2 is outside the base guard rails "
        "[7.28, 7.38] set at rb.yaml:15:47 (at parameters.ph_low.value); expected a value from 7.28 to 7.38"
    ]
    points_at(here, got[0], "7.2,")
    points_at(here, "rb.yaml:15:47: ", "{min: 7.28")


def test_e041_override_changes_unit(here: Path) -> None:
    got = overlay(here, "parameters:\n  pco2_high: {value: 6, unit: kPa}\n")
    assert (
        got
        == [
            "site.yaml:10:31: RB-E041 overlay may not change the unit of parameter 'pco2_high' (at parameters.pco2_high.unit); "
            "expected unit as in the base (mm[Hg])",
            "site.yaml:10:22: RB-E040 override of 'pco2_high' to 6 is outside the base guard rails [42, 60] set at "
            "rb.yaml:16:50 (at parameters.pco2_high.value); expected a value from 42 to 60",
        ][::-1]
    )
    points_at(here, got[0], "6,")
    points_at(here, got[1], "kPa")
    points_at(here, "rb.yaml:16:50: ", "{min: 42")


def test_e041_text_for_a_number(here: Path) -> None:
    got = overlay(here, "parameters:\n  ph_low: {value: low}\n")
    assert got == [
        "site.yaml:10:19: RB-E041 parameter 'ph_low' takes a number, not 'low' "
        "(at parameters.ph_low.value); expected a number"
    ]


def test_e042_choice_not_among_choices(here: Path) -> None:
    (here / "rb.yaml").write_text(
        HEAD.replace(
            "parameters:\n",
            'parameters:\n  method: {value: figge, choices: [figge, none], rationale: "Which correction.", '
            'source: {evidence: CP, note: "Albumin correction choice (test)"}}\n',
        )
        + rule("uses.method", 'method == "figge" and ph < ph_low'),
        encoding="utf-8",
    )
    got = check(here, OVERLAY_HEAD + "parameters:\n  method: {value: carvounis}\n", "site.yaml")
    assert got == [
        "site.yaml:10:19: RB-E042 'carvounis' is not a choice of parameter 'method' "
        "(at parameters.method.value); expected one of figge, none"
    ]


def test_e043_suspension_of_unknown_rule(here: Path) -> None:
    got = overlay(here, 'suspend:\n  - {rule: ph.lowest, reason: "Not ours."}\n')
    assert got == [
        "site.yaml:10:12: RB-E043 suspension names unknown rule 'ph.lowest'; did you mean 'ph.low'? (at suspend[0].rule); "
        "expected the id of a rule in this rulebook or its base"
    ]
    points_at(here, got[0], "ph.lowest")


def test_e044_overlay_redefines_base_ids(here: Path) -> None:
    body = (
        "inputs:\n"
        '  ph: {label: pH again, unit: "[pH]", precision: 3, plausible: {min: 6, max: 9}}\n'
        "rules:\n" + rule("ph.low", "ph < ph_low", code="ph.low.site")
    )
    got = overlay(here, body)
    assert got == [
        "site.yaml:10:7: RB-E044 overlay redefines base input 'ph' (at inputs.ph); "
        "expected a new name; only parameters can be overridden",
        "site.yaml:12:9: RB-E044 overlay redefines base rule 'ph.low' (at rules[0].id); "
        "expected a new rule id (suspend the base rule instead)",
    ]


def test_overlay_problems_reported_together(here: Path) -> None:
    got = overlay(
        here, 'parameters:\n  ph_low: {value: 7.2}\nsuspend:\n  - {rule: ph.lowest, reason: "Not ours."}\n'
    )
    assert [g.split(": ")[1].split(" ")[0] for g in got] == ["RB-E040", "RB-E043"]


# ----------------------------------------------------------------------------- warnings


def test_warnings(here: Path) -> None:
    text = HEAD.replace(
        "rules:\n",
        '  spare: {value: 1, unit: "1", bounds: {min: 0, max: 2}, rationale: "Unused.", '
        'source: {evidence: CP, note: "Common practice"}}\nrules:\n',
    )
    text += (
        rule("literal", "ph < 7.2")
        + 'derived:\n  helper: {expr: ph * 2, unit: "[pH]", precision: 2, report: false}\n'
    )
    got = check(here, text)
    assert got == [
        "rb.yaml:17:10: RB-W101 parameter 'spare' is never used (at parameters.spare); expected remove it or use it",
        "rb.yaml:35:11: RB-W102 rule 'literal' compares with the literal 7.2 (at rules[2].when); "
        "expected a named parameter with unit, bounds and source",
        "rb.yaml:42:11: RB-W103 derived value 'helper' is never used nor reported (at derived.helper)",
    ]


def test_warnings_do_not_stop_loading(here: Path) -> None:
    (here / "rb.yaml").write_text(HEAD + rule("literal", "ph < 7.2"), encoding="utf-8")
    rb = gasrules.load_rulebook("rb.yaml", cache=False)
    assert [p.code for p in rb.warnings] == ["RB-W102"]


# ----------------------------------------------------------------------------- all at once, sorted

MANY = (
    HEAD
    + rule("b.step", "ph < ph_low").replace("step: ph_state", "step: nowhere")  # line 31: RB-E034
    + rule("a.name", "round(ph) < ph_low")  # line 43: RB-E023
    + rule("c.literal", "ph < 7.1")  # line 52: RB-W102
    + rule("ph.low", "pco2 > pco2_high", code="ph.low.2")
)  # line 58: RB-E030


def test_all_problems_at_once_sorted(here: Path) -> None:
    # Found by three different stages (rules, expressions, warnings, ids), reported together in
    # file order.
    got = check(here, MANY)
    assert got == [
        "rb.yaml:31:5: RB-E034 rule 'b.step' names undeclared step 'nowhere' (at rules[2]); expected one of ph_state",
        "rb.yaml:43:11: RB-E023 function 'round' is not allowed (at rules[3].when); "
        "expected one of abs, min, max, sqrt, exp, log, log10, known, has",
        "rb.yaml:52:11: RB-W102 rule 'c.literal' compares with the literal 7.1 (at rules[4].when); "
        "expected a named parameter with unit, bounds and source",
        "rb.yaml:58:9: RB-E030 duplicate rule id 'ph.low' (first at rb.yaml:18:5) (at rules[5].id); "
        "expected a unique, stable rule id",
    ]
    points_at(here, got[1], "round(ph)")
    points_at(here, got[3], "ph.low")


def test_load_raises_every_problem_sorted(here: Path) -> None:
    (here / "rb.yaml").write_text(MANY, encoding="utf-8")
    with pytest.raises(RulebookError) as info:
        gasrules.load_rulebook("rb.yaml", cache=False)
    exc = info.value
    assert [p.code for p in exc.problems] == ["RB-E034", "RB-E023", "RB-W102", "RB-E030"]
    assert [p.code for p in exc.errors] == ["RB-E034", "RB-E023", "RB-E030"]
    assert [p.code for p in exc.warnings] == ["RB-W102"]
    assert str(exc).startswith("3 rulebook error(s); first: rb.yaml:31:5: RB-E034")


def test_e022_unknown_name_in_derived_value(here: Path) -> None:
    text = HEAD + 'derived:\n  ph_gap: {expr: ph - ph_lo, unit: "[pH]", precision: 2}\n'
    got = check(here, text)
    assert got == [
        "rb.yaml:32:18: RB-E022 unknown name 'ph_lo' in ph_gap (at derived.ph_gap.expr); "
        "expected an input, parameter or derived value declared in the rulebook"
    ]
    points_at(here, got[0], "ph - ph_lo")


def test_e022_unknown_name_in_rule_reported_once(here: Path) -> None:
    got = check(here, HEAD + rule("extra.rule", "ph < ph_lo"))
    assert got == [
        "rb.yaml:34:11: RB-E022 unknown name 'ph_lo' in extra.rule (at rules[2].when); "
        "expected an input, parameter or derived value declared in the rulebook"
    ]


# ----------------------------------------------------------------------------- gasrules check


def test_check_cli_errors_exit_5(here: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (here / "rb.yaml").write_text(MANY, encoding="utf-8")
    assert main(["check", "rb.yaml"]) == 5
    out = capsys.readouterr().out
    assert out.splitlines() == [
        "3 error(s):",
        "  rb.yaml:31:5: RB-E034 rule 'b.step' names undeclared step 'nowhere' (at rules[2]); expected one of ph_state",
        "  rb.yaml:43:11: RB-E023 function 'round' is not allowed (at rules[3].when); "
        "expected one of abs, min, max, sqrt, exp, log, log10, known, has",
        "  rb.yaml:58:9: RB-E030 duplicate rule id 'ph.low' (first at rb.yaml:18:5) (at rules[5].id); "
        "expected a unique, stable rule id",
        "",
        "1 warning(s):",
        "  rb.yaml:52:11: RB-W102 rule 'c.literal' compares with the literal 7.1 (at rules[4].when); "
        "expected a named parameter with unit, bounds and source",
    ]


def test_check_cli_clean_exit_0(here: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    assert main(["check", "rb.yaml"]) == 0
    assert capsys.readouterr().out == "rb.yaml: no problems found\n"


def test_check_cli_warnings_only(here: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (here / "rb.yaml").write_text(HEAD + rule("literal", "ph < 7.2"), encoding="utf-8")
    assert main(["check", "rb.yaml"]) == 0
    assert capsys.readouterr().out.startswith("1 warning(s):\n  rb.yaml:34:11: RB-W102")
    assert main(["check", "--strict", "rb.yaml"]) == 5


def test_check_cli_json(here: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (here / "rb.yaml").write_text(HEAD + rule("a.name", "round(ph) < ph_low"), encoding="utf-8")
    assert main(["check", "--json", "rb.yaml"]) == 5
    assert json.loads(capsys.readouterr().out) == [
        {
            "code": "RB-E023",
            "message": "function 'round' is not allowed",
            "file": "rb.yaml",
            "line": 34,
            "column": 11,
            "path": "rules[2].when",
            "expected": "one of abs, min, max, sqrt, exp, log, log10, known, has",
            "severity": "error",
        }
    ]


def test_check_cli_unreadable_exit_5(here: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", "absent.yaml"]) == 5
    assert "absent.yaml: RB-E003 cannot read file" in capsys.readouterr().out


def test_shipped_rulebooks_are_clean() -> None:
    # The shipped adult rulebook and its example overlay load without errors.
    from conftest import EXAMPLE_SITE, SHIPPED

    for path in (SHIPPED, EXAMPLE_SITE):
        assert [p.render() for p in gasrules.check_rulebook(path) if not p.is_warning] == []


# ----------------------------------------------------------------------------- input fallbacks


def _with_fallback(fallback: str, derived: str, marks_kind: str = "flag") -> str:
    """HEAD with a `pco2` fallback and a derived value; the placeholder numbers are not clinical."""
    text = HEAD.replace(
        '  pco2: {label: PCO2, unit: "mm[Hg]", precision: 1, plausible: {min: 5, max: 250}}\n',
        '  pco2: {label: PCO2, unit: "mm[Hg]", precision: 1, plausible: {min: 5, max: 250}, '
        f"fallback: {fallback}}}\n"
        f"  pco2_calculated: {{label: PCO2 calculated, kind: {marks_kind}"
        + (", codes: [a]" if marks_kind == "code" else "")
        + "}\n",
    )
    return text.replace("rules:\n", "derived:\n" + derived + "rules:\n")


def test_e070_fallback_unknown_value(here: Path) -> None:
    derived = '  from_ph: {label: from pH, expr: 10 * ph, unit: "mm[Hg]", precision: 1}\n'
    got = check(here, _with_fallback("{value: pco2_guess, marks: pco2_calculated}", derived))
    assert got == [
        "rb.yaml:12:94: RB-E070 fallback of input 'pco2' names unknown derived value 'pco2_guess' "
        "(at inputs.pco2.fallback); expected the name of a derived value"
    ]
    points_at(here, got[0], "{value: pco2_guess")


def test_e071_fallback_depends_on_its_input(here: Path) -> None:
    derived = '  pco2_twice: {label: twice, expr: 2 * pco2, unit: "mm[Hg]", precision: 1}\n'
    got = check(here, _with_fallback("{value: pco2_twice, marks: pco2_calculated}", derived))
    assert got == [
        "rb.yaml:12:94: RB-E071 fallback 'pco2_twice' of input 'pco2' depends on 'pco2' itself "
        "(at inputs.pco2.fallback); expected a derived value computed from other inputs"
    ]


def test_e072_fallback_in_another_unit(here: Path) -> None:
    derived = '  from_ph: {label: from pH, expr: 10 * ph, unit: "1", precision: 1}\n'
    got = check(here, _with_fallback("{value: from_ph, marks: pco2_calculated}", derived))
    assert got == [
        "rb.yaml:12:94: RB-E072 fallback 'from_ph' is in '1', input 'pco2' in 'mm[Hg]' "
        "(at inputs.pco2.fallback); expected a derived value in mm[Hg]"
    ]


def test_e073_fallback_marks_a_non_flag(here: Path) -> None:
    derived = '  from_ph: {label: from pH, expr: 10 * ph, unit: "mm[Hg]", precision: 1}\n'
    got = check(here, _with_fallback("{value: from_ph, marks: pco2_calculated}", derived, marks_kind="code"))
    assert got == [
        "rb.yaml:12:94: RB-E073 fallback of input 'pco2' marks 'pco2_calculated', which is not a flag "
        "input (at inputs.pco2.fallback); expected the name of a flag input (kind: flag)"
    ]


# ----------------------------------------------------------------------------- citations

BIB = """\
format: gasrules-bibliography/1
entries:
  figge1998:
    type: article
    authors: [Figge J, Jabor A, Kazda A, Fencl V]
    title: "Anion gap and hypoalbuminemia"
    journal: Crit Care Med
    year: 1998
    details: read
  kraut2007:
    type: article
    title: "Serum anion gap: its uses and limitations in clinical medicine"
    details: from_memory
"""


def cited(here: Path, source: str, references: str = "", bib: str = BIB) -> list[str]:
    """HEAD citing a bibliography: ph_low's source and (optionally) a rule's doc.references."""
    (here / "bib.yaml").write_text(bib, encoding="utf-8")
    text = HEAD.replace("format: gasrules/1\n", "format: gasrules/1\nbibliography: bib.yaml\n").replace(
        'source: {evidence: CP, note: "Common practice"}}\n  pco2_high', f"source: {source}}}\n  pco2_high"
    )
    if references:
        text += f"    doc: {{references: {references}}}\n"
    return check(here, text)


def test_known_keys_are_clean(here: Path) -> None:
    assert cited(here, "{ref: figge1998, evidence: S}", "[kraut2007, {ref: figge1998, note: table 2}]") == []


def test_e051_unknown_key_in_a_parameter_source(here: Path) -> None:
    got = cited(here, "{ref: figge1989, evidence: S}")
    assert got == [
        "rb.yaml:16:115: RB-E051 unknown bibliography key 'figge1989' (did you mean figge1998?) "
        "(at parameters.ph_low.source.ref); expected a key of bib.yaml"
    ]
    points_at(here, got[0], "figge1989")


def test_e051_unknown_key_in_rule_references(here: Path) -> None:
    got = cited(here, "{ref: figge1998, evidence: S}", "[kraut2070]")
    assert got == [
        "rb.yaml:32:23: RB-E051 unknown bibliography key 'kraut2070' (did you mean kraut2007?) "
        "(at rules[1].doc.references); expected a key of bib.yaml"
    ]


def test_e051_key_without_any_bibliography(here: Path) -> None:
    text = HEAD.replace(
        'source: {evidence: CP, note: "Common practice"}}\n  pco2_high',
        "source: {ref: figge1998, evidence: S}}\n  pco2_high",
    )
    assert check(here, text) == [
        "rb.yaml:15:115: RB-E051 unknown bibliography key 'figge1998' (at parameters.ph_low.source.ref); "
        "expected a key of the rulebook's bibliography (declare one with `bibliography:`)"
    ]


def test_source_without_ref_needs_a_note_saying_why(here: Path) -> None:
    got = cited(here, "{evidence: S}")
    assert got == ["rb.yaml:16:109: RB-E010 'ref' is required (at parameters.ph_low.source)"]
    got = cited(here, "{evidence: CP}")
    assert got and all("RB-E010" in g and "parameters.ph_low.source" in g for g in got)


def test_e050_bibliography_entry_against_its_schema(here: Path) -> None:
    got = cited(
        here, "{ref: figge1998, evidence: S}", bib=BIB.replace("    details: read\n", "    details: sure\n")
    )
    assert got == [
        "bib.yaml:9:14: RB-E050 'sure' is not one of ['read', 'from_memory'] "
        "(at entries.figge1998.details); expected one of read, from_memory"
    ]


def test_e050_missing_bibliography_file(here: Path) -> None:
    text = HEAD.replace("format: gasrules/1\n", "format: gasrules/1\nbibliography: nowhere.yaml\n")
    assert check(here, text) == [
        "rb.yaml:2:15: RB-E050 bibliography file cannot be read: nowhere.yaml "
        "(at bibliography); expected a path to a bibliography YAML file, relative to the rulebook"
    ]


def test_e052_key_declared_in_two_bibliographies(here: Path) -> None:
    (here / "bib.yaml").write_text(BIB, encoding="utf-8")
    (here / "more.yaml").write_text(BIB.split("  kraut2007:")[0], encoding="utf-8")
    text = HEAD.replace("format: gasrules/1\n", "format: gasrules/1\nbibliography: [bib.yaml, more.yaml]\n")
    got = check(here, text)
    assert got == [
        "more.yaml:4:5: RB-E052 bibliography key 'figge1998' is declared twice (first at bib.yaml:4:5) "
        "(at entries.figge1998); expected one entry per key across a rulebook's bibliographies"
    ]


# ----------------------------------------------------------------------------- hostile files


def test_alias_bomb_is_refused_before_expansion(here: Path) -> None:
    levels = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
    levels += [f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 10) + "]" for i in range(1, 9)]  # 10**9 leaves
    out = check(here, "\n".join(levels) + "\n")
    assert out == [
        "rb.yaml:1:1: RB-E009 expands to more than 1000000 YAML nodes once aliases are followed "
        "(an alias bomb?); expected at most 1000000 nodes (setting limits.yaml_nodes)"
    ]


def test_node_budget_is_a_setting(here: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("GASRULES_YAML_NODE_BUDGET", "50")
    assert check(here, HEAD)[0].startswith("rb.yaml:1:1: RB-E009 expands to more than 50 YAML nodes")


def test_self_referencing_alias_and_deep_nesting(here: Path) -> None:
    assert check(here, "a: &x [1, *x]\n") == [
        "rb.yaml:1:4: RB-E009 an alias refers to the node that contains it (a self-referencing alias); "
        "expected aliases to complete, earlier nodes"
    ]
    out = check(here, "a: " + "[" * 150 + "]" * 150 + "\n")
    assert out[0].startswith("rb.yaml:1:") and "RB-E009 nesting deeper than 100 levels" in out[0]


def test_file_size_limit_is_a_setting(here: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("GASRULES_RULEBOOK_MAX_BYTES", "100")
    size = len(HEAD.encode("utf-8"))
    assert check(here, HEAD) == [
        f"rb.yaml: RB-E006 is {size} bytes, more than the limit of 100; expected a file "
        "of at most 100 bytes (setting limits.rulebook_bytes)"
    ]


def test_non_utf8_and_utf16_files(here: Path) -> None:
    (here / "rb.yaml").write_bytes(HEAD.replace("Tiny rulebook", "Tiny r\xe9glement").encode("latin-1"))
    out = [p.render() for p in gasrules.check_rulebook("rb.yaml")]
    assert out == ["rb.yaml:5:16: RB-E008 byte 0xe9 is not UTF-8; expected a UTF-8 text file"]
    (here / "rb.yaml").write_bytes(HEAD.encode("utf-16"))
    assert [p.render() for p in gasrules.check_rulebook("rb.yaml")] == [
        "rb.yaml:1:1: RB-E008 is UTF-16 (or another encoding with zero bytes), not UTF-8; expected a UTF-8 text file"
    ]


def test_impossible_date_is_an_error_at_its_place(here: Path) -> None:
    out = check(here, HEAD.replace("effective_date: 2026-12-01", "effective_date: 2026-13-45"))
    assert out[0] == (
        "rb.yaml:6:19: RB-E001 invalid value '2026-13-45': month must be in 1..12 (at "
        "metadata.effective_date); expected a real date (YYYY-MM-DD) or a quoted string"
    )
    points_at(here, out[0], "2026-13-45")


def test_name_with_a_trailing_newline_is_refused(here: Path) -> None:
    out = check(here, HEAD.replace("  ph_low: {value", '  "ph_low\\n": {value'))
    assert out == [
        "rb.yaml:15:3: RB-E010 'ph_low\\n' does not match '^[a-z][a-z0-9_]*$' (at parameters); "
        "expected text matching ^[a-z][a-z0-9_]*$"
    ]


@pytest.mark.parametrize("target", ["fifo", "dev", "big", "outside", "not_rulebook"])
def test_extends_to_what_is_not_a_rulebook_is_refused_without_echo(
    target: str, here: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import os

    secret = "root:x:0:0:SECRET-CONTENT:/root:/bin/bash"
    if target == "fifo":
        os.mkfifo(here / "base.yaml")
        ext = "base.yaml"
    elif target == "dev":
        ext = "/dev/zero"
    elif target == "big":
        (here / "base.yaml").write_text(HEAD + "#" * 2000 + "\n", encoding="utf-8")
        monkeypatch.setenv("GASRULES_RULEBOOK_MAX_BYTES", "1500")
        ext = "base.yaml"
    elif target == "outside":
        (here / "elsewhere").mkdir()
        (here / "elsewhere" / "rb.yaml").write_text(HEAD, encoding="utf-8")
        (here / "site").mkdir()
        monkeypatch.setenv("GASRULES_RULEBOOK_ROOTS", str(here / "site"))
        ext = "../elsewhere/rb.yaml"
    else:
        (here / "base.yaml").write_text(secret + "\n", encoding="utf-8")
        ext = "base.yaml"
    name = "site/overlay.yaml" if target == "outside" else "overlay.yaml"
    text = OVERLAY_HEAD.replace("extends: rb.yaml", f"extends: {ext}")
    out = check(here, text, name)
    assert len(out) == 1 and f"{name}:2:10: RB-E004 extends names" in out[0], out
    assert "SECRET" not in out[0]
    code = {
        "fifo": "RB-E005",
        "dev": "RB-E005",
        "big": "RB-E006",
        "outside": "RB-E007",
        "not_rulebook": "it is not a rulebook",
    }[target]
    assert code in out[0]


def test_roots_admit_a_chain_inside_them(here: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    monkeypatch.setenv("GASRULES_RULEBOOK_ROOTS", str(here))
    assert check(here, OVERLAY_HEAD, "overlay.yaml") == []


@pytest.mark.parametrize("bad", [".nan", ".inf", "-.inf", "1" + "0" * 400])
def test_numbers_that_cannot_be_used_are_refused_at_their_place(bad: str, here: Path) -> None:
    out = check(here, HEAD.replace("bounds: {min: 7.28, max: 7.38}", f"bounds: {{min: {bad}, max: 7.38}}"))
    assert out == [
        f"rb.yaml:15:53: RB-E011 number {bad[:40]!r} cannot be used (NaN, infinity or an integer too large) "
        "(at parameters.ph_low.bounds.min); expected a finite number; integers within "
        "\u00b19223372036854775807"
    ]
    points_at(here, out[0], bad)


# ----------------------------------------------------------------------------- overlay mistakes

CONSTRAINED = (
    HEAD + 'constraints:\n  - {expr: "ph_low < 7.36", message: "placeholder relation for the test"}\n'
)


def test_e046_overlay_breaking_a_constraint(here: Path) -> None:
    (here / "rb.yaml").write_text(CONSTRAINED, encoding="utf-8")
    assert check(here, CONSTRAINED) == []
    out = check(here, OVERLAY_HEAD + "parameters:\n  ph_low: {value: 7.37}\n", "site.yaml")
    assert out == [
        "rb.yaml:32:12: RB-E046 constraint not met: placeholder relation for the test (ph_low < 7.36; "
        "ph_low = 7.37 set at site.yaml:10:19) (at constraints[0].expr); expected parameter values for "
        "which ph_low < 7.36 holds"
    ]
    points_at(here, out[0], '"ph_low < 7.36"')


def test_constraint_over_what_is_not_a_parameter(here: Path) -> None:
    out = check(here, HEAD + 'constraints:\n  - {expr: "ph < ph_low", message: "inputs are not allowed"}\n')
    assert out == [
        "rb.yaml:32:12: RB-E022 constraint names ph, which is not a numeric parameter "
        "(at constraints[0].expr); expected an expression over numeric parameters only"
    ]


def test_e047_override_of_an_unknown_parameter_suggests_the_name(here: Path) -> None:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    out = check(here, OVERLAY_HEAD + "parameters:\n  ph_lwo: {value: 7.3}\n", "site.yaml")
    assert out == [
        "site.yaml:10:11: RB-E047 overlay overrides parameter 'ph_lwo', which the base does not declare; "
        "did you mean 'ph_low'? (at parameters.ph_lwo); expected the name of a base parameter, or a full "
        "definition (unit and bounds or choices) to add a new one"
    ]
    full = (
        'parameters:\n  ph_lwo: {value: 7.3, unit: "[pH]", bounds: {min: 7.2, max: 7.4}, rationale: "New.", '
        'source: {citation: "Common practice", evidence: CP}}\n'
    )
    assert [p.split(" (at")[0] for p in check(here, OVERLAY_HEAD + full, "site.yaml")] == [
        "site.yaml:10:11: RB-W101 parameter 'ph_lwo' is never used"
    ]  # a full definition adds one


def test_e043_unknown_suspension_suggests_the_rule(here: Path) -> None:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    out = check(here, OVERLAY_HEAD + "suspend:\n  - {rule: ph.lwo, reason: testing}\n", "site.yaml")
    assert out[0].startswith(
        "site.yaml:10:12: RB-E043 suspension names unknown rule 'ph.lwo'; did you mean 'ph.low'?"
    )


def test_e048_display_units(here: Path) -> None:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    out = check(
        here,
        OVERLAY_HEAD + 'display_units:\n  "[pH]": kPa\n  "mm[Hg]": furlong\n  "g/L": "g/dL"\n',
        "site.yaml",
    )
    assert out == [
        "site.yaml:10:11: RB-E048 display unit 'kPa' is not a unit of the quantity measured in '[pH]' "
        "(at display_units.[pH]); expected one of ",
        "site.yaml:11:13: RB-E048 display unit 'furlong' is not a known unit (at display_units.mm[Hg]); expected one of ",
        "site.yaml:12:10: RB-E048 display unit for 'g/L', which is the unit of no input (at display_units.g/L); "
        "expected a canonical unit of an input: [pH], mm[Hg]",
    ]


def test_e047_partial_input_or_rule_unknown_to_the_base_suggests_the_name(here: Path) -> None:
    (here / "rb.yaml").write_text(HEAD, encoding="utf-8")
    out = check(
        here,
        OVERLAY_HEAD + "inputs:\n  pco3: {plausible: {min: 5, max: 200}}\n"
        "rules:\n  - {id: ph.lwo, when: ph < 7.3}\n",
        "site.yaml",
    )
    e047 = [line for line in out if "RB-E047" in line]
    assert e047 == [
        "site.yaml:10:9: RB-E047 overlay overrides input 'pco3', which the base does not declare; did you mean "
        "'pco2'? (at inputs.pco3); expected the name of a base input (inputs cannot be overridden), or a full definition",
        "site.yaml:12:10: RB-E047 overlay rule 'ph.lwo' is not a full definition and the base has no rule of that id; "
        "did you mean 'ph.low'? (at rules[0].id); expected a full rule (status, step, findings), or suspend the base rule",
    ]
    assert any("RB-E010" in line for line in out)  # the schema still says what is missing
