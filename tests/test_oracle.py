"""The generated function against simpleeval's own evaluator (gasrules.verification.oracle), case by case.

Both read the same canonical inputs; they must agree on every derived value (exactly: the same
float operations in the same order), its state, every rule outcome and the set of asserted
codes. Cases: >= 3,000 seeded synthetic cases (gasrules.verification.casegen, invented demo data) for the
shipped rulebook and for its example site overlay, the mini rulebook and its overlay, and
boundary cases placed exactly on and around every input cut-point.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Iterator
from typing import Any

import pytest

import gasrules
from conftest import MINI_OVERLAYS
from gasrules.evaluation.evaluator import read_case
from gasrules.rulebook.codegen import OUTCOMES
from gasrules.verification.casegen import generate_cases
from gasrules.verification.oracle import oracle_evaluate

N_CASES = 3000
CHUNKS = 3


def same(a: Any, b: Any) -> bool:
    if a is None or b is None:
        return a is b
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return a == b and type(a) is type(b)


def compare(rb: Any, inputs: dict[str, Any], label: str) -> dict[str, int]:
    """Assert agreement for one case; return the outcome counts (to show what was exercised)."""
    vals, states, _errors, outcomes, codes = rb._function(inputs, None)
    o_values, o_states, o_outcomes, o_codes = oracle_evaluate(rb, inputs)
    names = rb.value_names
    for i, name in enumerate(names):
        assert same(vals[i], o_values[name]), (label, name, vals[i], o_values[name])
        assert states[i] == o_states[name], (label, name, states[i], o_states[name])
    rule_ids = [n for kind, n in rb.plan if kind == "rule"]
    if outcomes != o_outcomes:
        diff = [
            (rid, OUTCOMES[a], OUTCOMES[b]) for rid, a, b in zip(rule_ids, outcomes, o_outcomes) if a != b
        ]
        raise AssertionError(f"{label}: outcomes differ (rule, generated, oracle): {diff[:5]}")
    assert codes == o_codes, (label, codes ^ o_codes)
    counts: dict[str, int] = {}
    for o in outcomes:
        counts[OUTCOMES[o]] = counts.get(OUTCOMES[o], 0) + 1
    return counts


def readable(rb: Any, cases: Iterable[dict[str, Any]]) -> Iterator[tuple[str, dict[str, Any]]]:
    for case in cases:
        case = {k: v for k, v in case.items() if k in rb.inputs or k in ("case_id", "context")}
        inputs, errors, case_id, _ = read_case(rb, case)
        if not errors:
            yield str(case_id), inputs


def run(rb: Any, cases: Iterable[dict[str, Any]]) -> tuple[int, dict[str, int]]:
    n = 0
    totals: dict[str, int] = {}
    for label, inputs in readable(rb, cases):
        for k, v in compare(rb, inputs, label).items():
            totals[k] = totals.get(k, 0) + v
        n += 1
    return n, totals


def chunk(seed: int, index: int) -> Iterator[dict[str, Any]]:
    size = N_CASES // CHUNKS
    return itertools.islice(generate_cases(N_CASES, seed=seed), index * size, (index + 1) * size)


@pytest.mark.slow
@pytest.mark.parametrize("index", range(CHUNKS))
@pytest.mark.parametrize("which", ["shipped_rb", "site_rb"])
def test_generated_cases(which: str, index: int, request: pytest.FixtureRequest) -> None:
    rb = request.getfixturevalue(which)
    n, totals = run(rb, chunk(seed=2026, index=index))
    # casegen writes only valid cases: every one of the 1,000 of this chunk is compared
    assert n == N_CASES // CHUNKS
    # the cases exercise every kind of outcome the rulebook can produce
    assert totals.get("fired", 0) > n and totals.get("not_fired", 0) > n
    assert totals.get("skipped_missing_input", 0) > 0
    if which == "site_rb":
        assert totals.get("suspended", 0) == n  # ventilation.ve_for_target, suspended by the site


@pytest.mark.parametrize("path", [None, MINI_OVERLAYS / "site.yaml"])
def test_mini_rulebooks(path: Any, mini_rb: Any) -> None:
    rb = mini_rb if path is None else gasrules.load_rulebook(path)
    n, totals = run(rb, generate_cases(1000, seed=7))
    assert n == 1000
    assert totals.get("fired", 0) > n and totals.get("skipped_missing_input", 0) > 0


def boundary_cases(rb: Any, bases: list[dict[str, Any]]) -> Iterator[dict[str, Any]]:
    """Each base case with one input moved onto, and just around, each of its cut-points."""
    for cut in gasrules.list_cutpoints(rb):
        name, value = cut["quantity"], cut["value"]
        spec = rb.inputs.get(name)
        if spec is None or value is None:
            continue
        step = 10.0**-spec.precision
        for delta in (
            0.0,
            1e-12,
            -1e-12,
            step / 2,
            -step / 2,
            step / 2 - 1e-9,
            -step / 2 + 1e-9,
            step,
            -step,
        ):
            v = value + delta
            if spec.plausible_min <= v <= spec.plausible_max:
                for base in bases:
                    yield dict(base, **{name: v})


@pytest.mark.parametrize("which", ["mini_rb", pytest.param("shipped_rb", marks=pytest.mark.slow)])
def test_boundary_cases(which: str, request: pytest.FixtureRequest) -> None:
    rb = request.getfixturevalue(which)
    bases = [dict(c, sample_type="arterial") for c in itertools.islice(generate_cases(30, seed=3), 0, 30, 10)]
    n, totals = run(rb, boundary_cases(rb, bases))
    assert n > 200
    assert totals.get("fired", 0) > 0 and totals.get("not_fired", 0) > 0


def test_oracle_is_independent_of_the_generated_code() -> None:
    # The oracle must not call the generated function nor use the code generator: it may import
    # only outcome/state constants, the rulebook model and simpleeval's evaluator (Oracle).
    import ast
    import inspect

    import gasrules.verification.oracle as oracle

    tree = ast.parse(inspect.getsource(oracle))
    imported = {a.name for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) for a in n.names}
    assert not imported & {"generate", "to_python", "link", "build", "runtime_globals", "_Gen"}
    attributes = {n.attr for n in ast.walk(tree) if isinstance(n, ast.Attribute)}
    assert "_function" not in attributes and "source" not in attributes
