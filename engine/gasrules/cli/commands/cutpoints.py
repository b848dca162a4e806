"""`gasrules cutpoints RULEBOOK`: every numeric threshold of every condition."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from gasrules.cli.commands._common import Format, format_option, json_alias, report_format
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

FORMATS = (Format.text, Format.json)
FORMAT_OPTION = format_option(*FORMATS)


@app.command()
def cutpoints(
    rulebook: Path | None = typer.Argument(None, help="Rulebook YAML (default: shipped)."),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
) -> None:
    """List every cut-point: the quantity compared, the operator, the threshold and where it comes from."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.rulebook.build import load_rulebook
    from gasrules.rulebook.compiler import list_cutpoints

    fmt = report_format(fmt, as_json, FORMATS, "cutpoints")
    try:
        rb = load_rulebook(rulebook)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook)), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    rows = list_cutpoints(rb)
    if fmt is Format.json:
        typer.echo(json.dumps(rows, indent=2))
        return
    for r in rows:
        value = "" if r["value"] is None else f" = {r['value']:g}"
        typer.echo(
            f"{r['owner']:<45} {r['quantity']} {r['op']} {r['threshold']}{value}  ({r['threshold_kind']}, {r['location']})"
        )
