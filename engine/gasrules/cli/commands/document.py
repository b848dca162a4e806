"""`gasrules document RULEBOOK [--since OLD] [--corpus FILE] [--out DIR]`: the committee's review.

    gasrules document rulebooks/example-site/rulebook.yaml --since old/rulebook.yaml \
        --corpus demo/corpus.csv --out review/

Without --out the Markdown goes to standard output; with it, DIR/<id>-<version>.html (one
self-contained page) and DIR/<id>-<version>.md are written. The review shows the operating
characteristics on the simulated cohorts (cohorts.yaml) unless --no-cohorts. Exit 0, 1 a cohort
file cannot be used, 2 usage, 5 broken rulebook.
"""

from __future__ import annotations

from pathlib import Path

import typer

from gasrules.cli.commands._governance import broken_rulebook
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)


@app.command()
def document(
    rulebook: Path = typer.Argument(..., help="The rulebook (or site overlay) to document."),
    since: Path | None = typer.Option(None, "--since", help="Previous version: add what changed since it."),
    corpus: Path | None = typer.Option(
        None,
        "--corpus",
        help="With --since: replay this corpus (CSV, JSON "
        "Lines, Parquet) under both and add the impact summary.",
    ),
    out: Path | None = typer.Option(None, "--out", help="Directory for the HTML and Markdown files."),
    workers: int = typer.Option(
        1, "--workers", min=1, help="Worker processes for the corpus replay and the cohorts."
    ),
    no_cohorts: bool = typer.Option(False, "--no-cohorts", help="Leave out the simulated cohorts' table."),
) -> None:
    """Render a rulebook for review: parameters with sources and who set them, rules in plain language, changes."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.review_document import build_document, render_html, render_markdown
    from gasrules.tables.readers import TableError
    from gasrules.verification.cohorts import CohortError

    if corpus is not None and since is None:
        typer.echo("error: --corpus needs --since (the impact compares two versions)", err=True)
        raise typer.Exit(exitcodes.USAGE)
    try:
        doc = build_document(rulebook, since=since, corpus=corpus, workers=workers, cohorts=not no_cohorts)
    except CohortError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook)), err=True)
        raise typer.Exit(exitcodes.FAILED) from None
    except RulebookError as exc:
        raise broken_rulebook(exc, str(rulebook)) from None
    except TableError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    if out is None:
        typer.echo(render_markdown(doc), nl=False)
        return
    out.mkdir(parents=True, exist_ok=True)
    stem = f"{doc.identity['id']}-{doc.identity['version']}"
    (out / f"{stem}.html").write_text(render_html(doc), encoding="utf-8")
    (out / f"{stem}.md").write_text(render_markdown(doc), encoding="utf-8")
    typer.echo(f"wrote {out / (stem + '.html')} and {out / (stem + '.md')}")
