"""Every exception class the package defines derives from the engine's root error, so one
``except EngineError`` catches anything the engine raises on purpose. Warning categories are
not errors and are left out."""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import gasrules
from gasrules.core.errors import EngineError


def _exception_classes() -> list[type[BaseException]]:
    found: list[type[BaseException]] = []
    for info in pkgutil.walk_packages(gasrules.__path__, "gasrules."):
        if info.name.rsplit(".", 1)[-1] == "__main__":  # runs the command line when imported
            continue
        module = importlib.import_module(info.name)
        for value in vars(module).values():
            if (
                inspect.isclass(value)
                and issubclass(value, BaseException)
                and not issubclass(value, Warning)
                and value.__module__ == module.__name__
            ):
                found.append(value)
    return found


def test_the_walk_finds_the_package_errors() -> None:
    names = {c.__name__ for c in _exception_classes()}
    assert {"EngineError", "RulebookError", "TableError", "HttpError", "ForwardError"} <= names


def test_every_exception_class_derives_from_engine_error() -> None:
    strays = sorted(
        f"{c.__module__}.{c.__qualname__}" for c in _exception_classes() if not issubclass(c, EngineError)
    )
    assert strays == []


def test_standard_bases_are_kept_where_callers_catch_them() -> None:
    from gasrules.governance.impact import ExpectedError
    from gasrules.service.cdsauth import ConfigError
    from gasrules.tables.csvread import CsvHeaderError
    from gasrules.tables.pool import PoolError
    from gasrules.tables.readers import TableError

    for cls in (TableError, CsvHeaderError, ExpectedError, ConfigError):
        assert issubclass(cls, ValueError), cls
    assert issubclass(PoolError, RuntimeError)
