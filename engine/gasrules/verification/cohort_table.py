"""Operating characteristics of a rulebook on its simulated cohorts (population-level validation).

:func:`run_cohorts` generates every cohort of a :class:`gasrules.verification.cohorts.CohortPlan`, runs the
cases through the public API (``interpret_many``, without trace, optionally across worker
processes, whole cohorts per process) and tallies, per cohort: n, the share of each status, the share naming the primary
disorder, naming no disorder outside the expected set, naming every expected disorder (mixes) or
none (healthy), each goal and whether it is met, and the three most frequent wrong disorder sets
with an example case each. A case the engine calls inconsistent or rejects is a generator
problem and is reported as such. Renderers: text, Markdown, HTML, and a side-by-side comparison
of two tables (``gasrules impact``).
"""

from __future__ import annotations

import html
import os
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.model import CompiledRulebook
from gasrules.verification.cohorts import (
    MEASURES,
    Cohort,
    CohortError,
    CohortPlan,
    check_plan,
    generate,
    load_plan,
)

STATUSES = ("interpreted", "partial", "inconsistent", "rejected")
GENERATOR_PROBLEM = ("inconsistent", "rejected")
MEASURE_LABELS = {
    "no_disorder": "no disorder named",
    "primary": "primary named",
    "no_second": "no other disorder",
    "all_named": "all expected named",
}
TOP_WRONG = 3


@dataclass
class Tally:
    """Counts for one cohort, filled one result at a time."""

    cohort: Cohort
    n: int = 0
    status: Counter = field(default_factory=Counter)
    hits: Counter = field(default_factory=Counter)
    wrong: Counter = field(default_factory=Counter)
    examples: dict[tuple[str, ...], dict[str, Any]] = field(default_factory=dict)
    problem_example: dict[str, Any] | None = None

    def add(self, case: dict[str, Any], result: dict[str, Any]) -> None:
        self.n += 1
        self.status[result["status"]] += 1
        named = set(result.get("disorders") or [])
        expect = set(self.cohort.expect)
        for measure, hit in outcome(expect, self.cohort.expect, named).items():
            self.hits[measure] += hit
        if result["status"] in GENERATOR_PROBLEM and self.problem_example is None:
            self.problem_example = _example(case, result)
        if named != expect:
            key = tuple(sorted(named))
            self.wrong[key] += 1
            self.examples.setdefault(key, _example(case, result))


def outcome(expect: set[str], ordered: tuple[str, ...], named: set[str]) -> dict[str, bool]:
    """Which measures one result meets: nothing named; the primary (first expected) named;
    nothing outside the expected set named; every expected disorder named."""
    return {
        "no_disorder": not named,
        "primary": bool(ordered) and ordered[0] in named,
        "no_second": named <= expect,
        "all_named": expect <= named,
    }


def _example(case: dict[str, Any], result: dict[str, Any]) -> dict[str, Any]:
    return {
        "case": {k: v for k, v in case.items() if k != "case_id"},
        "headline": result.get("headline", ""),
        "status": result["status"],
    }


def percent(k: int, n: int) -> float:
    return round(100.0 * k / n, 2) if n else 0.0


def row(t: Tally) -> dict[str, Any]:
    """One line of the operating-characteristics table."""
    c = t.cohort
    shares = {m: percent(t.hits[m], t.n) for m in MEASURES}
    failed = [m for m, goal in c.goal.items() if t.n == 0 or 100.0 * t.hits[m] / t.n < goal]
    problems = sum(t.status[s] for s in GENERATOR_PROBLEM)
    wrong = [
        {"disorders": list(k), "count": v, "percent": percent(v, t.n), "example": t.examples[k]}
        for k, v in sorted(t.wrong.items(), key=lambda kv: (-kv[1], kv[0]))[:TOP_WRONG]
    ]
    return {
        "id": c.id,
        "label": c.label,
        "kind": c.kind,
        "expect": list(c.expect),
        "n": t.n,
        "status": {s: percent(t.status[s], t.n) for s in sorted(set(STATUSES) | set(t.status))},
        **shares,
        "goal": dict(c.goal),
        "failed_goals": failed,
        "passed": not failed,
        "generator_problems": problems,
        "generator_example": t.problem_example,
        "wrong": wrong,
    }


def default_workers() -> int:
    return max(1, min(2, os.cpu_count() or 1))


def cohort_row(rb: CompiledRulebook, plan: CohortPlan, c: Cohort, size: int | None) -> dict[str, Any]:
    """One cohort: generate, interpret through the public API (no trace), tally, summarise."""
    import gasrules

    cases = generate(rb, plan, c, size)
    tally = Tally(c)
    for case, result in zip(cases, gasrules.interpret_many(rb, cases, trace=False)):
        tally.add(case, result)
    return row(tally)


_WORKER: dict[str, Any] = {}


def _init_worker(rb: CompiledRulebook, plan: CohortPlan, size: int | None) -> None:
    _WORKER.update(rb=rb, plan=plan, size=size)


def _worker_row(c: Cohort) -> dict[str, Any]:
    return cohort_row(_WORKER["rb"], _WORKER["plan"], c, _WORKER["size"])


def _rows(rb: CompiledRulebook, plan: CohortPlan, size: int | None, workers: int) -> list[dict[str, Any]]:
    """Rows in the plan's order; with workers > 1, whole cohorts go to worker processes, which send
    back only their rows (a cohort's results never cross a process boundary)."""
    if workers <= 1 or len(plan.cohorts) < 2:
        return [cohort_row(rb, plan, c, size) for c in plan.cohorts]
    import multiprocessing as mp

    picklable = CohortPlan(**{**plan.__dict__, "locate": None})
    with mp.get_context("spawn").Pool(
        min(workers, len(plan.cohorts)), initializer=_init_worker, initargs=(rb, picklable, size)
    ) as pool:
        return pool.map(_worker_row, plan.cohorts, chunksize=1)


def run_cohorts(
    rb: CompiledRulebook, plan: CohortPlan, *, workers: int = 1, size: int | None = None
) -> dict[str, Any]:
    """The operating-characteristics table of one rulebook on a plan. Raises CohortError when the
    plan does not fit the rulebook (unknown parameter, disorder code, implausible range...)."""
    problems = check_plan(rb, plan)
    if problems:
        raise CohortError(problems)
    rows = _rows(rb, plan, size, workers)
    return {
        "rulebook": rb.identity,
        "file": plan.file,
        "seed": plan.seed,
        "size": size or plan.size,
        "rows": rows,
        "passed": all(r["passed"] for r in rows),
        "generator_problems": sum(r["generator_problems"] for r in rows),
    }


_TABLES: dict[tuple[Any, ...], dict[str, Any]] = {}  # this process's tables, by what decides them


def _key(rb: CompiledRulebook, plan: CohortPlan, size: int | None) -> tuple[Any, ...]:
    """What decides a table: the rulebook's content, the engine, every cohort file read, the size."""
    import hashlib

    files = tuple(hashlib.sha256(Path(f).read_bytes()).hexdigest() for f in plan.goal_files)
    return (rb.sha256, rb.engine_version, files, size or plan.size)


def table_for(
    rulebook_path: str | Path,
    rb: CompiledRulebook,
    *,
    cases_dir: str | Path | None = None,
    workers: int = 1,
    size: int | None = None,
) -> dict[str, Any] | None:
    """Load the plan that applies to a rulebook and run it; None when its chain has no cohort file.
    The table is deterministic, so one process computes it once per rulebook content and plan."""
    plan = load_plan(rulebook_path, cases_dir)
    if plan is None:
        return None
    key = _key(rb, plan, size)
    if key not in _TABLES:
        _TABLES[key] = run_cohorts(rb, plan, workers=workers, size=size)
    return _TABLES[key]


# ----------------------------------------------------------------------------- rendering


def _fmt_goal(r: dict[str, Any]) -> str:
    return ", ".join(f"{MEASURE_LABELS[m]} >= {g:g}%" for m, g in r["goal"].items())


def _shown(r: dict[str, Any]) -> list[str]:
    """The measures a row shows: the healthy cohort's one, or primary and second/all named."""
    if r["kind"] == "healthy":
        return ["no_disorder"]
    return ["primary", "no_second"] if r["kind"] == "simple" else ["primary", "all_named"]


def _cells(r: dict[str, Any]) -> str:
    return "  ".join(f"{MEASURE_LABELS[m]} {r[m]:.1f}%" for m in _shown(r))


def _wrong_text(w: dict[str, Any]) -> str:
    names = ", ".join(w["disorders"]) or "no disorder"
    case = ", ".join(f"{k} {v}" for k, v in w["example"]["case"].items())
    return f"{w['percent']:.1f}% [{names}]  e.g. {case} -> {w['example']['status'].upper()}: {w['example']['headline']}"


def render_text(table: dict[str, Any] | None) -> str:
    if table is None:
        return "Cohorts: no cohort file beside the suite or its bases (population-level validation not run)"
    rb = table["rulebook"]
    lines = [
        f"Cohorts ({table['size']} cases each, seed {table['seed']}, {table['file']}) on {rb['id']} {rb['version']}:"
    ]
    for r in table["rows"]:
        mark = "PASS" if r["passed"] else "FAIL"
        lines.append(f"  {mark} {r['id']:<46} n {r['n']:<6} {_cells(r)}   goal {_fmt_goal(r)}")
        odd = {s: v for s, v in r["status"].items() if s != "interpreted" and v}
        if odd:
            lines.append("       status: " + ", ".join(f"{s} {v:.1f}%" for s, v in odd.items()))
        if r["generator_problems"]:
            ex = r["generator_example"]
            lines.append(
                f"       GENERATOR PROBLEM: {r['generator_problems']} case(s) inconsistent or rejected, "
                f"e.g. {ex['case']} -> {ex['headline']}"
            )
        lines += [f"       wrong: {_wrong_text(w)}" for w in r["wrong"]]
    failed = [r["id"] for r in table["rows"] if not r["passed"]]
    lines.append(
        f"  Goals: {len(table['rows']) - len(failed)}/{len(table['rows'])} cohorts meet them"
        + (f" (not met: {', '.join(failed)})" if failed else "")
    )
    return "\n".join(lines)


def _md_row(r: dict[str, Any]) -> str:
    cells = [
        r["id"],
        str(r["n"]),
        *(f"{r[m]:.1f}" for m in MEASURES),
        _fmt_goal(r),
        "pass" if r["passed"] else "**FAIL**",
    ]
    return "| " + " | ".join(cells) + " |"


def render_markdown(table: dict[str, Any] | None) -> str:
    if table is None:
        return "No cohort file beside the suite or its bases: population-level validation was not run.\n"
    head = ["cohort", "n", *(MEASURE_LABELS[m] + " %" for m in MEASURES), "goal", "result"]
    lines = [
        f"{table['size']} simulated cases per cohort, seed {table['seed']}.",
        "",
        "| " + " | ".join(head) + " |",
        "|" + "---|" * len(head),
    ]
    lines += [_md_row(r) for r in table["rows"]]
    lines.append("")
    for r in table["rows"]:
        for w in r["wrong"]:
            lines.append(f"- {r['id']}: {_wrong_text(w)}")
    return "\n".join(lines) + "\n"


def render_html(table: dict[str, Any] | None) -> str:
    if table is None:
        return "<p>No cohort file beside the suite or its bases: population-level validation was not run.</p>"
    e = html.escape
    head = "".join(
        f"<th>{e(h)}</th>"
        for h in ["cohort", "n", *(MEASURE_LABELS[m] + " %" for m in MEASURES), "goal", "result"]
    )
    body = []
    for r in table["rows"]:
        cells = [
            r["id"],
            str(r["n"]),
            *(f"{r[m]:.1f}" for m in MEASURES),
            _fmt_goal(r),
            "pass" if r["passed"] else "FAIL",
        ]
        cls = "" if r["passed"] else ' class="fail"'
        body.append(f"<tr{cls}>" + "".join(f"<td>{e(c)}</td>" for c in cells) + "</tr>")
    wrong = "".join(f"<li>{e(r['id'])}: {e(_wrong_text(w))}</li>" for r in table["rows"] for w in r["wrong"])
    return (
        f"<p>{table['size']} simulated cases per cohort, seed {table['seed']}.</p>"
        f'<table class="cohorts"><tr>{head}</tr>{"".join(body)}</table>'
        + (f"<p>Most frequent wrong disorder sets:</p><ul>{wrong}</ul>" if wrong else "")
    )


# ----------------------------------------------------------------------------- comparison (impact)


def compare(old: dict[str, Any] | None, new: dict[str, Any] | None) -> list[dict[str, Any]]:
    """Side by side, per cohort (by id) and measure shown: old and new share, the change, pass/fail."""
    olds = {r["id"]: r for r in (old or {}).get("rows", [])}
    news = {r["id"]: r for r in (new or {}).get("rows", [])}
    out = []
    for cid in list(olds) + [k for k in news if k not in olds]:
        a, b = olds.get(cid), news.get(cid)
        for m in _shown(a or b):  # type: ignore[arg-type]
            va = a[m] if a else None
            vb = b[m] if b else None
            out.append(
                {
                    "cohort": cid,
                    "measure": m,
                    "old": va,
                    "new": vb,
                    "change": None if va is None or vb is None else round(vb - va, 2),
                    "old_passed": a["passed"] if a else None,
                    "new_passed": b["passed"] if b else None,
                }
            )
    return out


def _pf(x: bool | None) -> str:
    return "-" if x is None else ("pass" if x else "FAIL")


def _num(x: float | None, signed: bool = False) -> str:
    return "-" if x is None else (f"{x:+.1f}" if signed else f"{x:.1f}")


def render_compare_text(rows: list[dict[str, Any]]) -> str:
    if not rows:
        return "Cohorts: neither rulebook has a cohort file"
    lines = [
        "Cohorts (old -> new, percent of cases):",
        f"  {'cohort':<46} {'measure':<20} {'old':>6} {'new':>6} {'change':>7}  old/new goal",
    ]
    lines += [
        f"  {r['cohort']:<46} {MEASURE_LABELS[r['measure']]:<20} {_num(r['old']):>6} {_num(r['new']):>6} "
        f"{_num(r['change'], True):>7}  {_pf(r['old_passed'])}/{_pf(r['new_passed'])}"
        for r in rows
    ]
    return "\n".join(lines)


def render_compare_html(rows: list[dict[str, Any]]) -> str:
    if not rows:
        return "<p>Neither rulebook has a cohort file.</p>"
    e = html.escape
    head = "".join(
        f"<th>{h}</th>" for h in ("cohort", "measure", "old %", "new %", "change", "old goal", "new goal")
    )
    body = "".join(
        "<tr>"
        + "".join(
            f"<td>{e(x)}</td>"
            for x in (
                r["cohort"],
                MEASURE_LABELS[r["measure"]],
                _num(r["old"]),
                _num(r["new"]),
                _num(r["change"], True),
                _pf(r["old_passed"]),
                _pf(r["new_passed"]),
            )
        )
        + "</tr>"
        for r in rows
    )
    return f'<table class="cohorts"><tr>{head}</tr>{body}</table>'


def append_comparison(fmt: str, text: str, rows: list[dict[str, Any]]) -> str:
    """An impact report (text, json or html) with the cohort comparison added."""
    import json

    if fmt == "json":
        return json.dumps(json.loads(text) | {"cohorts": rows}, indent=2, ensure_ascii=False)
    if fmt == "html":
        block = "<h2>Simulated cohorts</h2>" + render_compare_html(rows)
        cut = text.rfind("</body>")
        return text[:cut] + block + text[cut:] if cut >= 0 else text + block
    return text + "\n\n" + render_compare_text(rows)


def gate_problems(table: dict[str, Any] | None) -> list[tuple[str, str]]:
    """Release-gate reasons: each cohort goal not met, and any generator problem."""
    if table is None:
        return []
    out = []
    for r in table["rows"]:
        for m in r["failed_goals"]:
            out.append(
                (
                    "cohorts.goal",
                    f"cohort {r['id']}: {MEASURE_LABELS[m]} {r[m]:.1f}% is below its goal {r['goal'][m]:g}%",
                )
            )
        if r["generator_problems"]:
            out.append(
                (
                    "cohorts.generator",
                    f"cohort {r['id']}: {r['generator_problems']} generated case(s) inconsistent or rejected",
                )
            )
    return out


def summary(table: dict[str, Any] | None) -> dict[str, Any] | None:
    """What a release manifest records: the table without example cases."""
    if table is None:
        return None
    rows = [
        {k: v for k, v in r.items() if k not in ("wrong", "generator_example")}
        | {"wrong": [{"disorders": w["disorders"], "percent": w["percent"]} for w in r["wrong"]]}
        for r in table["rows"]
    ]
    return {k: v for k, v in table.items() if k != "rows"} | {"rows": rows}


__all__ = [
    "compare",
    "default_workers",
    "gate_problems",
    "render_compare_html",
    "render_compare_text",
    "render_html",
    "render_markdown",
    "render_text",
    "run_cohorts",
    "summary",
    "table_for",
]
