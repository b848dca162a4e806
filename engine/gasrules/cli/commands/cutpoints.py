"""`gasrules cutpoints RULEBOOK`: every numeric threshold of every condition."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)


@app.command()
def cutpoints(
    rulebook: Path | None = typer.Argument(None, help="Rulebook YAML (default: shipped)."),
    as_json: bool = typer.Option(False, "--json", help="Print as JSON."),
) -> None:
    """List every cut-point: the quantity compared, the operator, the threshold and where it comes from."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.rulebook.build import load_rulebook
    from gasrules.rulebook.compiler import list_cutpoints

    try:
        rb = load_rulebook(rulebook)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook)), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK)
    rows = list_cutpoints(rb)
    if as_json:
        typer.echo(json.dumps(rows, indent=2))
        return
    for r in rows:
        value = "" if r["value"] is None else f" = {r['value']:g}"
        typer.echo(
            f"{r['owner']:<45} {r['quantity']} {r['op']} {r['threshold']}{value}  ({r['threshold_kind']}, {r['location']})"
        )
