"""`gasrules document RULEBOOK [--since OLD] [--corpus FILE] [--output DIR]`: the committee's review.

    gasrules document rulebooks/example-site/rulebook.yaml --since old/rulebook.yaml \
        --corpus demo/corpus.csv --output review/

Without --output (or with ``-o -``) the review goes to standard output, as Markdown or, with
``--format html``, as one HTML page; with a directory, DIR/<id>-<version>.html (one
self-contained page) and DIR/<id>-<version>.md are written (only the one of --format when it is
given). --out is the older spelling of --output. The review shows the operating
characteristics on the simulated cohorts (cohorts.yaml) unless --no-cohorts. Exit 0, 1 a cohort
file cannot be used, 2 usage, 5 broken rulebook.
"""

from __future__ import annotations

from pathlib import Path

import typer

from gasrules.cli.commands._common import Format, readable
from gasrules.cli.commands._governance import broken_rulebook
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

FORMATS = (Format.markdown, Format.html)


@app.command()
def document(
    rulebook: Path = typer.Argument(..., help="The rulebook (or site overlay) to document."),
    since: Path | None = typer.Option(None, "--since", help="Previous version: add what changed since it."),
    corpus: Path | None = typer.Option(
        None,
        "--corpus",
        help="With --since: replay this corpus (CSV, JSON "
        "Lines, Parquet; - for standard input) under both and add the impact summary.",
    ),
    output: Path | None = typer.Option(
        None, "--output", "-o", help="Directory for the HTML and Markdown files (- for standard output)."
    ),
    fmt: Format | None = typer.Option(
        None,
        "--format",
        "-f",
        metavar="markdown|html",
        help="markdown or html: what goes to standard output (default markdown), or the only file written.",
    ),
    out: Path | None = typer.Option(None, "--out", hidden=True, help="Same as --output."),
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

    if fmt is not None and fmt not in FORMATS:
        raise typer.BadParameter(
            f"'{fmt.value}' is not a format of document; accepted: markdown, html", param_hint="'--format'"
        )
    if corpus is not None and since is None:
        typer.echo("error: --corpus needs --since (the impact compares two versions)", err=True)
        raise typer.Exit(exitcodes.USAGE)
    out = output or out
    try:
        if corpus is None:
            doc = build_document(rulebook, since=since, corpus=None, workers=workers, cohorts=not no_cohorts)
        else:
            with readable(corpus, None) as source:
                doc = build_document(
                    rulebook, since=since, corpus=source, workers=workers, cohorts=not no_cohorts
                )
            if doc.impact is not None and source != corpus:
                doc.impact["corpus"] = "<stdin>"
    except CohortError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook)), err=True)
        raise typer.Exit(exitcodes.FAILED) from None
    except RulebookError as exc:
        raise broken_rulebook(exc, str(rulebook)) from None
    except TableError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    if out is None or str(out) == "-":
        typer.echo(render_html(doc) if fmt is Format.html else render_markdown(doc), nl=False)
        return
    out.mkdir(parents=True, exist_ok=True)
    stem = f"{doc.identity['id']}-{doc.identity['version']}"
    written = []
    for kind, suffix, render in (
        (Format.html, "html", render_html),
        (Format.markdown, "md", render_markdown),
    ):
        if fmt is None or fmt is kind:
            (out / f"{stem}.{suffix}").write_text(render(doc), encoding="utf-8")
            written.append(str(out / f"{stem}.{suffix}"))
    typer.echo(f"wrote {' and '.join(written)}")
