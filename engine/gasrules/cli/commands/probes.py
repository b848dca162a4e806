"""`gasrules probes OLD NEW`: cases just below, at and just above every changed cut-point."""

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
    fmt: Format = typer.Option(Format.text, "--format", "-f", help="text, json or markdown."),
    output: Path | None = typer.Option(None, "--output", "-o", help="Write the report to this file."),
) -> None:
    """For each numeric threshold whose value changed, interpret generated cases one reporting step
    below, at and above the old and the new cut-point under both rulebooks, and show where the
    conclusion differs. A derived quantity is placed by bisection on one input that feeds it."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.probes import RENDERERS, default_bases, run_probes
    from gasrules.rulebook.build import load_rulebook

    try:
        rb_old, rb_new = load_rulebook(old), load_rulebook(new)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, ""), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK)
    dirs = list(cases) or [
        d for d in dict.fromkeys([old.parent / "cases", new.parent / "cases"]) if d.is_dir()
    ]
    result = run_probes(rb_old, rb_new, default_bases(dirs, generated, seed), only)
    same = rb_old.id == rb_new.id
    names = [rb.version if same else f"{rb.id} {rb.version}" for rb in (rb_old, rb_new)]
    text = RENDERERS[fmt.value](result, names[0], names[1])
    if output is not None:
        output.write_text(text + "\n", encoding="utf-8")
    else:
        typer.echo(text)
