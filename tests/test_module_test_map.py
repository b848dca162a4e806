"""DEVELOPERS.md's module-to-test map is the one tools/module_test_map.py derives from the tests' imports."""

from __future__ import annotations

import importlib.util
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _tool():
    spec = importlib.util.spec_from_file_location("module_test_map", ROOT / "tools" / "module_test_map.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_map_in_developers_md_is_current() -> None:
    tool = _tool()
    written = tool.current_block((ROOT / "DEVELOPERS.md").read_text(encoding="utf-8"))
    assert written is not None, "DEVELOPERS.md lost the module-test-map markers"
    assert written == tool.render(tool.build()), (
        "the module-to-test map in DEVELOPERS.md is out of date (a module or a test's imports changed); "
        "regenerate it with: python tools/module_test_map.py --write"
    )


def test_every_module_is_in_the_map_and_imports_resolve() -> None:
    tool = _tool()
    users = tool.build()
    # a module file of the package, and a test reaching it as `from gasrules.x import module`
    assert "gasrules.verification.suite" in users
    assert "test_reference_cases.py" in users["gasrules.verification.suite"]
    assert "test_reference_cases.py" in users["gasrules.evaluation.render"]
