"""`gasrules suspend RULEBOOK --reason TEXT --by NAME [--rule ID] [--lift]`: the kill switch.

    gasrules suspend site.yaml --rule anion_gap.high --reason "analyser recalibration" --by "A. Smith"
    gasrules suspend site.yaml --reason "wrong units in the overlay" --by "A. Smith"   # whole rulebook
    gasrules suspend site.yaml --lift --reason "revalidated after fix" --by "A. Smith"
    gasrules suspend site.yaml --status

The event (who, when, why) is recorded in the release directory's suspension register.
Exit 0 recorded, 1 refused (e.g. not suspended), 2 usage, 5 broken rulebook.
"""

from __future__ import annotations

import json
from pathlib import Path

import typer

from gasrules.cli.commands._common import Format, format_option, json_alias, report_format
from gasrules.cli.commands._governance import SETTINGS_HELP, broken_rulebook, need_release_dir, site_settings
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

FORMATS = (Format.text, Format.json)
FORMAT_OPTION = format_option(*FORMATS)


@app.command()
def suspend(
    rulebook: Path = typer.Argument(..., help="The rulebook whose rule (or which as a whole) is suspended."),
    reason: str = typer.Option(
        "", "--reason", help="Why (at least 10 characters); required unless --status."
    ),
    by: str = typer.Option("", "--by", help="Who decided; required unless --status."),
    rule: str | None = typer.Option(
        None, "--rule", help="Suspend only this rule id (default: the whole rulebook)."
    ),
    lift: bool = typer.Option(False, "--lift", help="Reinstate instead of suspend."),
    status: bool = typer.Option(False, "--status", help="Only show what is suspended now."),
    release_dir: Path | None = typer.Option(
        None, "--release-dir", help="Release directory (suspension register)."
    ),
    archive: Path | None = typer.Option(
        None, "--archive", help="Rulebook archive (default: RELEASE_DIR/archive)."
    ),
    settings_file: Path | None = typer.Option(None, "--settings", help=SETTINGS_HELP),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
) -> None:
    """Suspend or reinstate a rule or a whole rulebook, with a recorded reason."""
    from gasrules.core.errors import RulebookError
    from gasrules.governance.registry import RegistryError
    from gasrules.governance.suspension import SuspensionError, change_suspension, current_state, render_state

    as_json = report_format(fmt, as_json, FORMATS, "suspend") is Format.json
    settings = site_settings(settings_file, release_dir=release_dir, archive_dir=archive)
    target = need_release_dir(settings)
    try:
        if not status:
            event = change_suspension(
                rulebook,
                release_dir=target,
                reason=reason,
                by=by,
                rule=rule,
                lift=lift,
                archive=settings.archive,
            )
            if as_json:
                typer.echo(json.dumps(event, indent=2))
            else:
                what = f"rule {rule}" if rule else "rulebook"
                typer.echo(
                    f"recorded: {event['action']} {what} of {event['rulebook']['id']} "
                    f"{event['rulebook']['version']} by {event['by']} at {event['time']} (event {event['seq']})"
                )
        rb, state = current_state(rulebook, target)
    except RulebookError as exc:
        raise broken_rulebook(exc, str(rulebook)) from None
    except (SuspensionError, RegistryError) as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.FAILED) from None
    if not as_json:
        typer.echo(render_state(rb, state))
