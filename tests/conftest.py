"""Shared fixtures for the engine tests.

* The whole test session compiles rulebooks into its own temporary cache directory
  (``GASRULES_CACHE_DIR``, set at configure time and removed at the end), never into ~/.cache.
* ``shipped_rb`` / ``site_rb``: the shipped adult rulebook and its example site overlay, loaded
  once per session.
* ``mini_path`` / ``mini_rb``: the small real rulebook under tests/data/mini, loaded once.
* ``cache_dir``: a fresh, empty cache directory for one test (cache hit/miss tests).
* ``--update-golden``: rewrite the golden snapshot files of tests/golden/ instead of comparing
  (test_golden.py); a regeneration is committed with its reason stated in the commit message.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parent.parent
SHIPPED = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
EXAMPLE_SITE = ROOT / "rulebooks" / "example-site" / "rulebook.yaml"
MINI = Path(__file__).resolve().parent / "data" / "mini" / "rulebook.yaml"
MINI_OVERLAYS = MINI.parent / "overlays"


_CACHE_DIRS: list[tuple[str | None, str]] = []  # (value before the session, our temporary directory)


def portable(text: str, origin: Path) -> str:
    """A rulebook's text made loadable from another folder: its `bibliography:` path (relative to
    ``origin``, the file the text was read from) becomes absolute."""
    import json
    import re

    def absolute(m: re.Match[str]) -> str:
        return "bibliography: " + json.dumps(str((origin.parent / m.group(1).strip()).resolve()))

    return re.sub(r"^bibliography: ([^\[\n]+)$", absolute, text, flags=re.M)


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption(
        "--update-golden",
        action="store_true",
        default=False,
        help="Rewrite tests/golden/ from the current outputs instead of comparing (state why in the commit).",
    )


def pytest_configure(config: pytest.Config) -> None:
    """Every compiled rulebook of this session goes to a private cache directory, set before
    collection (some test modules load a rulebook at import to build Hypothesis strategies)."""
    ours = tempfile.mkdtemp(prefix="gasrules-test-cache-")
    _CACHE_DIRS.append((os.environ.get("GASRULES_CACHE_DIR"), ours))
    os.environ["GASRULES_CACHE_DIR"] = ours


def pytest_unconfigure(config: pytest.Config) -> None:
    if not _CACHE_DIRS:
        return
    old, ours = _CACHE_DIRS.pop()
    shutil.rmtree(ours, ignore_errors=True)
    if old is None:
        os.environ.pop("GASRULES_CACHE_DIR", None)
    else:
        os.environ["GASRULES_CACHE_DIR"] = old


@pytest.fixture
def cache_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh, empty cache directory for this test only."""
    path = tmp_path / "cache"
    monkeypatch.setenv("GASRULES_CACHE_DIR", str(path))
    return path


@pytest.fixture(scope="session")
def shipped_rb() -> Any:
    import gasrules

    return gasrules.load_rulebook(SHIPPED)


@pytest.fixture(scope="session")
def site_rb() -> Any:
    import gasrules

    return gasrules.load_rulebook(EXAMPLE_SITE)


@pytest.fixture(scope="session")
def mini_path() -> Path:
    return MINI


@pytest.fixture(scope="session")
def mini_rb() -> Any:
    import gasrules

    return gasrules.load_rulebook(MINI)


@pytest.fixture(scope="session")
def result_validator() -> Any:
    """A function returning the list of schema violations of a result (empty when valid)."""
    from gasrules.rulebook.schema import validate_instance

    return lambda result: validate_instance(result, "result.schema.json")


@pytest.fixture(autouse=True)
def _no_site_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    """Commands read GASRULES_* settings; a developer's own must not leak into any test
    (the cache directory set above is the suite's own)."""
    for name in [n for n in os.environ if n.startswith("GASRULES_") and n != "GASRULES_CACHE_DIR"]:
        monkeypatch.delenv(name)


@pytest.fixture
def tuned_release_rulebook(tmp_path: Path) -> Path:
    """The change-control test rulebook (tests/data/release) with ph_low moved from 7.35 to 7.30
    (inside its guard rails), version 1.0.1."""
    target = tmp_path / "tuned"
    shutil.copytree(Path(__file__).resolve().parent / "data" / "release", target)
    path = target / "rulebook.yaml"
    text = path.read_text(encoding="utf-8")
    path.write_text(
        text.replace("    value: 7.35\n", "    value: 7.30\n").replace("version: 1.0.0", "version: 1.0.1"),
        encoding="utf-8",
    )
    return path
