"""Benchmark `gasrules batch`: throughput (cases/s) and peak memory on 1 and 2 workers.

    python tools/bench_batch.py                       # 100,000 cases on 1 and 2 workers, then 1,000,000
    python tools/bench_batch.py --n 100000 --big 0    # skip the 1,000,000-case run
    python tools/bench_batch.py --n 0 --big-workers 1,2   # only the memory runs, on 1 and 2 workers
    python tools/bench_batch.py --formats csv,parquet # also Parquet out

The corpus is invented by tools/make_demo_data.py (casegen, seed 7, ~0.1 % malformed rows) and
written under --dir (default /tmp/gasrules-bench-batch; never commit it). Each run is a separate
`gasrules batch` process; its peak memory is sampled from /proc every 50 ms as the sum of the
resident sets of the whole process tree (the main process and its workers), and the largest
single process is shown too. CPU time (user + system, the run and its workers) is printed
beside wall time: "cores busy" below the worker count means the machine was shared, and cases per
CPU-second is the figure that does not depend on that. Runs on one machine, side by side, so
compare ratios, not absolutes.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "engine"))


def _rss_kib(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def _tree(pid: int) -> list[int]:
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        try:
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children", encoding="ascii") as f:
                    todo.extend(int(c) for c in f.read().split())
        except OSError:
            continue
    return out


class PeakSampler(threading.Thread):
    """Samples the resident memory of a process tree until stopped."""

    def __init__(self, pid: int, every: float = 0.05) -> None:
        super().__init__(daemon=True)
        self.pid, self.every = pid, every
        self.peak_tree = self.peak_single = 0
        self.halt = threading.Event()

    def run(self) -> None:
        while not self.halt.is_set():
            sizes = [_rss_kib(p) for p in _tree(self.pid)]
            self.peak_tree = max(self.peak_tree, sum(sizes))
            self.peak_single = max(self.peak_single, max(sizes, default=0))
            self.halt.wait(self.every)


def make_corpus(path: Path, n: int, seed: int = 7) -> None:
    if path.exists() and path.with_suffix(".done").exists():
        return
    t0 = time.perf_counter()
    subprocess.run(
        [
            sys.executable,
            str(ROOT / "tools" / "make_demo_data.py"),
            "corpus",
            "--n",
            str(n),
            "--seed",
            str(seed),
            "--format",
            "csv",
            "--out",
            str(path),
        ],
        check=True,
        stderr=subprocess.DEVNULL,
    )
    path.with_suffix(".done").write_text(f"{n}\n")
    print(f"  made {path} ({n:,} invented cases) in {time.perf_counter() - t0:.0f} s", flush=True)


def run_once(src: Path, out: Path, workers: int) -> dict[str, float]:
    cmd = [
        sys.executable,
        "-c",
        "import sys; from gasrules.cli import main; sys.exit(main())",
        "batch",
        str(src),
        str(out),
        "--workers",
        str(workers),
        "--no-progress",
    ]
    env = {**os.environ, "PYTHONPATH": str(ROOT / "engine")}
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    sampler = PeakSampler(proc.pid)
    sampler.start()
    _, err = proc.communicate()
    seconds = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)  # the run and its reaped workers
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    sampler.halt.set()
    sampler.join()
    if proc.returncode != 0:
        raise SystemExit(f"batch failed ({proc.returncode}): {err.decode()[-2000:]}")
    rows = int(err.decode().split(" rows in", 1)[0].replace(",", "").split()[-1])
    return {
        "rows": rows,
        "seconds": seconds,
        "rate": rows / seconds,
        "cpu": cpu,
        "tree_mib": sampler.peak_tree / 1024,
        "single_mib": sampler.peak_single / 1024,
    }


def _burn(_payload: object, chunk: list[int]) -> int:
    total = 0
    for x in chunk:
        for i in range(200_000):
            total += i * x
    return total


def control(workers: int, items: int = 400) -> tuple[float, float]:
    """Pure CPU work through the same pool: (wall seconds, cores busy). On an idle machine 2
    workers keep about 2 cores busy; less means the machine was shared during the run."""
    from gasrules.tables.pool import OrderedPool, chunked

    before_c = resource.getrusage(resource.RUSAGE_CHILDREN)
    before_s = resource.getrusage(resource.RUSAGE_SELF)
    t0 = time.perf_counter()
    with OrderedPool(_burn, None, workers) as pool:
        for _ in pool.map(chunked(range(items), 2)):
            pass
    wall = time.perf_counter() - t0
    after_c = resource.getrusage(resource.RUSAGE_CHILDREN)
    after_s = resource.getrusage(resource.RUSAGE_SELF)
    cpu = sum(
        getattr(after_c, f) - getattr(before_c, f) + getattr(after_s, f) - getattr(before_s, f)
        for f in ("ru_utime", "ru_stime")
    )
    return wall, cpu / wall


def _line(label: str, r: dict[str, float]) -> str:
    return (
        f"  {label:<34} {r['rows']:>10,.0f} rows  {r['seconds']:7.1f} s  {r['rate']:8,.0f} cases/s  "
        f"CPU {r['cpu']:6.1f} s ({r['rows'] / max(r['cpu'], 1e-9):6,.0f} cases per CPU-second, "
        f"{r['cpu'] / r['seconds']:4.2f} cores busy)  "
        f"peak RSS {r['tree_mib']:5.0f} MiB (all processes), {r['single_mib']:4.0f} MiB (largest one)"
    )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=100_000, help="cases for the 1-vs-2-worker comparison")
    ap.add_argument("--big", type=int, default=1_000_000, help="cases for the memory run (0: skip)")
    ap.add_argument("--small", type=int, default=1_000, help="cases for the flat-memory baseline")
    ap.add_argument(
        "--big-workers",
        type=lambda t: tuple(int(x) for x in t.split(",")),
        default=(2,),
        help="worker counts for the memory run, comma separated (default 2)",
    )
    ap.add_argument("--formats", default="csv", help="output formats to time, comma separated")
    ap.add_argument("--dir", type=Path, default=Path("/tmp/gasrules-bench-batch"))
    args = ap.parse_args(argv)
    args.dir.mkdir(parents=True, exist_ok=True)
    print(f"gasrules batch benchmark: {os.cpu_count()} CPUs, corpus under {args.dir}", flush=True)
    for workers in (1, 2):
        wall, busy = control(workers)
        print(
            f"  control: pure CPU work through the pool, {workers} worker(s): {wall:5.1f} s, "
            f"{busy:4.2f} cores busy",
            flush=True,
        )
    sizes = [s for s in (args.small, args.n, args.big) if s > 0]
    for n in sizes:
        make_corpus(args.dir / f"corpus-{n}.csv", n)
    results: dict[str, dict[str, float]] = {}
    for fmt in args.formats.split(",") if args.n > 0 else ():
        for workers in (1, 2):
            label = f"{args.n:,} cases, {workers} worker{'s' if workers > 1 else ''}, -> {fmt}"
            r = run_once(
                args.dir / f"corpus-{args.n}.csv", args.dir / f"out-{args.n}-{workers}.{fmt}", workers
            )
            results[label] = r
            print(_line(label, r), flush=True)
        one, two = (results[k] for k in list(results)[-2:])
        print(f"  -> 2 workers / 1 worker throughput: {two['rate'] / one['rate']:.2f}x", flush=True)
    for n, counts in ((args.small, (1, 2)), (args.big, args.big_workers)):
        if n > 0:
            for workers in counts:
                label = f"{n:,} cases, {workers} worker{'s' if workers > 1 else ''}, -> csv"
                r = run_once(args.dir / f"corpus-{n}.csv", args.dir / f"out-{n}-{workers}.csv", workers)
                print(_line(label, r), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
