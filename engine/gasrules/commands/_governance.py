"""Helpers shared by the change-control commands (release, suspend, audit, shadow, document):
settings from --settings / GASRULES_* / flags, and the release directory they need."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Optional

import typer

from .. import exitcodes

SETTINGS_HELP = "Settings YAML (strict mode, release directory, decision log, shadow); GASRULES_* variables override it."


def site_settings(settings_file: Optional[Path], **overrides: Any) -> Any:
    """The settings, or exit 2 with the setting named."""
    from ..settings import SettingsError, load_settings

    try:
        return load_settings(settings_file, **overrides)
    except SettingsError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None


def need_release_dir(settings: Any) -> Path:
    if settings.release_dir is None:
        typer.echo("error: no release directory: give --release-dir, set GASRULES_RELEASE_DIR, or releases.dir in "
                   "the --settings file", err=True)
        raise typer.Exit(exitcodes.USAGE)
    return Path(settings.release_dir)


def broken_rulebook(exc: Any, name: str) -> typer.Exit:
    from ..reporters import render_problems

    typer.echo(render_problems(exc.problems, name), err=True)
    return typer.Exit(exitcodes.BROKEN_RULEBOOK)
