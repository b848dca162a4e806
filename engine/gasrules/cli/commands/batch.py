"""`gasrules batch IN [OUT]`: interpret a CSV, JSON Lines or Parquet table row by row.

    gasrules batch gases.csv results.csv --workers 2
    gasrules batch gases.csv results.parquet --mapping lab-columns.yaml --full-json
    gasrules batch warehouse/gases/ warehouse/results/ --dask tcp://scheduler:8786
    gasrules batch gases.parquet results/ --dask-local 2

One result row per input row, in order, errors inline; the output is written to a temporary
file and renamed at the end. The summary (counts by status and by disorder) goes to stderr,
with a progress bar when stderr is a terminal. Exit codes: 0 the run completed and no row was
rejected, 4 the run completed but some rows were rejected (they are in the output; 0 with
--allow-rejected, unless every row was), 2 unusable input, header, mapping or options, 5 broken
rulebook, 6 refused in strict mode.
"""

from __future__ import annotations

import json
import signal
from pathlib import Path
from typing import Any

import typer

from gasrules.cli.commands._common import readable
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)


def _fail(code: int, message: str) -> typer.Exit:
    typer.echo(f"gasrules batch: {message}", err=True)
    return typer.Exit(code)


def runtime_hooks(
    settings_file: Path | None, rulebook: Path | None, strict: bool, distributed: bool = False
) -> Any:
    """RunHooks from the governed Runtime under the site settings (strict mode, decision
    records, shadow mode; the defaults when none apply). Raises typer.Exit with the documented
    code when refused (before any log is opened)."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.runtime import Runtime, RuntimeRefusal
    from gasrules.governance.settings import SettingsError, load_settings
    from gasrules.integration.batch import RunHooks

    try:
        settings = load_settings(settings_file)
        if strict and not settings.strict:
            import dataclasses

            settings = dataclasses.replace(settings, strict=True)
        if distributed and (settings.decision_log is not None or settings.shadow_rulebook is not None):
            raise _fail(exitcodes.USAGE, _SINGLE_MACHINE)
        rt = Runtime.from_settings(settings, rulebook)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook or "rulebook")), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    except RuntimeRefusal as exc:
        raise _fail(exitcodes.REFUSED, str(exc)) from None
    except SettingsError as exc:
        raise _fail(exitcodes.USAGE, str(exc)) from None
    logging, shadow = rt.records_decisions, rt.shadowing
    notes = []
    if rt.admission.suspended_rules:
        notes.append(
            "suspended rules: " + ", ".join(f"{r} ({why})" for r, why in rt.admission.suspended_rules)
        )
    if logging:
        notes.append(f"decision records appended to {settings.decision_log}")

    def observe(case: Any, result: dict[str, Any], other: Any, unreadable: bool) -> None:
        if unreadable:
            rt.record(case, result)  # logged, one entry per row; nothing to compare
        else:
            rt.observe(case, result, other)

    def close() -> None:
        if shadow:
            notes.append(f"shadow candidate disagreed on {rt.disagreements:,} cases")
        rt.close()

    return RunHooks(
        rulebook=rt.rulebook,
        candidate=rt.candidate if shadow else None,
        trace=logging,
        observe=observe if (logging or shadow) else None,
        close=close,
        notes=notes,
    )


_SINGLE_MACHINE = (
    "decision records and shadow mode need a single-machine run "
    "(drop --dask, or turn them off in the settings)"
)


def _terminate(signum: int, frame: Any) -> None:
    raise SystemExit(128 + signum)  # unwinds, so the writer removes its temporary file


@app.command()
def batch(
    ctx: typer.Context,
    source: Path = typer.Argument(
        ...,
        help="Input: .csv, .jsonl or .parquet file (a directory: partitioned Parquet); - for standard input.",
    ),
    target: str = typer.Argument(
        "-", help="Output file (format from its suffix), a directory with --dask, or - for stdout."
    ),
    workers: int = typer.Option(1, "--workers", "-w", min=1, help="Worker processes."),
    mapping: Path | None = typer.Option(
        None, "--mapping", "-m", help="YAML/JSON file mapping column names to inputs and units."
    ),
    rulebook: Path | None = typer.Option(
        None, "--rulebook", "-r", help="Rulebook YAML (default: the shipped adult rulebook)."
    ),
    out_format: str | None = typer.Option(
        None,
        "--format",
        "-f",
        help="Output format: csv, jsonl, parquet, fhir (a Bundle per case, NDJSON) or hl7 (an ORU^R01 per case) (default: from OUT's suffix; .hl7 is HL7, .fhir.ndjson FHIR).",
    ),
    input_format: str | None = typer.Option(
        None,
        "--input-format",
        help="Input format when the suffix does not tell: csv, jsonl, parquet, hl7 or fhir (.hl7 is HL7 v2; JSON with a resourceType is FHIR; standard input: by content unless given).",
    ),
    in_format: str | None = typer.Option(None, "--in-format", hidden=True, help="Same as --input-format."),
    full_json: bool = typer.Option(
        False, "--full-json", help="Add a 'result' column with the whole result and its trace."
    ),
    values: str | None = typer.Option(
        None, "--values", help="Comma-separated key values to output (default: every reported value)."
    ),
    chunk_size: int = typer.Option(500, "--chunk-size", min=1, help="Rows sent to a worker at a time."),
    dask: str | None = typer.Option(
        None, "--dask", help="Run on a Dask cluster: scheduler address (tcp://host:8786)."
    ),
    dask_local: int | None = typer.Option(
        None, "--dask-local", min=1, help="Run on a local Dask cluster of N worker processes."
    ),
    settings_file: Path | None = typer.Option(
        None, "--settings", help="Site settings file (strict mode, decision records, shadow)."
    ),
    strict: bool = typer.Option(
        False, "--strict", help="Refuse a rulebook that matches no approved release."
    ),
    summary_json: Path | None = typer.Option(
        None,
        "--summary-json",
        help="Also write the summary as JSON to this file (- for standard output when OUT is a file).",
    ),
    progress: bool | None = typer.Option(
        None, "--progress/--no-progress", help="Progress bar (default: only on a terminal)."
    ),
    allow_rejected: bool = typer.Option(
        False, "--allow-rejected", help="Exit 0 even when some rows were rejected (never when every row was)."
    ),
    decimal_comma: bool = typer.Option(
        False,
        "--decimal-comma",
        help="CSV input writes numbers with a decimal comma (7,35); needs a semicolon or tab delimiter.",
    ),
    formula_guard: bool = typer.Option(
        True,
        "--formula-guard/--no-formula-guard",
        help="In CSV output, neutralise "
        "pass-through cells a spreadsheet would run as a formula (default: on).",
    ),
) -> None:
    """Interpret every row of IN; one result row per input row, in order, errors inline."""
    from gasrules.integration.batch import BatchOptions, run_batch
    from gasrules.integration.messagebatch import message_formats
    from gasrules.tables.readers import FORMATS, TableError, load_mapping

    in_format = input_format or in_format
    accepted = (*FORMATS, "hl7", "fhir")
    for name, fmt in (("--format", out_format), ("--input-format", in_format)):
        if fmt is not None and fmt not in accepted:
            raise _fail(exitcodes.USAGE, f"{name} '{fmt}' is not one of {', '.join(accepted)}")
    if str(summary_json) == "-" and target == "-":
        raise _fail(exitcodes.USAGE, "--summary-json - needs an OUT file: the results go to standard output")
    if str(source) == "-":
        if dask or dask_local:
            raise _fail(
                exitcodes.USAGE, "a Dask run reads files its workers can open; standard input cannot be used"
            )
        source = ctx.with_resource(readable(source, in_format))
    msg_in, msg_out = message_formats(str(source), target, in_format, out_format)
    if (msg_in or msg_out) and (dask or dask_local):
        raise _fail(
            exitcodes.USAGE, "HL7 v2 and FHIR files are run on one machine; leave out --dask/--dask-local"
        )
    if dask and dask_local:
        raise _fail(exitcodes.USAGE, "give --dask SCHEDULER or --dask-local N, not both")
    hooks = runtime_hooks(settings_file, rulebook, strict, distributed=bool(dask or dask_local))
    rb = hooks.rulebook if hooks is not None else _load(rulebook)
    try:
        options = BatchOptions(
            workers=workers,
            chunk_size=chunk_size,
            full_json=full_json,
            values=tuple(v.strip() for v in values.split(",") if v.strip()) if values else None,
            in_format=None if msg_in else in_format,
            out_format=None if msg_out else out_format,
            mapping=load_mapping(mapping) if mapping else None,
            progress=progress,
            formula_guard=formula_guard,
            decimal_comma=decimal_comma,
        )
        previous = signal.signal(signal.SIGTERM, _terminate)
        try:
            if dask or dask_local:
                from gasrules.integration.distributed import run_distributed

                if hooks is not None and hooks.observe is not None:
                    raise _fail(exitcodes.USAGE, _SINGLE_MACHINE)
                try:
                    summary = run_distributed(
                        rb, source, target, options, scheduler=dask, local_workers=dask_local
                    )
                finally:
                    if hooks is not None and hooks.close is not None:
                        hooks.close()
            elif msg_in or msg_out:
                summary = _run_messages(rb, source, target, options, hooks, msg_in, msg_out, settings_file)
            else:
                summary = run_batch(rb, source, target, options, hooks)
        finally:
            signal.signal(signal.SIGTERM, previous)
    except TableError as exc:
        raise _fail(exitcodes.USAGE, str(exc)) from None
    typer.echo(summary.render(), err=True)
    if summary_json is not None:
        text = json.dumps(summary.as_dict(), indent=2)
        if str(summary_json) == "-":
            typer.echo(text)
        else:
            summary_json.write_text(text + "\n", encoding="utf-8")
    if summary.rejected and (not allow_rejected or summary.rejected == summary.rows):
        raise typer.Exit(exitcodes.REJECTED)


def _load(rulebook: Path | None) -> Any:
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.rulebook.build import load_rulebook

    try:
        return load_rulebook(rulebook)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook or "rulebook")), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None


def _run_messages(
    rb: Any,
    source: Path,
    target: str,
    options: Any,
    hooks: Any,
    msg_in: str | None,
    msg_out: str | None,
    settings_file: Path | None,
) -> Any:
    """HL7 v2 or FHIR on either side (gasrules.integration.messagebatch)."""
    from gasrules.governance.settings import SettingsError
    from gasrules.integration.interfaces import interfaces_section
    from gasrules.integration.messagebatch import run_message_batch

    try:
        settings = interfaces_section(settings_file)
    except SettingsError as exc:
        raise _fail(exitcodes.USAGE, str(exc)) from None
    try:
        return run_message_batch(rb, source, target, options, hooks, msg_in, msg_out, settings)
    except OSError as exc:
        raise _fail(exitcodes.USAGE, f"cannot read or write: {exc}") from None
