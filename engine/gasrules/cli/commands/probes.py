"""`gasrules probes OLD NEW`: cases just below, at and just above every changed cut-point."""

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
def probes(
    old: Path = typer.Argument(..., help="The previous rulebook (or overlay) YAML."),
    new: Path = typer.Argument(..., help="The proposed rulebook (or overlay) YAML."),
    only: list[str] = typer.Option(
        [], "--only", help="Only cut-points of this rule id or parameter (repeatable)."
    ),
    cases: list[Path] = typer.Option(
        [],
        "--cases",
        help="Directory of reference case files to draw base cases "
        "from (default: the cases/ folders beside both rulebooks).",
    ),
    generated: int = typer.Option(
        300, "--generated", min=0, help="Seeded synthetic base cases tried after them."
    ),
    seed: int = typer.Option(11, "--seed", help="Seed of the synthetic base cases."),
    fmt: Format = FORMAT_OPTION,
    output: Path | None = OUTPUT_OPTION,
) -> None:
    """For each numeric threshold whose value changed, interpret generated cases one reporting step
    below, at and above the old and the new cut-point under both rulebooks, and show where the
    conclusion differs. A derived quantity is placed by bisection on one input that feeds it."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.probes import RENDERERS, default_bases, run_probes
    from gasrules.rulebook.build import load_rulebook

    fmt = report_format(fmt, False, FORMATS, "probes")
    try:
        rb_old, rb_new = load_rulebook(old), load_rulebook(new)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, ""), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    dirs = list(cases) or [
        d for d in dict.fromkeys([old.parent / "cases", new.parent / "cases"]) if d.is_dir()
    ]
    result = run_probes(rb_old, rb_new, default_bases(dirs, generated, seed), only)
    same = rb_old.id == rb_new.id
    names = [rb.version if same else f"{rb.id} {rb.version}" for rb in (rb_old, rb_new)]
    write_report(RENDERERS[fmt.value](result, names[0], names[1]), output)
