"""`gasrules diff OLD NEW`: semantic diff of two rulebooks, each change classed.

Exit 0 when the version bump covers the change class, 1 when it does not (or goes backwards),
5 when either rulebook cannot be loaded.
"""

from __future__ import annotations

from pathlib import Path

import typer

from gasrules.cli.commands._common import Format, format_option, output_option, report_format, write_report
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

FORMATS = (Format.text, Format.json, Format.markdown)
FORMAT_OPTION = format_option(*FORMATS)
OUTPUT_OPTION = output_option()


@app.command()
def diff(
    old: Path = typer.Argument(..., help="The previous rulebook (or overlay) YAML."),
    new: Path = typer.Argument(..., help="The proposed rulebook (or overlay) YAML."),
    fmt: Format = FORMAT_OPTION,
    output: Path | None = OUTPUT_OPTION,
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

    fmt = report_format(fmt, False, FORMATS, "diff")
    try:
        result = diff_paths(old, new, releases)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, ""), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    except ValueError as exc:  # a version that is not MAJOR.MINOR.PATCH
        typer.echo(f"gasrules diff: {exc}", err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    write_report(RENDERERS[fmt.value](result), output)
    if result.version_error:
        typer.echo(f"gasrules diff: {result.version_error}", err=True)
        raise typer.Exit(exitcodes.FAILED)
