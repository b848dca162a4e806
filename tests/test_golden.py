"""Golden snapshots of the renderers: what a reader sees, byte for byte.

Each item runs one `gasrules` command on the shipped rulebooks and the demo cases
(tools/demo/cases.jsonl), from the repository root with relative paths, and compares its output
with a file of tests/golden/. A difference fails with a unified diff. After an intended change of
wording or layout, regenerate and say why in the commit message:

    python -m pytest tests/test_golden.py --update-golden

Only timing figures are masked (the replay's "N rows in X s ...: Y rows/s" line); everything else,
hashes and versions included, is compared as it is. The cohort tables are left out (--no-cohorts):
they take about half a minute per run and are checked by the cohort tests.
"""

from __future__ import annotations

import difflib
import re
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
GOLDEN = Path(__file__).resolve().parent / "golden"
ADULT = "rulebooks/adult/rulebook.yaml"
SITE = "rulebooks/example-site/rulebook.yaml"
DEMO = "tools/demo/cases.jsonl"
# "13 rows in 0.4 s on 1 worker(s): 36 rows/s": the time and the rate vary from run to run.
TIMING = re.compile(r"(\d[\d,]* rows in )[\d.]+ s( on \d+ worker\(s\): )[\d,.]+( rows/s)")


def mask(text: str) -> str:
    return TIMING.sub(r"\1<T> s\2<R>\3", text)


def gasrules(*args: str) -> str:
    """stdout of one command, run from the repository root; any exit code but 0 fails."""
    run = subprocess.run(
        [sys.executable, "-m", "gasrules", *args], cwd=ROOT, capture_output=True, text=True, check=False
    )
    assert run.returncode == 0, f"gasrules {' '.join(args)} exited {run.returncode}:\n{run.stderr}"
    return run.stdout


_DOCUMENTS: dict[tuple[str, ...], dict[str, str]] = {}


def document(tmp: Path, *args: str) -> dict[str, str]:
    """The review document's Markdown and HTML, by suffix (rendered once for both files)."""
    if args not in _DOCUMENTS:
        gasrules("document", *args, "--out", str(tmp), "--no-cohorts")
        _DOCUMENTS[args] = {p.suffix: p.read_text(encoding="utf-8") for p in sorted(tmp.iterdir())}
    return _DOCUMENTS[args]


def impact(fmt: str) -> str:
    return gasrules("impact", ADULT, SITE, DEMO, "--format", fmt, "--workers", "1", "--no-cohorts")


# golden file -> how to produce it (given a fresh temporary folder)
OUTPUTS: dict[str, Callable[[Path], str]] = {
    "interpret.txt": lambda tmp: gasrules("interpret", DEMO),
    "document-adult.md": lambda tmp: document(tmp, ADULT)[".md"],
    "document-adult.html": lambda tmp: document(tmp, ADULT)[".html"],
    "document-site-since-adult.md": lambda tmp: document(tmp, SITE, "--since", ADULT, "--corpus", DEMO)[
        ".md"
    ],
    "document-site-since-adult.html": lambda tmp: document(tmp, SITE, "--since", ADULT, "--corpus", DEMO)[
        ".html"
    ],
    "diff.txt": lambda tmp: gasrules("diff", ADULT, SITE),
    "diff.md": lambda tmp: gasrules("diff", ADULT, SITE, "--format", "markdown"),
    "impact.txt": lambda tmp: impact("text"),
    "impact.html": lambda tmp: impact("html"),
}


@pytest.mark.parametrize("name", list(OUTPUTS))
def test_golden(name: str, tmp_path: Path, request: pytest.FixtureRequest) -> None:
    got = mask(OUTPUTS[name](tmp_path))
    path = GOLDEN / name
    if request.config.getoption("--update-golden"):
        path.write_text(got, encoding="utf-8", newline="")
        return
    assert path.exists(), f"no golden file {path.relative_to(ROOT)}: run pytest with --update-golden"
    want = path.read_bytes().decode("utf-8")
    if got != want:
        diff = difflib.unified_diff(
            want.splitlines(keepends=True),
            got.splitlines(keepends=True),
            f"tests/golden/{name}",
            "now",
            n=2,
        )
        lines = list(diff)
        shown = "".join(lines[:200]) + (
            f"\n... {len(lines) - 200} more diff lines" if len(lines) > 200 else ""
        )
        pytest.fail(
            f"{name} differs from its golden file (regenerate with --update-golden only for an intended "
            f"change, and state why in the commit):\n{shown}",
            pytrace=False,
        )
