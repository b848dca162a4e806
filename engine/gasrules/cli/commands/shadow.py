"""`gasrules shadow run|report`: a candidate rulebook beside the active one.

    gasrules shadow run cases.jsonl --candidate new/rulebook.yaml --log disagreements.jsonl
    gasrules shadow report disagreements.jsonl

run prints only the active rulebook's results (strict mode and suspensions apply to it, never to
the candidate) and records every case where the candidate concludes differently. Exit 0 (also
with disagreements: they are for review), 2 usage, 5 broken rulebook, 6 refused in strict mode.
"""

from __future__ import annotations

import json
from pathlib import Path

import typer

from gasrules.cli.commands._common import Format, format_option, json_alias, readable, report_format
from gasrules.cli.commands._governance import SETTINGS_HELP, broken_rulebook, site_settings
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False, help="Run a candidate rulebook in the shadow of the active one.")

FORMATS = (Format.text, Format.json)
FORMAT_OPTION = format_option(*FORMATS)


@app.command()
def run(
    cases: Path = typer.Argument(
        ..., help="Cases: CSV, JSON Lines or Parquet (columns named like the inputs); - for standard input."
    ),
    candidate: Path | None = typer.Option(
        None, "--candidate", help="Candidate rulebook (or shadow.rulebook)."
    ),
    rulebook: Path | None = typer.Option(
        None, "--rulebook", "-r", help="Active rulebook (default: settings, else the shipped adult rulebook)."
    ),
    log: Path | None = typer.Option(None, "--log", help="Disagreement log (JSON Lines; or shadow.log)."),
    settings_file: Path | None = typer.Option(None, "--settings", help=SETTINGS_HELP),
    strict: bool | None = typer.Option(
        None, "--strict/--no-strict", help="Strict mode for the active rulebook."
    ),
    fmt: Format = FORMAT_OPTION,
    input_format: str | None = typer.Option(
        None,
        "--input-format",
        help="csv, jsonl or parquet (default: by suffix; on standard input by content).",
    ),
    as_json: bool = json_alias(),
) -> None:
    """Interpret with the active rulebook and a candidate; show the active results (json: JSON
    Lines); record disagreements."""
    as_json = report_format(fmt, as_json, FORMATS, "shadow run") is Format.json
    from gasrules.core.errors import RulebookError
    from gasrules.governance.runtime import Runtime, RuntimeRefusal
    from gasrules.tables.readers import TableError, analytes_of, open_table, rejected_result

    settings = site_settings(settings_file, shadow_rulebook=candidate, shadow_log=log, strict=strict)
    if settings.shadow_rulebook is None:
        typer.echo(
            "error: no candidate: give --candidate, GASRULES_SHADOW_RULEBOOK or shadow.rulebook", err=True
        )
        raise typer.Exit(exitcodes.USAGE)
    try:
        rt = Runtime.from_settings(settings, rulebook)
    except RulebookError as exc:
        raise broken_rulebook(exc, str(rulebook or settings.rulebook or "rulebook")) from None
    except RuntimeRefusal as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.REFUSED) from None
    rows = unreadable = 0
    try:
        with (
            rt,
            readable(cases, input_format) as source,
            open_table(source, analytes_of(rt.rulebook), fmt=input_format) as table,
        ):
            for row in table:
                rows += 1
                if row.errors:
                    unreadable += 1
                    result = rejected_result(rt.rulebook, row)
                    rt.record(row.case, result)
                else:
                    result = rt.interpret(row.case, trace=False)
                if as_json:
                    typer.echo(json.dumps(result, ensure_ascii=False))
                else:
                    typer.echo(
                        f"{result.get('case_id') or row.where}\t{result['status']}\t{result['headline']}"
                    )
            disagreements = rt.disagreements
    except TableError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    where = f" recorded in {settings.shadow_log}" if settings.shadow_log else " (no --log: not recorded)"
    typer.echo(
        f"shadow: {rows} case(s), {unreadable} unreadable, {disagreements} disagreement(s) with candidate "
        f"{settings.shadow_rulebook}{where}",
        err=True,
    )
    from gasrules.governance.settings import too_many_unreadable

    too_many = too_many_unreadable(unreadable, rows, settings)
    if too_many:
        typer.echo(f"error: {too_many}", err=True)
        raise typer.Exit(exitcodes.REJECTED)


@app.command()
def report(
    log: Path = typer.Argument(
        ..., help="Disagreement log written by 'shadow run' or a runtime; - for standard input."
    ),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
) -> None:
    """Summarise a disagreement log: what differs, disorder transitions with examples, rulebook pairs."""
    from gasrules.governance.shadow import render_summary, summarize

    as_json = report_format(fmt, as_json, FORMATS, "shadow report") is Format.json
    if str(log) != "-" and not log.exists():
        typer.echo(f"error: {log} not found", err=True)
        raise typer.Exit(exitcodes.USAGE)
    with readable(log, "jsonl") as path:
        summary = summarize(path)
    if path != log:
        summary.path = "<stdin>"
    typer.echo(json.dumps(summary.as_dict(), indent=2) if as_json else render_summary(summary))
