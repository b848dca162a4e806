"""Engine speed, measured side by side in one run. Prints figures; asserts nothing.

Usage: python tools/bench_engine.py [--cases N] [--rounds R] [--cold-runs K] [--profile]

1. Interpretation on the shipped rulebook, full trace and no trace: microseconds per case and
   cases per second over N (>= 100,000) seeded generated cases (gasrules.verification.casegen).
2. The engine's own overhead: the fixed benchmark rulebook (tools/bench/rulebook.yaml) against
   its hand-written Python twin (tools/bench/twin.py), timed in alternating blocks of cases so
   that both see the same machine noise; ratio engine / twin.
3. For scale: simpleeval's tree walker per case (gasrules.verification.oracle.oracle_evaluate) against the
   generated function, values and rule outcomes only, on a small sample.
4. Where the time goes on the shipped rulebook: reading the case, the generated function
   (with its trace), assembling the result.
5. Cold start of `gasrules interpret` on one case as a subprocess: median of K runs with a warm
   compiled-rulebook cache, one run with a cold cache, the bare interpreter for reference, and
   the import-time breakdown (python -X importtime) summarised to the top modules.

Every timing reports wall time (time.perf_counter) and CPU time (time.process_time, or the
children's rusage for subprocesses); figures are medians of repeated runs. The machine these
figures are meant for has 2 cores shared with other work: compare ratios from one run, not
absolute figures across runs.
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import importlib.util
import json
import os
import pstats
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import gasrules
from gasrules.evaluation.evaluator import read_case
from gasrules.verification.casegen import generate_cases
from gasrules.verification.oracle import oracle_evaluate

ROOT = Path(__file__).resolve().parents[1]
BENCH_RULEBOOK = ROOT / "tools" / "bench" / "rulebook.yaml"
SEED = 20260301
BLOCK = 2000  # cases per alternating block in the engine-vs-twin comparison
TARGETS = {
    "full trace": "design target <= 30 us/case",
    "ratio": "design target <= 1.5x",
    "cold": "design target <= 0.3 s",
}


def load_twin() -> Any:
    spec = importlib.util.spec_from_file_location("bench_twin", ROOT / "tools" / "bench" / "twin.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# ----------------------------------------------------------------------------- timing helpers


def clocks() -> tuple[float, float]:
    return time.perf_counter(), time.process_time()


def run_pass(fn: Callable[[Any], Any], cases: list[Any]) -> tuple[float, float]:
    """(wall s, cpu s) for fn over every case; results are dropped as they come."""
    w0, c0 = clocks()
    for case in cases:
        fn(case)
    w1, c1 = clocks()
    return w1 - w0, c1 - c0


def per_case(seconds: float, n: int) -> float:
    return seconds / n * 1e6


def row(label: str, wall: float, cpu: float, n: int, note: str = "") -> None:
    us_w, us_c = per_case(wall, n), per_case(cpu, n)
    print(f"  {label:<52} {us_w:9.1f} {n / wall:11,.0f} {us_c:9.1f}  {note}")


def header(title: str) -> None:
    print()
    print(title)
    print(f"  {'':<52} {'wall us':>9} {'cases/s':>11} {'cpu us':>9}")


# ----------------------------------------------------------------------------- sections


def section_shipped(rb: Any, cases: list[Any], rounds: int) -> None:
    header(
        f"1. Shipped rulebook {rb.id} {rb.version} ({len(rb.rules)} rules, {len(rb.derived)} derived), "
        f"{len(cases):,} cases, median of {rounds} rounds"
    )
    full: list[tuple[float, float]] = []
    bare: list[tuple[float, float]] = []
    for r in range(rounds):  # alternate the order so drift hits both alike
        order = [(True, full), (False, bare)] if r % 2 == 0 else [(False, bare), (True, full)]
        for trace, sink in order:
            sink.append(run_pass(lambda c, t=trace: gasrules.interpret(rb, c, t), cases))
    n = len(cases)
    for label, runs, note in (
        ("interpret, full trace", full, TARGETS["full trace"]),
        ("interpret, no trace", bare, ""),
    ):
        row(label, statistics.median(w for w, _ in runs), statistics.median(c for _, c in runs), n, note)
    spread = [per_case(w, n) for w, _ in full]
    print(f"  (full trace, wall us/case per round: {', '.join(f'{x:.1f}' for x in spread)})")


def section_twin(brb: Any, twin: Any, cases: list[Any], rounds: int) -> None:
    header(
        f"2. Engine overhead: benchmark rulebook {brb.id} ({len(brb.rules)} rules, {len(brb.derived)} derived) "
        f"vs hand-written twin, {len(cases):,} cases x {rounds} rounds, alternating blocks of {BLOCK}"
    )
    for trace in (True, False):
        tot = {"engine": [0.0, 0.0], "twin": [0.0, 0.0]}
        ratios_w: list[float] = []
        ratios_c: list[float] = []
        fns = {
            "engine": lambda c, t=trace: gasrules.interpret(brb, c, t),
            "twin": lambda c, t=trace: twin.interpret(c, t),
        }
        k = 0
        for _ in range(rounds):
            for start in range(0, len(cases), BLOCK):
                block = cases[start : start + BLOCK]
                order = ("engine", "twin") if k % 2 == 0 else ("twin", "engine")
                k += 1
                got = {}
                for name in order:
                    got[name] = run_pass(fns[name], block)
                    tot[name][0] += got[name][0]
                    tot[name][1] += got[name][1]
                ratios_w.append(got["engine"][0] / got["twin"][0])
                ratios_c.append(got["engine"][1] / got["twin"][1] if got["twin"][1] > 0 else float("nan"))
        n = len(cases) * rounds
        label = "full trace" if trace else "no trace"
        row(f"engine, {label}", tot["engine"][0], tot["engine"][1], n)
        row(f"hand-written twin, {label}", tot["twin"][0], tot["twin"][1], n)
        med_c = (
            statistics.median(x for x in ratios_c if x == x)
            if any(x == x for x in ratios_c)
            else float("nan")
        )
        print(
            f"  {'ratio engine/twin, ' + label:<52} wall {tot['engine'][0] / tot['twin'][0]:.2f}x "
            f"(median of {len(ratios_w)} blocks {statistics.median(ratios_w):.2f}x), "
            f"cpu {tot['engine'][1] / tot['twin'][1]:.2f}x (median {med_c:.2f}x)  "
            f"{TARGETS['ratio'] if trace else ''}"
        )


def section_oracle(rb: Any, brb: Any, cases: list[Any], sample: int, rounds: int) -> None:
    header(
        f"3. For scale: values and rule outcomes only (no trace, no result), {sample} cases, "
        f"median of {rounds} rounds"
    )
    for book in (rb, brb):
        read = [read_case(book, c) for c in cases[:sample]]
        inputs = [r[0] for r in read if not r[1]]
        gen = [run_pass(lambda i, f=book._function: f(i, None), inputs) for _ in range(rounds)]
        orc = [run_pass(lambda i, b=book: oracle_evaluate(b, i), inputs) for _ in range(rounds)]
        gw, gc = statistics.median(w for w, _ in gen), statistics.median(c for _, c in gen)
        ow, oc = statistics.median(w for w, _ in orc), statistics.median(c for _, c in orc)
        row(f"{book.id}: generated function", gw, gc, len(inputs))
        row(
            f"{book.id}: simpleeval per case (oracle)",
            ow,
            oc,
            len(inputs),
            f"{ow / gw:.0f}x the generated function",
        )


def section_stages(rb: Any, cases: list[Any], rounds: int) -> None:
    header(f"4. Where the time goes, shipped rulebook, {len(cases):,} cases, median of {rounds} rounds")
    static = rb._static

    def read_only(case: Any) -> Any:
        return read_case(rb, case)

    def read_and_function(case: Any) -> Any:
        inputs = read_case(rb, case)[0]
        return rb._function(inputs, [])

    def read_and_function_bare(case: Any) -> Any:
        inputs = read_case(rb, case)[0]
        return rb._function(inputs, None)

    def full(case: Any) -> Any:
        return gasrules.interpret(rb, case)

    def bare(case: Any) -> Any:
        return gasrules.interpret(rb, case, False)

    passes = {
        "read": read_only,
        "function": read_and_function,
        "full": full,
        "function_bare": read_and_function_bare,
        "bare": bare,
    }
    runs: dict[str, list[tuple[float, float]]] = {k: [] for k in passes}
    for _ in range(rounds):
        for name, fn in passes.items():
            runs[name].append(run_pass(fn, cases))
    med = {
        k: (statistics.median(w for w, _ in v), statistics.median(c for _, c in v)) for k, v in runs.items()
    }
    n = len(cases)
    row("read_case (units, plausibility)", *med["read"], n)
    for label, fn_key, all_key in (("full trace", "function", "full"), ("no trace", "function_bare", "bare")):
        row(
            f"generated function, {label}",
            med[fn_key][0] - med["read"][0],
            med[fn_key][1] - med["read"][1],
            n,
            "(read+function minus read)",
        )
        row(
            f"assemble, {label} (texts, not assessed, headline)",
            med[all_key][0] - med[fn_key][0],
            med[all_key][1] - med[fn_key][1],
            n,
            "(interpret minus read+function)",
        )
    nev = sum(len(gasrules.interpret(rb, c)["trace"]) for c in cases[:200]) / min(200, n)
    print(f"  (trace events per case: {nev:.0f}; identity {static.identity['id']})")
    floor = [run_pass(lambda _c: _bare_events(int(nev)), cases[:5000]) for _ in range(rounds)]
    row(
        f"floor: {nev:.0f} bare events (4 small dicts each), plain Python",
        statistics.median(w for w, _ in floor),
        statistics.median(c for _, c in floor),
        len(cases[:5000]),
        "what any trace of this size costs",
    )
    # Keeping every result alive (as a caller collecting a batch does) makes the cyclic garbage
    # collector rescan a growing heap; results hold no cycles, so that work is wasted.
    sample = cases[:3000]
    kept: list[tuple[float, float]] = []
    kept_nogc: list[tuple[float, float]] = []
    for _ in range(rounds):
        out: list[Any] = []
        kept.append(run_pass(lambda c: out.append(gasrules.interpret(rb, c)), sample))
        del out
        out2: list[Any] = []
        gc.disable()
        try:
            kept_nogc.append(run_pass(lambda c: out2.append(gasrules.interpret(rb, c)), sample))
        finally:
            gc.enable()
        del out2
        gc.collect()
    row(
        f"interpret, results kept in a list ({len(sample):,} cases)",
        statistics.median(w for w, _ in kept),
        statistics.median(c for _, c in kept),
        len(sample),
    )
    row(
        "  the same with the cyclic GC disabled",
        statistics.median(w for w, _ in kept_nogc),
        statistics.median(c for _, c in kept_nogc),
        len(sample),
    )


_PARAM = {"value": 7.1, "unit": "[pH]", "set_by": "rulebook.yaml:1:1"}


def _bare_events(n: int, v: float = 7.25, r: float = 7.25) -> list[Any]:
    """The smallest event a rule with one read, one parameter and one comparison can have."""
    out = []
    for _ in range(n):
        out.append(
            {
                "rule": "r",
                "step": "s",
                "title": "t",
                "outcome": "not_fired",
                "reads": {"ph": v},
                "parameters": {"p": _PARAM},
                "comparisons": [
                    {
                        "quantity": "ph",
                        "value": v,
                        "compared": r,
                        "op": "<",
                        "threshold": "p",
                        "threshold_value": 7.1,
                        "margin": round(r - 7.1, 9),
                    }
                ],
            }
        )
    return out


def _child_cpu() -> float:
    u = resource.getrusage(resource.RUSAGE_CHILDREN)
    return u.ru_utime + u.ru_stime


def _timed(cmd: list[str], env: dict[str, str]) -> tuple[float, float, int]:
    c0 = _child_cpu()
    w0 = time.perf_counter()
    proc = subprocess.run(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)
    w1 = time.perf_counter()
    return w1 - w0, _child_cpu() - c0, proc.returncode


def gasrules_command() -> list[str]:
    script = Path(sys.executable).with_name("gasrules")
    return [str(script)] if script.exists() else [sys.executable, "-m", "gasrules.cli"]


def section_cold_start(runs: int) -> None:
    print()
    print(
        f"5. Cold start of `gasrules interpret CASE` (subprocess; median of {runs} runs; wall / cpu of the child)"
    )
    case = {
        "case_id": "cold",
        "ph": 7.26,
        "pco2": 23,
        "hco3": 10,
        "na": 140,
        "cl": 104,
        "sample_type": "arterial",
    }
    with tempfile.TemporaryDirectory() as tmp:
        case_file = Path(tmp) / "case.json"
        case_file.write_text(json.dumps(case))
        base_env = dict(os.environ)
        cmd = gasrules_command() + ["interpret", str(case_file)]
        cold_env = dict(base_env, GASRULES_CACHE_DIR=str(Path(tmp) / "cold-cache"))
        cold = _timed(cmd, cold_env)
        warm_env = dict(base_env, GASRULES_CACHE_DIR=str(Path(tmp) / "warm-cache"))
        _timed(cmd, warm_env)  # fills the cache
        warm = [_timed(cmd, warm_env) for _ in range(runs)]
        bare = [_timed([sys.executable, "-c", "pass"], base_env) for _ in range(runs)]
        imp = [_timed([sys.executable, "-c", "import gasrules.cli"], base_env) for _ in range(runs)]
        lib_code = (
            "import sys, json, gasrules; rb = gasrules.load_rulebook(); "
            "print(gasrules.interpret(rb, json.load(open(sys.argv[1])))['headline'])"
        )
        lib = [_timed([sys.executable, "-c", lib_code, str(case_file)], warm_env) for _ in range(runs)]
        codes = {c for _, _, c in warm} | {cold[2]}
        print(
            f"  {'warm compiled-rulebook cache':<52} {statistics.median(w for w, _, _ in warm):7.3f} s "
            f"cpu {statistics.median(c for _, c, _ in warm):6.3f} s   {TARGETS['cold']}"
        )
        print(f"    (runs, wall s: {', '.join(f'{w:.3f}' for w, _, _ in warm)})")
        print(
            f"  {'cold cache (load, check, compile, store)':<52} {cold[0]:7.3f} s cpu {cold[1]:6.3f} s  (one run)"
        )
        print(
            f"  {'bare interpreter: python -c pass':<52} {statistics.median(w for w, _, _ in bare):7.3f} s "
            f"cpu {statistics.median(c for _, c, _ in bare):6.3f} s"
        )
        label = 'python -c "import gasrules.cli"'
        print(
            f"  {label:<52} {statistics.median(w for w, _, _ in imp):7.3f} s "
            f"cpu {statistics.median(c for _, c, _ in imp):6.3f} s"
        )
        label = "library only: load_rulebook + interpret, no CLI"
        print(
            f"  {label:<52} {statistics.median(w for w, _, _ in lib):7.3f} s "
            f"cpu {statistics.median(c for _, c, _ in lib):6.3f} s   (same warm cache)"
        )
        print(f"  (exit codes seen: {sorted(codes)})")
        import_breakdown(warm_env, case_file)


def import_breakdown(env: dict[str, str], case_file: Path, top: int = 14) -> None:
    """python -X importtime on the same command, summarised by top-level package (cumulative
    time of each outermost import) and listing the slowest single modules."""
    code = "import sys; from gasrules.cli import main; sys.exit(main(sys.argv[1:]))"
    proc = subprocess.run(
        [sys.executable, "-X", "importtime", "-c", code, "interpret", str(case_file)],
        env=env,
        capture_output=True,
        text=True,
        check=False,
    )
    outer: dict[str, int] = {}
    self_by_module: dict[str, int] = {}
    total = 0
    for line in proc.stderr.splitlines():
        if not line.startswith("import time:") or "self [us]" in line:
            continue
        try:
            _, rest = line.split(":", 1)
            self_us, cum_us, name = rest.split("|", 2)
        except ValueError:
            continue
        depth = (len(name) - len(name.lstrip())) // 2
        module = name.strip()
        self_by_module[module] = int(self_us)
        if depth == 0:  # outermost import of a chain (its cumulative time includes the rest)
            pkg = module.split(".")[0]
            outer[pkg] = outer.get(pkg, 0) + int(cum_us)
            total += int(cum_us)
    print(
        f"  import time (python -X importtime, one warm-cache run): {total / 1e3:.1f} ms in all; "
        f"top packages by cumulative time:"
    )
    for pkg, us in sorted(outer.items(), key=lambda kv: -kv[1])[:top]:
        print(f"    {pkg:<30} {us / 1e3:7.1f} ms")
    print("  slowest single modules (self time):")
    for mod, us in sorted(self_by_module.items(), key=lambda kv: -kv[1])[:8]:
        print(f"    {mod:<50} {us / 1e3:7.1f} ms")


def section_profile(rb: Any, cases: list[Any]) -> None:
    print()
    print(f"6. cProfile, shipped rulebook, full trace, {len(cases):,} cases (top functions by own time)")
    prof = cProfile.Profile()
    prof.enable()
    for case in cases:
        gasrules.interpret(rb, case)
    prof.disable()
    stats = pstats.Stats(prof)
    stats.sort_stats("tottime")
    total = stats.total_tt  # type: ignore[attr-defined]
    print(
        f"  total {total:.2f} s under the profiler ({per_case(total, len(cases)):.0f} us/case with its overhead)"
    )
    width = 62
    for func, (cc, nc, tt, ct, _callers) in sorted(stats.stats.items(), key=lambda kv: -kv[1][2])[:15]:  # type: ignore[attr-defined]
        file, line, name = func
        where = f"{Path(file).name}:{line} {name}" if line else name
        print(
            f"    {where[:width]:<{width}} {tt:7.2f} s own {tt / total * 100:5.1f} %  {nc / len(cases):6.1f} calls/case"
        )


# ----------------------------------------------------------------------------- main


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=100_000, help="generated cases (default 100,000)")
    ap.add_argument("--rounds", type=int, default=3, help="repeated passes; medians are reported (default 3)")
    ap.add_argument("--cold-runs", type=int, default=9, help="subprocess runs for the cold start (default 9)")
    ap.add_argument("--oracle-sample", type=int, default=300, help="cases for the simpleeval comparison")
    ap.add_argument("--profile", action="store_true", help="also print a cProfile summary (20,000 cases)")
    ap.add_argument("--skip-cold", action="store_true", help="skip the subprocess cold-start section")
    args = ap.parse_args(argv)

    load = os.getloadavg()
    print(
        f"gasrules {gasrules.__version__} engine benchmark; Python {sys.version.split()[0]}; "
        f"{os.cpu_count()} CPUs; load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}"
    )
    print(
        "Noisy shared machine (2 cores): read ratios measured side by side here, not absolute figures "
        "across runs."
    )
    w0 = time.perf_counter()
    rb = gasrules.load_rulebook()
    brb = gasrules.load_rulebook(BENCH_RULEBOOK)
    twin = load_twin().Twin(brb)
    cases = list(generate_cases(args.cases, seed=SEED))
    print(
        f"{len(cases):,} cases generated with seed {SEED} in {time.perf_counter() - w0:.1f} s "
        f"(not counted); rulebooks loaded from the compiled-rulebook cache when warm."
    )

    section_shipped(rb, cases, args.rounds)
    section_twin(brb, twin, cases, args.rounds)
    section_oracle(rb, brb, cases, args.oracle_sample, args.rounds)
    section_stages(rb, cases[:20_000], args.rounds)
    if not args.skip_cold:
        section_cold_start(args.cold_runs)
    if args.profile:
        section_profile(rb, cases[:20_000])
    print()
    print(f"Total benchmark time {time.perf_counter() - w0:.0f} s.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
