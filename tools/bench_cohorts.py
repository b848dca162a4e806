"""Speed of population-level validation (`gasrules verify`'s simulated cohorts). Prints figures;
asserts nothing.

Usage: python tools/bench_cohorts.py [RULEBOOK] [--size N] [--repeat R]

1. Generating every cohort of the rulebook's cohort file (NumPy, no interpretation).
2. The whole table (generation + interpret_many without trace + tally) with 1 and 2 worker
   processes, each in a fresh process-level state (the in-process table memo is cleared).
3. `gasrules verify` as a subprocess, with and without the cohorts (--no-cohorts).

Wall time (time.perf_counter) and CPU time of this process (time.process_time); medians of R runs.
The machine these figures are meant for has 2 cores shared with other work: compare figures from
one run, not across runs.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "engine"))


def _timed(fn, repeat: int) -> tuple[float, float]:
    walls, cpus = [], []
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        fn()
        walls.append(time.perf_counter() - w)
        cpus.append(time.process_time() - c)
    return statistics.median(walls), statistics.median(cpus)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("rulebook", nargs="?", default=str(ROOT / "rulebooks" / "adult" / "rulebook.yaml"))
    ap.add_argument("--size", type=int, default=None)
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args()
    import gasrules
    from gasrules.verification import cohort_table as T
    from gasrules.verification import cohorts as C

    rb = gasrules.load_rulebook(args.rulebook)
    plan = C.load_plan(args.rulebook)
    if plan is None:
        print(f"{args.rulebook}: no cohort file in its chain")
        return
    size = args.size or plan.size
    n = size * len(plan.cohorts)
    wall, cpu = _timed(lambda: [C.generate(rb, plan, c, size) for c in plan.cohorts], args.repeat)
    print(
        f"generate {len(plan.cohorts)} cohorts x {size:,} = {n:,} cases: {wall:.2f} s wall, {cpu:.2f} s CPU"
    )
    for workers in (1, 2):
        wall, cpu = _timed(lambda: T.run_cohorts(rb, plan, workers=workers, size=size), args.repeat)
        print(
            f"table with {workers} worker(s): {wall:.2f} s wall ({n / wall:,.0f} cases/s), {cpu:.2f} s CPU here"
        )
    cli = [sys.executable, "-m", "gasrules.cli", "verify", args.rulebook]
    for extra in (["--no-cohorts"], []):
        w = time.perf_counter()
        subprocess.run(cli + extra, capture_output=True, check=False)
        print(f"gasrules verify {' '.join(extra) or '(with cohorts)'}: {time.perf_counter() - w:.2f} s wall")


if __name__ == "__main__":
    main()
