"""Impact replay throughput (cases/s) on 1 and 2 workers, and peak memory.

Usage: python tools/bench_impact.py [--n 100000] [--small 10000] [--rounds 2] [--dir /tmp/gasrules-bench]

Writes (once, reused afterwards) a seeded invented corpus with tools/make_demo_data.py and a tuned
copy of the shipped rulebook (anion-gap upper limit 12 -> 13 mmol/L, pH lower limit 7.35 -> 7.34:
invented demo tunings inside the guard rails) under --dir, never in the repository. Each
measurement runs in its own process so peak memory (max RSS of the parent, and of the largest
worker) belongs to that run alone. Runs alternate 1, 2, 1, 2 ... on the same files so a noisy
machine slows both alike; the table shows every run, then the median per worker count and the
2-over-1 ratio. CPU seconds (parent and workers) and the load average at the end of each run
are printed too: a load above 2 means other work competed for the two cores. A pure-Python
control loop, run alone and then twice at once (before and after the runs), gives the machine's
own 2-process ceiling to read the impact ratio against (2.00 on two free cores). A smaller
corpus (--small) is run too: equal peak memory on both sizes shows the replay streams.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "engine"))

EDITS = (
    ("  ag_high:\n    value: 12\n", "  ag_high:\n    value: 13\n"),
    ("  ph_low:\n    value: 7.35\n", "  ph_low:\n    value: 7.34\n"),
    ("  version: 1.0.0\n", "  version: 1.0.1\n"),
)


def prepare(directory: Path, n: int) -> tuple[Path, Path]:
    directory.mkdir(parents=True, exist_ok=True)
    corpus = directory / f"corpus-{n}.csv"
    if not corpus.exists():
        subprocess.run(
            [
                sys.executable,
                str(ROOT / "tools" / "make_demo_data.py"),
                "corpus",
                "--n",
                str(n),
                "--seed",
                "7",
                "--format",
                "csv",
                "--out",
                str(corpus),
            ],
            check=True,
        )
    from gasrules.core.resources import default_rulebook_path

    text = default_rulebook_path().read_text(encoding="utf-8")
    for old, new in EDITS:
        if text.count(old) != 1:
            raise SystemExit(f"bench_impact: the shipped rulebook no longer has {old!r} exactly once")
        text = text.replace(old, new, 1)
    tuned = directory / "tuned" / "rulebook.yaml"
    tuned.parent.mkdir(exist_ok=True)
    if not tuned.exists() or tuned.read_text(encoding="utf-8") != text:
        tuned.write_text(text, encoding="utf-8")
    return corpus, tuned


def one_run(corpus: Path, tuned: Path, workers: int) -> dict[str, float]:
    """Runs in a child process: one replay, its rate and this process's peak memory."""
    import gasrules
    from gasrules.governance.impact import replay

    old, new = gasrules.load_rulebook(), gasrules.load_rulebook(tuned)
    t0, cpu0 = time.perf_counter(), _cpu()
    report = replay(old, new, corpus, workers=workers)
    seconds, cpu = time.perf_counter() - t0, _cpu() - cpu0
    return {
        "workers": workers,
        "rows": report.rows,
        "seconds": seconds,
        "rate": report.rows / seconds,
        "cpu_seconds": cpu,
        "load": os.getloadavg()[0],
        "changed": report.changed_any,
        "rejected": sum(report.rejected.values()),
        "rss_parent_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "rss_worker_mb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024,
    }


def _cpu() -> float:
    """CPU seconds used by this process and its finished children (the workers)."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _spin(n: int = 20_000_000) -> None:
    x = 0
    for i in range(n):
        x += i


def control() -> float:
    """The machine's own 2-process ceiling: a pure-Python loop alone, then two copies at once.
    Returns 2 x (time alone) / (time of the pair): 2.0 on two free cores, less when shared."""
    import multiprocessing as mp

    t0 = time.perf_counter()
    _spin()
    alone = time.perf_counter() - t0
    ctx = mp.get_context("spawn")
    procs = [ctx.Process(target=_spin) for _ in range(2)]
    t0 = time.perf_counter()
    for p in procs:
        p.start()
    for p in procs:
        p.join()
    return 2 * alone / (time.perf_counter() - t0)


def measure(corpus: Path, tuned: Path, workers: int) -> dict[str, float]:
    out = subprocess.run(
        [sys.executable, __file__, "--child", str(corpus), str(tuned), str(workers)],
        check=True,
        capture_output=True,
        text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--small", type=int, default=10_000)
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--dir", type=Path, default=Path("/tmp/gasrules-bench"))
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(one_run(Path(args.child[0]), Path(args.child[1]), int(args.child[2]))))
        return
    big, tuned = prepare(args.dir, args.n)
    small, _ = prepare(args.dir, args.small)
    print(
        f"{'corpus':>8} {'workers':>7} {'seconds':>8} {'cases/s':>8} {'CPU s':>7} {'cases/CPU s':>11} {'load':>5} "
        f"{'changed':>8} {'rejected':>8} {'parent MB':>9} {'worker MB':>9}"
    )
    rates: dict[int, list[float]] = {1: [], 2: []}
    ceilings = [control()]
    for corpus, rounds in ((small, 1), (big, args.rounds)):
        for _ in range(rounds):
            for w in (1, 2):
                r = measure(corpus, tuned, w)
                if corpus == big:
                    rates[w].append(r["rate"])
                print(
                    f"{r['rows']:>8,} {w:>7} {r['seconds']:>8.1f} {r['rate']:>8,.0f} {r['cpu_seconds']:>7.1f} "
                    f"{r['rows'] / r['cpu_seconds']:>11,.0f} {r['load']:>5.1f} {r['changed']:>8,} {r['rejected']:>8,} "
                    f"{r['rss_parent_mb']:>9.0f} {r['rss_worker_mb'] if w > 1 else 0:>9.0f}",
                    flush=True,
                )
    ceilings.append(control())
    m1, m2 = statistics.median(rates[1]), statistics.median(rates[2])
    print(
        f"\nmedian over {args.n:,} cases: 1 worker {m1:,.0f} cases/s, 2 workers {m2:,.0f} cases/s, ratio {m2 / m1:.2f}"
    )
    print(
        "machine control (pure-Python loop, 2 processes vs 1; 2.00 = two free cores): "
        + ", ".join(f"{c:.2f}" for c in ceilings)
        + " (before, after)"
    )


if __name__ == "__main__":
    main()
