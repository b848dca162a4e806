"""`gasrules verify [RULEBOOK]`: run a rulebook's validation suite, with rule and threshold coverage.

Parses options, calls gasrules.verification.suite, prints. Exit 0 when every case passes (and coverage meets
the minimums given, and every simulated cohort of cohorts.yaml meets its goal), 1 otherwise, 5
when the rulebook itself does not load.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import typer

from gasrules.cli.commands._common import Format, format_option, json_alias, report_format
from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

FORMATS = (Format.text, Format.json)
FORMAT_OPTION = format_option(*FORMATS)


@app.command()
def verify(
    rulebook: Path | None = typer.Argument(None, help="Rulebook YAML (default: the shipped adult rulebook)."),
    cases: Path | None = typer.Option(
        None, "--cases", help="Folder of case files (default: cases/ beside the rulebook)."
    ),
    fmt: Format = FORMAT_OPTION,
    as_json: bool = json_alias(),
    suggest: bool = typer.Option(
        False, "--suggest", help="Propose input values for missing threshold probes (bisection)."
    ),
    write_probes: Path | None = typer.Option(
        None, "--write-probes", help="Write the proposed probes to this case file (implies --suggest)."
    ),
    min_rule: float | None = typer.Option(
        None, "--min-rule-coverage", help="Fail when rule coverage (percent) is lower."
    ),
    min_threshold: float | None = typer.Option(
        None, "--min-threshold-coverage", help="Fail when threshold coverage (percent) is lower."
    ),
    no_cohorts: bool = typer.Option(
        False,
        "--no-cohorts",
        help="Skip the simulated cohorts (population-level validation) for a quick run.",
    ),
    cohort_size: int | None = typer.Option(
        None, "--cohort-size", min=1, help="Cases per cohort (default: the cohort file's size)."
    ),
    workers: int | None = typer.Option(
        None, "--workers", min=1, help="Worker processes for the cohorts (default: up to 2)."
    ),
) -> None:
    """Run every reference case; show failures with expected vs got and the deciding trace; show coverage."""
    from gasrules.core.errors import RulebookError
    from gasrules.core.resources import default_rulebook_path
    from gasrules.evaluation.render import render_problems
    from gasrules.rulebook.build import load_rulebook
    from gasrules.verification import suite as S

    as_json = report_format(fmt, as_json, FORMATS, "verify") is Format.json
    path = rulebook or default_rulebook_path()
    try:
        rb = load_rulebook(path)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(path)), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    try:
        suite = S.load_suite(path, cases)
    except S.SuiteError as exc:
        typer.echo(render_problems(exc.problems, str(path)), err=True)
        raise typer.Exit(exitcodes.FAILED) from None
    name_problems = S.check_names(rb, suite)
    if name_problems:
        typer.echo(render_problems(name_problems, str(path)), err=True)
        raise typer.Exit(exitcodes.FAILED)
    unused = S.unused_entries(rb, suite)
    if unused and not as_json:
        typer.echo(
            f"warning: {len(unused)} bibliography entr{'y' if len(unused) == 1 else 'ies'} cited by no "
            "parameter, rule or case of this rulebook (another rulebook sharing the file may cite them): "
            + ", ".join(unused),
            err=True,
        )
    results = S.run_suite(rb, suite)
    rules = S.rule_coverage(rb, results, suite.unreachable)
    thresholds = S.threshold_coverage(rb, results, suite.unreachable)
    report: dict[str, Any] = {
        "rulebook": rb.identity,
        "summary": S.summary(suite, results),
        "uncited_bibliography_entries": unused,
        "failures": [_failure_json(r) for r in results if r.outcome == "failed"],
        "superseded": suite.superseded,
        "rule_coverage": {k: v for k, v in rules.items() if k != "counts"},
        "threshold_coverage": {k: v for k, v in thresholds.items() if k != "rows"},
    }
    if suggest or write_probes is not None:
        probes, not_found = S.suggest_probes(rb, results, thresholds)
        report["suggestions"] = [S.probe_case(rb, p) | {"engine_agrees": p.engine_agrees} for p in probes]
        report["not_found"] = not_found
        if write_probes is not None and probes:
            report["written"] = {"file": str(write_probes), "cases": S.write_probes(write_probes, rb, probes)}
    cohort_table = None if no_cohorts else _cohorts(path, rb, cases, workers, cohort_size)
    if not no_cohorts:
        report["cohorts"] = cohort_table
    if as_json:
        typer.echo(json.dumps(report, indent=2, default=str))
    else:
        typer.echo(_text(rb, results, report))
    code = exitcodes.OK
    if report["summary"]["failed"] or rules["stale_excuses"] or thresholds["stale_excuses"]:
        code = exitcodes.FAILED
    if cohort_table is not None and (not cohort_table["passed"] or cohort_table["generator_problems"]):
        code = exitcodes.FAILED
    if min_rule is not None and rules["percent"] < min_rule:
        code = exitcodes.FAILED
    if min_threshold is not None and thresholds["percent"] < min_threshold:
        code = exitcodes.FAILED
    raise typer.Exit(code)


def _cohorts(path: Path, rb: Any, cases: Path | None, workers: int | None, size: int | None) -> Any:
    """The operating-characteristics table on the simulated cohorts (None: no cohort file)."""
    from gasrules.evaluation.render import render_problems
    from gasrules.verification import cohort_table as T
    from gasrules.verification.cohorts import CohortError

    try:
        return T.table_for(path, rb, cases_dir=cases, workers=workers or T.default_workers(), size=size)
    except CohortError as exc:
        typer.echo(render_problems(exc.problems, str(path)), err=True)
        raise typer.Exit(exitcodes.FAILED) from None


def _failure_json(r: Any) -> dict[str, Any]:
    return {
        "case": r.case.id,
        "location": str(r.case.location),
        "status": r.result["status"] if r.result else None,
        "failures": [
            {"what": f.what, "expected": f.expected, "got": f.got, "rules": f.rules} for f in r.failures
        ],
    }


def _text(rb: Any, results: list[Any], report: dict[str, Any]) -> str:
    from gasrules.evaluation.render import render_trace

    s = report["summary"]
    lines = [f"Rulebook {rb.id} {rb.version} (sha256 {rb.sha256[:12]})"]
    for r in results:
        if r.outcome != "failed":
            continue
        lines += ["", f"FAIL {r.case.id}  ({r.case.location})", f"  {r.case.note}"]
        wanted: list[str] = []
        for f in r.failures:
            lines.append(f"  - {f.what}: expected {f.expected}, got {f.got}")
            wanted += [x for x in f.rules if x not in wanted]
        if wanted and r.result and r.result["trace"]:
            lines += ["    " + x for x in render_trace(r.result["trace"], only=wanted).splitlines()]
    lines += [
        "",
        f"Cases: {s['cases']} ({s['passed']} passed, {s['failed']} failed, {s['skipped']} skipped; "
        f"{s['superseded']} base cases superseded; {s['probes']} threshold probes)",
        "  by evidence: " + ", ".join(f"{k} {v}" for k, v in s["by_evidence"].items()),
    ]
    rc = report["rule_coverage"]
    lines.append(f"Rule coverage: {rc['summary']} active rules both fired and not fired ({rc['percent']}%)")
    if rc["never_fired"]:
        lines.append("  never fired: " + ", ".join(rc["never_fired"]))
    if rc["never_not_fired"]:
        lines.append("  never not fired: " + ", ".join(rc["never_not_fired"]))
    for e in rc["excused"]:
        lines.append(f"  unreachable ({e['outcome'].replace('_', ' ')}): {e['rule']}: {e['reason']}")
    for e in rc["stale_excuses"]:
        lines.append(f"  stated unreachable but covered ({e['outcome'].replace('_', ' ')}): {e['rule']}")
    tc = report["threshold_coverage"]
    lines.append(
        f"Threshold coverage: {tc['summary']} sides of {tc['cutpoints']} cut-points ({tc['percent']}%)"
    )
    for m in tc["missing"]:
        lines.append(f"  missing {'/'.join(m['sides'])}: {m['cutpoint']}")
    grouped: dict[str, list[str]] = {}
    for e in tc["excused"]:
        grouped.setdefault(f"{e['cutpoint']}: {e['reason']}", []).append(e["side"])
    for text, sides in grouped.items():
        lines.append(f"  unreachable {'/'.join(sides)}: {text}")
    for e in tc["stale_excuses"]:
        lines.append(
            f"  stated unreachable but covered (or no such cut-point): {e['side']} of {e['cutpoint']}"
        )
    for p in report.get("suggestions", []):
        agree = "" if p["engine_agrees"] else "  [ENGINE DISAGREES with the rule's definition]"
        lines.append(f"  suggest {p['id']}: {json.dumps(p['input'])}  -> {json.dumps(p['want'])}{agree}")
    for n in report.get("not_found", []):
        lines.append(f"  no probe for {n['side']} of {n['cutpoint']}: {n['why']}")
    if "written" in report:
        lines.append(f"Wrote {report['written']['cases']} probe cases to {report['written']['file']}")
    if "cohorts" in report:
        from gasrules.verification.cohort_table import render_text

        lines.append(render_text(report["cohorts"]))
    lines += [
        "",
        "Decision support only: it supports, and never replaces, clinical judgement; "
        "local laboratory ranges and protocols prevail.",
    ]
    return "\n".join(lines)
