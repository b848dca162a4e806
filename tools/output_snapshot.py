"""Before/after check of a refactor: write every user-visible output into a folder, or compare two.

    python tools/output_snapshot.py OUTDIR                 # snapshot of this checkout
    python tools/output_snapshot.py OUTDIR --root ../main  # snapshot of another checkout (its .venv)
    python tools/output_snapshot.py --compare BEFORE AFTER # exit 1 on any difference

A snapshot holds, for the demo data (tools/demo/cases.jsonl) and the shipped rulebooks: batch CSV
(with its summary on stdout/stderr) and JSON Lines with --full-json; `verify --json --no-cohorts`
for the adult rulebook and the example site; the review document (HTML and Markdown) of adult, and
of the site since adult with the demo corpus; interpret text and JSON; diff and impact JSON;
cutpoints JSON; and the exit code of every command (file ``rc``). Commands run from the checkout's
root with relative paths, so two checkouts give the same bytes.

--compare masks only what varies from run to run: timing figures (seconds, rows per second) and
the folder's own path where a command echoes its output file. Everything else, hashes included,
must be identical. Run it before and after every structural change (DEVELOPERS.md).
"""

from __future__ import annotations

import argparse
import contextlib
import difflib
import re
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
ADULT = "rulebooks/adult/rulebook.yaml"
SITE = "rulebooks/example-site/rulebook.yaml"
DEMO = "tools/demo/cases.jsonl"

# (label in rc, arguments, stdout file, stderr file: None to discard, "stdout" to merge)
# OUT in an argument is the snapshot folder.
COMMANDS: list[tuple[str, list[str], str | None, str | None]] = [
    ("batch", ["batch", DEMO, "OUT/batch.csv"], "batch.stdout", "batch.stderr"),
    ("batchtrace", ["batch", DEMO, "OUT/batch_full.jsonl", "--full-json"], None, None),
    ("verify", ["verify", "--json", "--no-cohorts"], "verify.json", "verify.stderr"),
    ("verify site", ["verify", SITE, "--json", "--no-cohorts"], "verify_site.json", None),
    ("doc", ["document", ADULT, "--out", "OUT/doc", "--no-cohorts"], None, None),
    (
        "docsite",
        ["document", SITE, "--since", ADULT, "--corpus", DEMO, "--out", "OUT/docsite", "--no-cohorts"],
        None,
        None,
    ),
    ("interpret", ["interpret", DEMO], "interpret.txt", "stdout"),
    ("interpretjson", ["interpret", DEMO, "--json"], "interpret.json", "stdout"),
    ("diff", ["diff", ADULT, SITE, "--format", "json"], "diff.json", "stdout"),
    ("impact", ["impact", ADULT, SITE, DEMO, "--format", "json"], "impact.json", "stdout"),
    ("cutpoints", ["cutpoints", "--json"], "cutpoints.json", "stdout"),
]

# Timing figures only: "in 0.0 s (1,611 rows/s)" (batch), "in 0.4 s on 2 worker(s): 36 rows/s"
# (impact text), "seconds": 0.199 and "rows_per_second": 65.5 (impact JSON).
TIMINGS = [
    (re.compile(r"\bin [\d.]+ s \([\d,.]+ rows/s\)"), "in <T> s (<R> rows/s)"),
    (
        re.compile(r"\bin [\d.]+ s on (\d+) worker\(s\): [\d,.]+ rows/s"),
        r"in <T> s on \1 worker(s): <R> rows/s",
    ),
    (re.compile(r'"(seconds|rows_per_second)": [\d.eE+-]+'), r'"\1": <T>'),
]


def gasrules_command(root: Path) -> list[str]:
    """The checkout's own gasrules (its .venv), else this interpreter's."""
    venv = root / ".venv" / "bin" / "gasrules"
    return [str(venv)] if venv.exists() else [sys.executable, "-m", "gasrules"]


def snapshot(out: Path, root: Path, command: list[str]) -> int:
    out = out.resolve()
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    codes = []
    for label, args, stdout, stderr in COMMANDS:
        argv = command + [a.replace("OUT", str(out)) if a.startswith("OUT/") else a for a in args]
        with contextlib.ExitStack() as files:
            so = files.enter_context(open(out / stdout, "wb")) if stdout else subprocess.DEVNULL
            se: Any = subprocess.DEVNULL
            if stderr == "stdout":
                se = subprocess.STDOUT
            elif stderr:
                se = files.enter_context(open(out / stderr, "wb"))
            rc = subprocess.run(argv, cwd=root, stdout=so, stderr=se, check=False).returncode
        codes.append(f"{label} rc={rc}\n")
        print(f"{label}: exit {rc}", file=sys.stderr)
    (out / "rc").write_text("".join(codes), encoding="utf-8")
    return 0


def masked(path: Path, folder: Path) -> list[str]:
    text = path.read_bytes().decode("utf-8", errors="replace")
    for where in {str(folder.resolve()), str(folder)}:  # the folder's own path, where a command echoes it
        text = text.replace(where + "/", "<OUT>/")
    for pattern, repl in TIMINGS:
        text = pattern.sub(repl, text)
    return text.splitlines(keepends=True)


def compare(a: Path, b: Path, limit: int = 60, width: int = 240) -> int:
    files_a = {p.relative_to(a) for p in a.rglob("*") if p.is_file()}
    files_b = {p.relative_to(b) for p in b.rglob("*") if p.is_file()}
    missing = sorted((a, rel) for rel in files_a - files_b) + sorted((b, rel) for rel in files_b - files_a)
    for folder, rel in missing:
        print(f"only in {folder}: {rel}")
    differing = 0
    for rel in sorted(files_a & files_b):
        left, right = masked(a / rel, a), masked(b / rel, b)
        if left == right:
            continue
        differing += 1
        lines = list(difflib.unified_diff(left, right, f"{a.name}/{rel}", f"{b.name}/{rel}", n=1))
        for line in lines[:limit]:  # JSON Lines rows are long: show the start of each
            print(line.rstrip("\n")[:width] + (" ..." if len(line.rstrip("\n")) > width else ""))
        if len(lines) > limit:
            print(f"... {len(lines) - limit} more diff lines in {rel}")
    same = len(files_a & files_b) - differing
    print(f"{same} files identical (timings masked), {differing} differ, {len(missing)} in one folder only")
    return 1 if differing or missing else 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", nargs="?", type=Path, help="Folder to write the snapshot into (emptied first).")
    ap.add_argument(
        "--compare", nargs=2, type=Path, metavar=("BEFORE", "AFTER"), help="Compare two snapshots."
    )
    ap.add_argument("--root", type=Path, default=ROOT, help="Checkout to snapshot (default: this one).")
    ap.add_argument(
        "--gasrules", help="Command to run (default: ROOT/.venv/bin/gasrules, else python -m gasrules)."
    )
    args = ap.parse_args(argv)
    if args.compare:
        return compare(*args.compare)
    if args.out is None:
        ap.error("give an output folder, or --compare BEFORE AFTER")
    root = args.root.resolve()
    command = args.gasrules.split() if args.gasrules else gasrules_command(root)
    return snapshot(args.out, root, command)


if __name__ == "__main__":
    sys.exit(main())
