"""`gasrules check RULEBOOK`: every problem in a rulebook, with file:line:column."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)


@app.command()
def check(
    rulebook: Path | None = typer.Argument(None, help="Rulebook YAML (default: the shipped adult rulebook)."),
    as_json: bool = typer.Option(False, "--json", help="Print problems as JSON."),
    strict: bool = typer.Option(False, "--strict", help="Treat warnings as errors."),
) -> None:
    """Load, validate and lint a rulebook. Errors, then warnings, sorted by file and line."""
    from gasrules.core.resources import default_rulebook_path
    from gasrules.evaluation.render import render_problems
    from gasrules.rulebook.build import check_path

    path = rulebook or default_rulebook_path()
    problems = check_path(path)
    if as_json:
        typer.echo(
            json.dumps(
                [
                    {
                        "code": p.code,
                        "message": p.message,
                        "file": p.location.file,
                        "line": p.location.line,
                        "column": p.location.col,
                        "path": p.location.path,
                        "expected": p.expected,
                        "severity": "warning" if p.is_warning else "error",
                    }
                    for p in problems
                ],
                indent=2,
            )
        )
    else:
        typer.echo(render_problems(problems, str(path)))
    errors = [p for p in problems if not p.is_warning]
    if errors or (strict and problems):
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK)
