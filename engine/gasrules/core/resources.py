"""Where the shipped rulebooks and schemas are, installed or in a source checkout."""

from __future__ import annotations

from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent.parent  # engine/gasrules (or site-packages/gasrules)


def data_dir(kind: str) -> Path:
    """``kind`` is 'rulebooks' or 'schemas'. Installed wheels carry them in gasrules/_data."""
    packaged = _PACKAGE / "_data" / kind
    if packaged.is_dir():
        return packaged
    return _PACKAGE.parent.parent / kind


def default_rulebook_path() -> Path:
    return data_dir("rulebooks") / "adult" / "rulebook.yaml"


def schema_path(name: str) -> Path:
    return data_dir("schemas") / name
