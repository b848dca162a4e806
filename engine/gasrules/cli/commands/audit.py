"""`gasrules audit verify|replay|repair LOG`: check and re-run a decision log.

    gasrules audit verify decisions.jsonl [--witness SHA256]
    gasrules audit replay decisions.jsonl --archive /srv/gasrules/releases/archive
    gasrules audit repair decisions.jsonl [--acknowledge-anchor]

verify: exit 0 when the chain and anchor hold (warnings allowed), 1 naming the first broken
entry; a torn last line left by a crash is told apart from tampering. replay: re-runs every
decision with the archived rulebook its entry names; exit 1 when any result would differ or
cannot be replayed.
"""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path

import typer

from gasrules.cli.commands._common import Format, format_option, json_alias, report_format
from gasrules.cli.commands._governance import SETTINGS_HELP, site_settings
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False, help="Verify, replay or repair a decision log.")

FORMATS = (Format.text, Format.json)
FORMAT_OPTION = format_option(*FORMATS)


@app.command()
def verify(
    log: Path = typer.Argument(..., help="Decision log (JSON Lines) with its .anchor beside it."),
    witness: str | None = typer.Option(
        None,
        "--witness",
        help="An entry_sha256 kept elsewhere that must be in the chain (catches a rewritten log and anchor).",
    ),
    anchor_key_file: Path | None = typer.Option(
        None,
        "--anchor-key-file",
        help="The anchor key (kept outside the log's folder): the anchor must carry its HMAC.",
    ),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
) -> None:
    """Check every entry's hashes, the chain, sequence numbers and the anchor."""
    as_json = report_format(fmt, as_json, FORMATS, "audit verify") is Format.json
    from gasrules.governance.audit import render_verify, verify_log
    from gasrules.governance.settings import SettingsError, read_anchor_key

    try:
        key = read_anchor_key(anchor_key_file, log) if anchor_key_file is not None else b""
    except SettingsError as exc:
        typer.echo(f"gasrules: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None
    report = verify_log(log, witness=witness, key=key)
    if as_json:
        first = report.first_problem
        typer.echo(
            json.dumps(
                {
                    "path": report.path,
                    "ok": report.ok,
                    "entries": report.entries,
                    "last_sha256": report.last_sha256,
                    "torn_bytes": report.torn_bytes,
                    "first_problem": asdict(first) if first else None,
                    "issues": [{**asdict(i), "severity": i.severity} for i in report.issues],
                },
                indent=2,
            )
        )
    else:
        typer.echo(render_verify(report))
        first = report.first_problem
        if first is not None:
            kind = (
                "a crash left a torn last line (run: gasrules audit repair)"
                if first.code == "torn_tail"
                else "the log was altered or damaged"
            )
            typer.echo(f"first problem: line {first.line or '-'}: {first.code}: {kind}")
    if not report.ok:
        raise typer.Exit(exitcodes.FAILED)


@app.command()
def replay(
    log: Path = typer.Argument(..., help="Decision log (JSON Lines)."),
    archive: Path | None = typer.Option(
        None, "--archive", help="Rulebook archive (default: from settings, RELEASE_DIR/archive)."
    ),
    settings_file: Path | None = typer.Option(None, "--settings", help=SETTINGS_HELP),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
) -> None:
    """Re-run each logged case with the rulebook it names and report any result that would differ."""
    as_json = report_format(fmt, as_json, FORMATS, "audit replay") is Format.json
    from gasrules.evaluation.evaluator import interpret
    from gasrules.governance.audit import render_replay, replay_log, verify_log
    from gasrules.governance.registry import archive_loader

    settings = site_settings(settings_file, archive_dir=archive)
    if settings.archive is None:
        typer.echo(
            "error: no archive: give --archive, set GASRULES_ARCHIVE_DIR or GASRULES_RELEASE_DIR", err=True
        )
        raise typer.Exit(exitcodes.USAGE)
    if not log.exists():
        typer.echo(f"error: {log} not found", err=True)
        raise typer.Exit(exitcodes.USAGE)
    checked = verify_log(log)
    report = replay_log(log, archive_loader(settings.archive), lambda rb, case: interpret(rb, case))
    if as_json:
        typer.echo(
            json.dumps(
                {
                    "path": report.path,
                    "ok": report.ok,
                    "chain_ok": checked.ok,
                    "counts": report.counts,
                    "outcomes": [asdict(o) for o in report.outcomes],
                },
                indent=2,
                default=str,
            )
        )
    else:
        if not checked.ok:
            typer.echo(
                f"warning: the log does not verify ({checked.first_problem.code if checked.first_problem else ''}"
                "); replayed entries are as read",
                err=True,
            )
        typer.echo(render_replay(report))
    if not report.ok or not checked.ok:
        raise typer.Exit(exitcodes.FAILED)


@app.command()
def repair(
    log: Path = typer.Argument(..., help="Decision log (JSON Lines)."),
    acknowledge_anchor: bool = typer.Option(
        False,
        "--acknowledge-anchor",
        help="Also re-anchor a log whose anchor is missing or disagrees (after checking why).",
    ),
) -> None:
    """Make a crashed log appendable again; the torn bytes are kept and the repair is recorded in the log."""
    from gasrules.governance.audit import repair_log
    from gasrules.governance.decision_log import RecordError

    try:
        done = repair_log(log, acknowledge_anchor=acknowledge_anchor)
    except RecordError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(exitcodes.FAILED) from None
    if not done.actions:
        typer.echo(f"{log}: nothing to repair")
        return
    saved = f"; torn bytes kept in {done.saved_to}" if done.saved_to else ""
    typer.echo(
        f"{log}: {', '.join(done.actions)}{saved}"
        + (f"; recorded as entry {done.note_seq}" if done.note_seq else "")
    )
