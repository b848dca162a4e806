"""`gasrules impact OLD NEW CORPUS`: replay a corpus under two rulebooks; report what would change.

Exit 0 when the replay completed (rejected rows are counted and listed, never a failure by
themselves), 1 when an expected-transitions file is given and a transition is not in it (or
is above its ceiling), 2 when the corpus, the expected-transitions file or a cohort file cannot be used,
4 when more than limits.corpus_unreadable_percent (default 1 %) of the corpus rows could not be
read, 5 when either rulebook cannot be loaded.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import typer

from gasrules.cli.commands._common import (
    Format,
    format_option,
    output_option,
    readable,
    report_format,
    write_report,
)
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

FORMATS = (Format.text, Format.json, Format.html)
FORMAT_OPTION = format_option(*FORMATS)
OUTPUT_OPTION = output_option()


def _default_workers() -> int:
    return max(1, min(2, os.cpu_count() or 1))


def _with_cohorts(
    old: Path, new: Path, rb_old: object, rb_new: object, fmt: str, text: str, workers: int
) -> str:
    """The report with the simulated cohorts' figures under both rulebooks, side by side."""
    from gasrules.evaluation.render import render_problems
    from gasrules.verification import cohort_table as T
    from gasrules.verification.cohorts import CohortError

    try:
        rows = T.compare(T.table_for(old, rb_old, workers=workers), T.table_for(new, rb_new, workers=workers))
    except CohortError as exc:
        typer.echo(render_problems(exc.problems, ""), err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    return T.append_comparison(fmt, text, rows)


@app.command()
def impact(
    old: Path = typer.Argument(..., help="The current rulebook (or overlay) YAML."),
    new: Path = typer.Argument(..., help="The proposed rulebook (or overlay) YAML."),
    corpus: Path = typer.Argument(
        ..., help="Past cases: CSV, JSON Lines or Parquet (file or directory; - for standard input)."
    ),
    expected: Path | None = typer.Option(
        None, "--expected", "-e", help="YAML/JSON file of expected transitions; others exit 1."
    ),
    fmt: Format = FORMAT_OPTION,
    output: Path | None = OUTPUT_OPTION,
    workers: int = typer.Option(_default_workers(), "--workers", "-w", min=1, help="Worker processes."),
    chunk_size: int = typer.Option(250, "--chunk-size", min=1, help="Rows per chunk sent to a worker."),
    chunk: int | None = typer.Option(None, "--chunk", min=1, hidden=True, help="Same as --chunk-size."),
    mapping: Path | None = typer.Option(None, "--mapping", help="Column mapping file (as for batch)."),
    no_cohorts: bool = typer.Option(
        False, "--no-cohorts", help="Leave out the simulated cohorts' figures under both rulebooks."
    ),
    input_format: str | None = typer.Option(
        None,
        "--input-format",
        help="csv, jsonl or parquet (default: by suffix; on standard input by content).",
    ),
    progress: bool | None = typer.Option(
        None, "--progress/--no-progress", help="Progress bar (default: only on a terminal)."
    ),
) -> None:
    """Interpret every case of the corpus under both rulebooks and report the cases whose
    disorders or findings change, the transitions between disorder sets with examples, the
    rules responsible, and the cases now close to a changed threshold."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.impact import RENDERERS, ExpectedError, load_expected, replay
    from gasrules.integration.batch import Progress
    from gasrules.rulebook.build import load_rulebook
    from gasrules.tables.readers import TableError, load_mapping

    fmt = report_format(fmt, False, FORMATS, "impact")
    try:
        rb_old, rb_new = load_rulebook(old), load_rulebook(new)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, ""), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    bar = Progress(sys.stderr, lambda: 0.0, progress)
    try:
        wanted = load_expected(expected) if expected is not None else None
        cols = load_mapping(mapping) if mapping is not None else None

        def on_progress(rows: int, share: float) -> None:
            bar.share = lambda: share
            bar.update(rows)

        with readable(corpus, input_format) as source:
            report = replay(
                rb_old,
                rb_new,
                source,
                workers=workers,
                chunk_size=chunk or chunk_size,
                mapping=cols,
                fmt=input_format,
                expected=wanted,
                expected_file=str(expected or ""),
                on_progress=on_progress,
            )
        if source != corpus:
            report.corpus = "<stdin>"
        bar.finish(report.rows)
    except (ExpectedError, TableError) as exc:
        bar.close()  # before the message, so the bar's line is ended
        typer.echo(f"gasrules impact: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    finally:
        bar.close()
    text = RENDERERS[fmt.value](report)
    if not no_cohorts:
        text = _with_cohorts(old, new, rb_old, rb_new, fmt.value, text, workers)
    write_report(text, output)
    if report.unexpected:
        typer.echo(
            f"gasrules impact: {len(report.unexpected)} unexpected transition(s), "
            f"{sum(t.count for t in report.unexpected):,} case(s)",
            err=True,
        )
        raise typer.Exit(exitcodes.FAILED)
    from gasrules.governance.settings import SettingsError, load_settings, too_many_unreadable

    try:
        too_many = too_many_unreadable(report.unreadable, report.rows, load_settings())
    except SettingsError as exc:
        typer.echo(f"gasrules impact: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    if too_many:
        typer.echo(f"gasrules impact: {too_many}", err=True)
        raise typer.Exit(exitcodes.REJECTED)
