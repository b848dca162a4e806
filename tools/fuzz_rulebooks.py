"""Mutation fuzzer for rulebooks: N mutated variants of the small test rulebooks through check,
load and interpretation; prints how they ended and every uncaught exception (exit 1 if any).

    .venv/bin/python tools/fuzz_rulebooks.py --n 50000 --seed 1 [--out crashes/]
"""

from __future__ import annotations

import argparse
import random
import sys
import tempfile
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "engine"))

from gasrules.verification.fuzzing import mutate_rulebook, run_rulebook  # noqa: E402

SEEDS = [
    ROOT / "tests" / "data" / "fuzz" / "rulebook.yaml",
    ROOT / "tests" / "data" / "release" / "rulebook.yaml",
    ROOT / "tests" / "data" / "mini" / "rulebook.yaml",
]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=50_000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--out", type=Path, default=None, help="keep each crashing variant here")
    args = ap.parse_args()
    rng = random.Random(args.seed)
    seeds = [(p.read_text(encoding="utf-8"), yaml.safe_load(p.read_text(encoding="utf-8"))) for p in SEEDS]
    outcomes: dict[str, int] = {}
    crashes = 0
    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "rulebook.yaml"
        for i in range(args.n):
            text, data = seeds[0] if rng.random() < 0.6 else rng.choice(seeds)
            path.write_bytes(mutate_rulebook(text, data, rng))
            crash = run_rulebook(path, outcomes)
            if crash is not None:
                crashes += 1
                print(f"--- variant {i}: uncaught exception\n{crash}", file=sys.stderr)
                if args.out is not None:
                    args.out.mkdir(parents=True, exist_ok=True)
                    (args.out / f"crash-{i}.yaml").write_bytes(path.read_bytes())
            if (i + 1) % 10_000 == 0:
                print(
                    f"{i + 1} variants, {crashes} uncaught exceptions, {time.perf_counter() - start:.0f} s",
                    flush=True,
                )
    print(f"variants: {args.n}; uncaught exceptions: {crashes}; {time.perf_counter() - start:.1f} s")
    for what, count in sorted(outcomes.items(), key=lambda kv: -kv[1]):
        print(f"  {what:20s} {count}")
    return 1 if crashes else 0


if __name__ == "__main__":
    raise SystemExit(main())
