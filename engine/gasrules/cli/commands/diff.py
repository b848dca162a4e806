"""`gasrules diff OLD NEW`: semantic diff of two rulebooks, each change classed.

Exit 0 when the version bump covers the change class, 1 when it does not (or goes backwards),
5 when either rulebook cannot be loaded.
"""

from __future__ import annotations

from enum import Enum
from pathlib import Path

import typer

from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)


class Format(str, Enum):
    text = "text"
    json = "json"
    markdown = "markdown"


@app.command()
def diff(
    old: Path = typer.Argument(..., help="The previous rulebook (or overlay) YAML."),
    new: Path = typer.Argument(..., help="The proposed rulebook (or overlay) YAML."),
    fmt: Format = typer.Option(Format.text, "--format", "-f", help="text, json or markdown."),
    output: Path | None = typer.Option(None, "--output", "-o", help="Write the report to this file."),
    releases: Path | None = typer.Option(
        None, "--releases", help="Release directory: show each side's approvals from its release manifests."
    ),
) -> None:
    """Compare the resolved content of two rulebooks by stable ids and class every change
    (patch: tuning inside guard rails; minor: additive; major: change of meaning). Fails when
    the version bump is smaller than the change class needs."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.diff import RENDERERS, diff_paths

    try:
        result = diff_paths(old, new, releases)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, ""), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK)
    except ValueError as exc:  # a version that is not MAJOR.MINOR.PATCH
        typer.echo(f"gasrules diff: {exc}", err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK)
    text = RENDERERS[fmt.value](result)
    if output is not None:
        output.write_text(text + "\n", encoding="utf-8")
    else:
        typer.echo(text)
    if result.version_error:
        typer.echo(f"gasrules diff: {result.version_error}", err=True)
        raise typer.Exit(exitcodes.FAILED)
