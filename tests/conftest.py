"""Shared fixtures for the engine tests.

* The whole test session compiles rulebooks into its own cache directory
  (``GASRULES_CACHE_DIR``), never into the user's ~/.cache.
* ``shipped_rb`` / ``site_rb``: the shipped adult rulebook and its example site overlay, loaded
  once per session.
* ``mini_path`` / ``mini_rb``: the small real rulebook under tests/data/mini, loaded once.
* ``cache_dir``: a fresh, empty cache directory for one test (cache hit/miss tests).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Iterator

import pytest

ROOT = Path(__file__).resolve().parent.parent
SHIPPED = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
EXAMPLE_SITE = ROOT / "rulebooks" / "example-site" / "rulebook.yaml"
MINI = Path(__file__).resolve().parent / "data" / "mini" / "rulebook.yaml"
MINI_OVERLAYS = MINI.parent / "overlays"


@pytest.fixture(scope="session", autouse=True)
def _session_cache_dir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """Every compiled rulebook of this session goes to a private cache directory."""
    path = tmp_path_factory.mktemp("gasrules-cache")
    old = os.environ.get("GASRULES_CACHE_DIR")
    os.environ["GASRULES_CACHE_DIR"] = str(path)
    yield path
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
    from gasrules.schema import validate_instance

    return lambda result: validate_instance(result, "result.schema.json")
