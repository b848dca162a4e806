"""One test item per reference case of the shipped rulebooks' validation suites.

Each case of rulebooks/adult/cases/*.yaml and rulebooks/example-site/cases/*.yaml is its own item,
so a failure names the case and one case can be run alone:

    pytest tests/test_reference_cases.py -k 'ag-C12-at-limit'

Item ids are ``RULEBOOK/FILE::CASE`` (``adult/anion_gap.yaml::ag-C12-at-limit``). The overlay's
suite also runs the base cases it does not supersede; those are ``example-site:adult/FILE::CASE``
(an adult case file, run under the example-site rulebook).

Loading, running and comparing are the suite's own functions (the ones `gasrules verify` calls);
nothing here decides what passes. A failing item prints what differed and the trace of the rules
that decide it. Coverage over the whole suite stays in test_rulebook_suite.py.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from gasrules.evaluation.render import render_trace

# The suite's public names, in one line: if the verification package is reorganised, fix it here.
from gasrules.verification.suite import Suite, SuiteError, load_suite, run_suite

ROOT = Path(__file__).resolve().parent.parent
RULEBOOKS = ROOT / "rulebooks"
SUITES = {"adult": "shipped_rb", "example-site": "site_rb"}  # rulebook folder -> conftest fixture


def _item_id(rulebook: str, case: Any) -> str:
    origin = Path(case.origin).resolve().relative_to(RULEBOOKS)  # FOLDER/cases/FILE.yaml
    where = f"{origin.parts[0]}/{origin.name}"
    return f"{where}::{case.id}" if origin.parts[0] == rulebook else f"{rulebook}:{where}::{case.id}"


def _params() -> list[Any]:
    out = []
    for name in SUITES:
        path = RULEBOOKS / name / "rulebook.yaml"
        try:
            suite = load_suite(path)
        except SuiteError as exc:  # reported by one failing item instead of a collection error
            out.append(pytest.param(name, exc, id=f"{name}::<case files>"))
            continue
        out += [pytest.param(name, case, id=_item_id(name, case)) for case in suite.cases]
    return out


def _explain(result: Any) -> str:
    """What differed, then the trace of the rules that explain it (as `gasrules verify` shows it)."""
    case = result.case
    lines = [f"{case.id}  ({case.location})", f"  {case.note}"]
    wanted: list[str] = []
    for f in result.failures:
        lines.append(f"  - {f.what}: expected {f.expected}, got {f.got}")
        wanted += [r for r in f.rules if r not in wanted]
    if result.result is not None:
        lines.append(f"  status: {result.result['status']}; disorders: {result.result['disorders']}")
        if wanted and result.result["trace"]:
            lines += ["    " + x for x in render_trace(result.result["trace"], only=wanted).splitlines()]
    return "\n".join(lines)


@pytest.mark.parametrize(("rulebook", "case"), _params())
def test_reference_case(rulebook: str, case: Any, request: pytest.FixtureRequest) -> None:
    if isinstance(case, SuiteError):
        pytest.fail("case files do not load:\n" + "\n".join(map(str, case.problems)), pytrace=False)
    rb = request.getfixturevalue(SUITES[rulebook])
    (result,) = run_suite(rb, Suite(cases=[case]))
    if result.outcome == "skipped":
        pytest.skip(f"{case.id}: {case.skip}")
    if result.outcome != "passed":
        pytest.fail(_explain(result), pytrace=False)
