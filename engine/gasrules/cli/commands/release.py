"""`gasrules release RULEBOOK --approver NAME --role ROLE`: approve a version through the gate.

    gasrules release rulebooks/site/rulebook.yaml --author "J. Doe" \
        --approver "A. Smith" --role "clinical lead" --release-dir /srv/gasrules/releases

Exit 0 released (manifest written, rulebook archived), 1 refused (every reason listed),
2 usage, 5 broken rulebook.
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
def release(
    rulebook: Path = typer.Argument(..., help="The rulebook (or site overlay) to release."),
    approver: list[str] = typer.Option(
        [], "--approver", help="Approver's name; repeat for several, each with --role."
    ),
    role: list[str] = typer.Option([], "--role", help="Approver's role, in the order of --approver."),
    author: list[str] = typer.Option(
        [], "--author", help="Author of the change (default: owners with an author role)."
    ),
    previous: Path | None = typer.Option(
        None,
        "--previous",
        help="Manifest of the release this one replaces "
        "(default: the latest release of the same rulebook id).",
    ),
    release_dir: Path | None = typer.Option(
        None, "--release-dir", help="Release directory (manifests, suspensions)."
    ),
    archive: Path | None = typer.Option(
        None, "--archive", help="Rulebook archive (default: RELEASE_DIR/archive)."
    ),
    settings_file: Path | None = typer.Option(None, "--settings", help=SETTINGS_HELP),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
    diff_md: Path | None = typer.Option(
        None,
        "--diff-markdown",
        help="Also write the change against the previous release as Markdown to this file.",
    ),
) -> None:
    """Release a rulebook version: suite passes with full rule coverage, version bump fits the change,
    an author cannot approve their own change; writes the manifest and archives the resolved rulebook."""
    from gasrules.core.errors import RulebookError
    from gasrules.governance.release import Approver, ReleaseRefused, render_outcome, render_refusal
    from gasrules.governance.release import release as do_release

    as_json = report_format(fmt, as_json, FORMATS, "release") is Format.json
    if len(approver) != len(role):
        typer.echo(
            f"error: {len(approver)} --approver and {len(role)} --role given; give one --role per --approver",
            err=True,
        )
        raise typer.Exit(exitcodes.USAGE)
    settings = site_settings(settings_file, release_dir=release_dir, archive_dir=archive)
    target = need_release_dir(settings)
    roster = None
    if settings.roster is not None:
        from gasrules.governance.people import RosterError, load_roster

        try:
            roster = load_roster(settings.roster)
        except RosterError as exc:
            typer.echo(f"gasrules: {exc}", err=True)
            raise typer.Exit(exitcodes.USAGE) from None
    try:
        outcome = do_release(
            rulebook,
            release_dir=target,
            approvers=[Approver(n, r) for n, r in zip(approver, role, strict=True)],
            authors=author,
            previous=previous,
            archive=settings.archive,
            roster=roster,
        )
    except RulebookError as exc:
        raise broken_rulebook(exc, str(rulebook)) from None
    except ReleaseRefused as exc:
        if as_json:
            typer.echo(
                json.dumps(
                    {"released": False, "reasons": [{"code": c, "message": m} for c, m in exc.reasons]},
                    indent=2,
                )
            )
        else:
            typer.echo(render_refusal(exc), err=True)
        raise typer.Exit(exitcodes.FAILED) from None
    if diff_md is not None and outcome.diff_markdown:
        diff_md.write_text(outcome.diff_markdown + "\n", encoding="utf-8")
    typer.echo(
        json.dumps(
            {"released": True, "manifest_file": str(outcome.manifest_path), **outcome.manifest}, indent=2
        )
        if as_json
        else render_outcome(outcome)
    )
