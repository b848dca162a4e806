"""Case fuzzer: N cases of every JSON type through the shipped adult rulebook (and the mini test
rulebook); every result must be strict JSON and the same when the case is interpreted twice;
every 100th is validated against schemas/result.schema.json. Prints counts; exit 1 on any
uncaught exception or bad result.

    .venv/bin/python tools/fuzz_cases.py --n 1000000 --seed 1
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "engine"))

import gasrules  # noqa: E402
from gasrules.rulebook.schema import validate_instance  # noqa: E402
from gasrules.verification.fuzzing import random_case  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--validate-every", type=int, default=100)
    args = ap.parse_args()
    books = [
        gasrules.load_rulebook(),
        gasrules.load_rulebook(ROOT / "tests" / "data" / "mini" / "rulebook.yaml"),
    ]
    rng = random.Random(args.seed)
    counts = {"cases": 0, "exceptions": 0, "not_strict": 0, "unstable": 0, "validated": 0, "invalid": 0}
    statuses: dict[str, int] = {}
    start = time.perf_counter()
    for i in range(args.n):
        rb = books[0] if i % 4 else books[1]
        names = sorted(
            n for n in rb.inputs if n not in {s.fallback_marks for s in rb.inputs.values()}
        )  # engine-set flags aside
        case = random_case(
            rng, names, lambda n, rb=rb: [rb.inputs[n].unit, *rb.inputs[n].alternatives], rb.inputs
        )
        counts["cases"] += 1
        try:
            result = gasrules.interpret(rb, case)
            again = gasrules.interpret(rb, case)
        except Exception as exc:
            counts["exceptions"] += 1
            print(f"case {i}: {type(exc).__name__}: {exc}", file=sys.stderr)
            continue
        try:
            if json.dumps(result, allow_nan=False, sort_keys=True) != json.dumps(
                again, allow_nan=False, sort_keys=True
            ):
                counts["unstable"] += 1
        except ValueError:
            counts["not_strict"] += 1
        statuses[result["status"]] = statuses.get(result["status"], 0) + 1
        if i % args.validate_every == 0:
            counts["validated"] += 1
            bad = validate_instance(result, "result.schema.json")
            if bad:
                counts["invalid"] += 1
                print(f"case {i}: {bad[0]}", file=sys.stderr)
        if (i + 1) % 100_000 == 0:
            print(f"{i + 1} cases, {time.perf_counter() - start:.0f} s, {counts}", flush=True)
    elapsed = time.perf_counter() - start
    print(
        f"cases: {counts['cases']}; uncaught exceptions: {counts['exceptions']}; not strict JSON: "
        f"{counts['not_strict']}; different on repeat: {counts['unstable']}; schema-checked: {counts['validated']}, "
        f"invalid: {counts['invalid']}; {elapsed:.1f} s ({counts['cases'] / elapsed:,.0f} cases/s)"
    )
    print("statuses: " + ", ".join(f"{k} {v}" for k, v in sorted(statuses.items())))
    return 1 if counts["exceptions"] or counts["not_strict"] or counts["unstable"] or counts["invalid"] else 0


if __name__ == "__main__":
    raise SystemExit(main())
