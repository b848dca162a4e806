"""Case fuzzing: cases of every JSON type (numbers of every size, NaN and infinity, strings,
lists, objects, deep nesting, in inputs and in context) through the shipped adult rulebook and
the small mini rulebook. Every case gives a result, valid against schemas/result.schema.json,
strict JSON, and the same result when interpreted twice. tools/fuzz_cases.py runs 1,000,000.

No clinical value is asserted.
"""

from __future__ import annotations

import json
import math
import random
from typing import Any

import pytest

import gasrules
from gasrules.rulebook.schema import validate_instance
from gasrules.verification.fuzzing import random_case


def _units(rb: Any) -> Any:
    return lambda name: [rb.inputs[name].unit, *rb.inputs[name].alternatives] if name in rb.inputs else []


@pytest.mark.parametrize("which,count", [("shipped", 2500), ("mini", 7500)])
def test_fuzzed_cases_always_give_valid_strict_results(
    which: str, count: int, shipped_rb: Any, mini_rb: Any
) -> None:
    rb = shipped_rb if which == "shipped" else mini_rb
    rng = random.Random(4242 + count)
    names = sorted(
        n for n in rb.inputs if n not in {s.fallback_marks for s in rb.inputs.values()}
    )  # engine-set flags aside
    problems: list[str] = []
    statuses: dict[str, int] = {}
    for i in range(count):
        case = random_case(rng, names, _units(rb), rb.inputs)
        try:
            first = gasrules.interpret(rb, case)
            text = json.dumps(first, allow_nan=False, sort_keys=True)
            again = json.dumps(gasrules.interpret(rb, case), allow_nan=False, sort_keys=True)
        except Exception as exc:
            problems.append(f"case {i}: {type(exc).__name__}: {exc}")
            continue
        if text != again:
            problems.append(f"case {i}: two different results")
        statuses[first["status"]] = statuses.get(first["status"], 0) + 1
        bad = validate_instance(first, "result.schema.json")
        if bad:
            problems.append(f"case {i}: {bad[0]}")
    assert not problems, f"{len(problems)} problems; first: {problems[0]}"
    assert count - statuses.get("rejected", 0) > count // 4, statuses  # the evaluation itself is reached


def test_hostile_values_in_inputs_and_context_are_rejected_by_field(mini_rb: Any) -> None:
    deep: Any = 0
    for _ in range(5000):
        deep = [deep]
    cases = [
        ({"ph": 10**400}, "ph", "input.too_large"),
        ({"ph": {"value": -(10**400), "unit": "[pH]"}}, "ph", "input.too_large"),
        ({"ph": math.nan}, "ph", "input.not_finite"),
        ({"ph": deep}, "ph", "input.not_a_number"),
        ({"ph": 7.4, "context": {"n": 10**400}}, "context.n", "input.not_strict_json"),
        ({"ph": 7.4, "context": {"n": [1, math.inf]}}, "context.n[1]", "input.not_strict_json"),
        ({"ph": 7.4, "context": {"n": deep}}, "context.n" + "[0]" * 31, "input.not_strict_json"),
        ({"ph": 7.4, "context": {1: "x"}}, "context", "input.not_strict_json"),
    ]
    for case, field, code in cases:
        result = gasrules.interpret(mini_rb, case)
        assert result["status"] == "rejected", case
        assert [(e["field"], e["code"]) for e in result["errors"]] == [(field, code)]
        json.dumps(result, allow_nan=False)
        assert validate_instance(result, "result.schema.json") == []


def test_interpret_command_reads_hostile_json_lines_row_for_row(tmp_path: Any) -> None:
    from typer.testing import CliRunner

    from gasrules.cli.commands import interpret as interpret_command

    path = tmp_path / "cases.jsonl"
    path.write_text(
        '{"ph": 7.4, "context": {"x": ' + "[" * 50_000 + "]" * 50_000 + "}}\n"
        '{"ph": 7.4, "pco2": 40, "hco3": 24}\n'
        '{"ph": 1' + "0" * 5000 + "}\n",
        encoding="utf-8",
    )
    res = CliRunner().invoke(interpret_command.app, [str(path), "--json"])
    assert res.exit_code == 4, res.output
    results = [json.loads(line) for line in res.stdout.splitlines()]
    assert [r["status"] == "rejected" for r in results] == [True, False, True]
    assert results[0]["errors"][0]["message"].endswith("cases.jsonl:1: JSON nested too deeply to read")
    assert "cases.jsonl:3: cannot be read" in results[2]["errors"][0]["message"]
