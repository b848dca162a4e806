"""`gasrules check RULEBOOK`: every problem in a rulebook, with file:line:column."""

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
def check(
    rulebook: Path | None = typer.Argument(None, help="Rulebook YAML (default: the shipped adult rulebook)."),
    fmt: Format = FORMAT_OPTION,
    warnings_as_errors: bool = typer.Option(
        False, "--warnings-as-errors", help="Fail (exit 5) on warnings too."
    ),
    as_json: bool = json_alias(),
    strict: bool = typer.Option(False, "--strict", hidden=True, help="Same as --warnings-as-errors."),
) -> None:
    """Load, validate and lint a rulebook. Errors, then warnings, sorted by file and line."""
    from gasrules.core.resources import default_rulebook_path
    from gasrules.evaluation.render import render_problems
    from gasrules.rulebook.build import check_path

    fmt = report_format(fmt, as_json, FORMATS, "check")
    path = rulebook or default_rulebook_path()
    problems = check_path(path)
    if fmt is Format.json:
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
    if errors or ((warnings_as_errors or strict) and problems):
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK)
