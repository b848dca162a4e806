"""Helpers shared by the change-control commands (release, suspend, audit, shadow, document):
settings from --settings / GASRULES_* / flags, and the release directory they need."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import typer

from gasrules.core import exitcodes

SETTINGS_HELP = (
    "Settings YAML (strict mode, release directory, decision log, shadow); GASRULES_* variables override it."
)


def site_settings(settings_file: Path | None, **overrides: Any) -> Any:
    """The settings, or exit 2 with the setting named."""
    from gasrules.governance.settings import SettingsError, load_settings

    try:
        return load_settings(settings_file, **overrides)
    except SettingsError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None


def need_release_dir(settings: Any) -> Path:
    if settings.release_dir is None:
        typer.echo(
            "error: no release directory: give --release-dir, set GASRULES_RELEASE_DIR, or releases.dir in "
            "the --settings file",
            err=True,
        )
        raise typer.Exit(exitcodes.USAGE)
    return Path(settings.release_dir)


def broken_rulebook(exc: Any, name: str) -> typer.Exit:
    from gasrules.evaluation.render import render_problems

    typer.echo(render_problems(exc.problems, name), err=True)
    return typer.Exit(exitcodes.BROKEN_RULEBOOK)


@contextmanager
def startup_errors(command: str, usage: tuple[type[BaseException], ...] = ()) -> Iterator[None]:
    """Errors while a long-running command (serve, listen) starts: a broken rulebook (exit 5, every
    problem printed), a refusal by the runtime (exit 6), a settings error or one of ``usage``
    (exit 2), each one line naming the command."""
    from gasrules.core.errors import RulebookError
    from gasrules.governance.runtime import RuntimeRefusal
    from gasrules.governance.settings import SettingsError

    try:
        yield
    except RulebookError as exc:
        for problem in getattr(exc, "problems", ()):
            typer.echo(problem.render(), err=True)
        typer.echo(f"gasrules {command}: the rulebook did not load: {exc}", err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    except RuntimeRefusal as exc:
        typer.echo(f"gasrules {command}: {exc}", err=True)
        raise typer.Exit(exitcodes.REFUSED) from None
    except (SettingsError, *usage) as exc:
        typer.echo(f"gasrules {command}: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
