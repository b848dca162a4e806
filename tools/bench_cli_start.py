"""Cold start of the command line: median wall time of fresh processes, and what they import.

Usage: python tools/bench_cli_start.py [N]
Runs `gasrules --version`, `gasrules --help` and `gasrules interpret --help` N times each
(default 15) as new Python processes calling gasrules.cli.main (what the console script runs)
with this interpreter, and prints the median,
fastest and slowest wall time, then the gasrules modules that a bare `gasrules --help` imports
and how many modules it imports in all. The goal is a median of at most 0.3 s; a busy machine
is noisy, so repeat before concluding.
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import time

RUNS = (["--version"], ["--help"], ["interpret", "--help"])

_MAIN = "import sys; from gasrules.cli import main; sys.exit(main(sys.argv[1:]))"
_IMPORTS = (
    "import io, json, sys, contextlib\n"
    "from gasrules.cli import main\n"
    "with contextlib.redirect_stdout(io.StringIO()):\n"
    "    main(sys.argv[1:])\n"
    "print(json.dumps(sorted(sys.modules)))\n"
)


def wall(args: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", _MAIN, *args], stdout=subprocess.DEVNULL, check=True)
    return time.perf_counter() - start


def imported(args: list[str]) -> list[str]:
    out = subprocess.run(
        [sys.executable, "-c", _IMPORTS, *args], capture_output=True, text=True, check=True
    ).stdout
    return list(json.loads(out.splitlines()[-1]))


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 15
    wall(["--version"])  # warm the file cache and the bytecode
    print(f"{'command':<28} {'median':>8} {'min':>8} {'max':>8}   ({n} fresh processes each)")
    for args in RUNS:
        times = [wall(args) for _ in range(n)]
        print(
            f"{'gasrules ' + ' '.join(args):<28} {statistics.median(times):7.3f}s "
            f"{min(times):7.3f}s {max(times):7.3f}s"
        )
    baseline = set(imported_of_python())
    modules = imported(["--help"])
    ours = [m for m in modules if m == "gasrules" or m.startswith("gasrules.")]
    print(f"\n`gasrules --help` imports {len(ours)} gasrules modules: {', '.join(ours)}")
    print(f"and {len(set(modules) - baseline)} modules in all beyond a bare interpreter")
    commands = [m for m in ours if m.startswith("gasrules.cli.commands.") and m != "gasrules.cli.commands"]
    print("command modules imported:", ", ".join(commands) if commands else "none")


def imported_of_python() -> list[str]:
    out = subprocess.run(
        [sys.executable, "-c", "import sys, json; print(json.dumps(sorted(sys.modules)))"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    return list(json.loads(out))


if __name__ == "__main__":
    main()
