"""Hostile rulebooks at run time, and a mutation fuzzer over the small test rulebook.

No clinical value is asserted: the cases are the mini rulebook's own placeholders (pH 7.40,
PCO2 40 mmHg, HCO3 24 mmol/L: common practice normal values).
"""

from __future__ import annotations

import json
from pathlib import Path

import yaml

import gasrules

MINI = Path(__file__).resolve().parent / "data" / "mini" / "rulebook.yaml"
NORMAL = {"ph": 7.40, "pco2": 40, "hco3": 24, "na": 140, "cl": 104}  # common practice normal values


def test_overflow_and_nan_at_run_time_are_calculation_errors(tmp_path: Path) -> None:
    data = yaml.safe_load(MINI.read_text(encoding="utf-8"))
    data["derived"]["huge"] = {"label": "Huge", "expr": "na * 1e308 * 10", "unit": "mmol/L", "precision": 1}
    data["derived"]["nan_value"] = {
        "label": "Not a number",
        "expr": "na * 1e308 * 10 - na * 1e308 * 10",
        "unit": "mmol/L",
        "precision": 1,
    }
    data["bibliography"] = str(MINI.parent / data["bibliography"])  # written elsewhere
    path = tmp_path / "rb.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    rb = gasrules.load_rulebook(path)
    result = gasrules.interpret(rb, NORMAL)
    assert result["values"].get("huge") is None and result["values"].get("nan_value") is None
    why = {item["what"]: item["why"] for item in result["not_assessed"]}
    assert why["Huge"] == "eval.calculation_error: result too large"
    assert why["Not a number"] == "eval.calculation_error: the result is not a number (NaN)"
    json.dumps(result, allow_nan=False)  # strict JSON
    from gasrules.rulebook.codegen import CALC_ERROR
    from gasrules.verification.oracle import oracle_evaluate

    _values, states, _outcomes, _codes = oracle_evaluate(rb, dict(NORMAL))  # the slow evaluator agrees
    assert states["huge"] == CALC_ERROR and states["nan_value"] == CALC_ERROR


FUZZ_SEED = Path(__file__).resolve().parent / "data" / "fuzz" / "rulebook.yaml"


def test_mutation_fuzzer_finds_no_uncaught_exception(tmp_path: Path) -> None:
    """2,000 mutated variants of the small fuzz seed rulebook: every one ends in problems or in
    results (strict JSON), never in an exception. tools/fuzz_rulebooks.py runs 50,000 and more."""
    import random

    from gasrules.verification.fuzzing import mutate_rulebook, run_rulebook

    text = FUZZ_SEED.read_text(encoding="utf-8")
    data = yaml.safe_load(text)
    rng = random.Random(20261204)
    failures: list[str] = []
    path = tmp_path / "rulebook.yaml"
    for i in range(2000):
        path.write_bytes(mutate_rulebook(text, data, rng))
        crash = run_rulebook(path)
        if crash is not None:
            failures.append(f"variant {i}:\n{path.read_bytes()[:3000]!r}\n{crash}")
            (tmp_path / f"crash-{i}.yaml").write_bytes(path.read_bytes())
    assert not failures, f"{len(failures)} uncaught exceptions; first:\n{failures[0]}"
