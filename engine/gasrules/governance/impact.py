"""Impact replay: a corpus of past cases under two rulebooks, and what would change.

The corpus is streamed through :mod:`gasrules.tables.readers` (CSV, JSON Lines, Parquet) and the
ordered worker pool of :mod:`gasrules.tables.pool` (the same readers and pool as ``gasrules batch``).
Each worker interprets a chunk of rows under both rulebooks and returns one small
:data:`Outcome` tuple per row; the parent folds them, in input order, into an
:class:`ImpactReport`. Memory holds the report and a few chunks in flight, whatever the corpus
length, and the report is identical for 1 and N workers (same pure function, same fold order).

The report counts every row (a row that cannot be read, or a case the engine rejects, is
counted and listed with its place and the field named, never dropped), the cases whose
disorders or findings change, the transitions ``old disorder set -> new disorder set`` with
counts, example case ids and the rules responsible (rules whose fired / not-fired outcome
differs in a case whose conclusion changed), finding codes gained and lost, and the cases that sit, under the new rulebook,
close to a changed threshold: within the distance the threshold moved (at least one reporting
step) of it, read from the margins in the trace comparisons.

An expected-transitions file (YAML or JSON) lists the transitions a change is meant to cause;
any other transition, or one above its ``max_cases``, makes :attr:`ImpactReport.unexpected`
non-empty (the command exits 1)::

    expected:
      - from: [metabolic_acidosis_high_anion_gap, metabolic_acidosis_normal_anion_gap]
        to: [metabolic_acidosis_normal_anion_gap]
        max_cases: 400                   # optional ceiling
        reason: "ag_high raised from 12 to 13 mmol/L"
      - {from: "*", to: rejected}         # "*" any set; [] or "no disorder"; rejected; inconsistent
"""

from __future__ import annotations

import json
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.core.model import CompiledRulebook
from gasrules.governance.probes import ChangedCut, changed_cutpoints, step_of
from gasrules.tables.readers import Row, TableError

EXAMPLES = 5  # example case ids kept per transition, rule and threshold
MALFORMED_LISTED = 50  # rejected rows listed one by one (all are counted)

# One row, as a worker returns it:
# (index, where, case_id, status_old, status_new, disorders_old, disorders_new, findings_old,
#  findings_new, fired_only_old, fired_only_new, near [(cut index, margin)], errors [(field, code, message)])
Outcome = tuple[
    int,
    str,
    str,
    str,
    str,
    tuple[str, ...],
    tuple[str, ...],
    tuple[str, ...],
    tuple[str, ...],
    tuple[str, ...],
    tuple[str, ...],
    tuple[tuple[int, float], ...],
    tuple[tuple[str, str, str], ...],
]


@dataclass(frozen=True)
class NearSpec:
    """How a changed cut-point is recognised in a trace comparison (under the new rulebook)."""

    owner: str
    quantity: str
    threshold: str  # the trace's threshold text: a parameter name or a literal repr
    value: float  # the new cut (distinguishes a selector's value from the general one)
    window: float  # |margin| at or below this is "close"


def near_specs(old: CompiledRulebook, new: CompiledRulebook, cuts: Sequence[ChangedCut]) -> list[NearSpec]:
    out = []
    for c in cuts:
        threshold = c.threshold if c.kind == "parameter" else repr(float(c.new))
        window = max(abs(c.new - c.old), step_of(new, c.quantity))
        out.append(NearSpec(c.owner, c.quantity, threshold, c.new, round(window, 9)))
    return out


# ----------------------------------------------------------------------------- the worker


@dataclass(frozen=True)
class Job:
    old: CompiledRulebook
    new: CompiledRulebook
    near: tuple[NearSpec, ...]


def _interpret(rb: CompiledRulebook, row: Row, trace: bool) -> dict[str, Any]:
    """interpret_row, or a rejected result naming the row if the engine itself fails (never a lost row)."""
    from gasrules.tables.readers import interpret_row, rejected_result

    try:
        return interpret_row(rb, row, trace)
    except Exception as exc:
        broken = Row(
            row.index,
            row.where,
            row.case,
            row.passthrough,
            [
                {
                    "field": "",
                    "code": "input.unreadable",
                    "accepted": "a case the engine can evaluate (please report it)",
                    "message": f"{row.where}: the engine failed on this row ({type(exc).__name__}: {exc})",
                }
            ],
        )
        return rejected_result(rb, broken)


def _fired(result: dict[str, Any]) -> set[str]:
    return {ev["rule"] for ev in result.get("trace") or [] if ev["outcome"] == "fired"}


def _said(result: dict[str, Any]) -> tuple[Any, ...]:
    return (
        result["status"],
        sorted(result["disorders"]),
        sorted(result["qualifiers"].items()),
        sorted({f["code"] for f in result["findings"]}),
    )


def _near(result: dict[str, Any], specs: Sequence[NearSpec]) -> tuple[tuple[int, float], ...]:
    if not specs or result["status"] == "rejected":
        return ()
    by_rule = {ev["rule"]: ev for ev in result.get("trace") or [] if ev.get("comparisons")}
    out = []
    for i, s in enumerate(specs):
        ev = by_rule.get(s.owner)
        if ev is None:
            continue
        for c in ev["comparisons"]:
            if (
                c["quantity"] == s.quantity
                and c["threshold"] == s.threshold
                and c["margin"] is not None
                and c["threshold_value"] == s.value
                and abs(c["margin"]) <= s.window + 1e-9
            ):
                out.append((i, c["margin"]))
                break
    return tuple(out)


def replay_chunk(job: Job, rows: list[Row]) -> list[Outcome]:
    """Worker: each row under both rulebooks, reduced to an :data:`Outcome`.

    The trace is what costs: the new rulebook is traced only when there are changed thresholds
    to measure margins against, and both are traced (old re-run) only for a case whose
    conclusion (status, disorders, qualifiers, finding codes) differs. Rules responsible are
    therefore the rules whose fired / not-fired outcome differs in a changed case.
    """
    out: list[Outcome] = []
    for row in rows:
        a, b = _interpret(job.old, row, False), _interpret(job.new, row, bool(job.near))
        only_a: tuple[str, ...] = ()
        only_b: tuple[str, ...] = ()
        if _said(a) != _said(b):
            a = _interpret(job.old, row, True)
            if not job.near:
                b = _interpret(job.new, row, True)
            fa, fb = _fired(a), _fired(b)
            only_a, only_b = tuple(sorted(fa - fb)), tuple(sorted(fb - fa))
        errors: tuple[tuple[str, str, str], ...] = ()
        if a["status"] == "rejected" or b["status"] == "rejected":
            errs = a["errors"] if a["status"] == "rejected" else b["errors"]
            errors = tuple((e.get("field") or "", e.get("code") or "", e.get("message") or "") for e in errs)
        case_id = a.get("case_id") or row.case.get("case_id") or ""
        out.append(
            (
                row.index,
                row.where,
                str(case_id),
                a["status"],
                b["status"],
                tuple(sorted(a["disorders"])),
                tuple(sorted(b["disorders"])),
                tuple(sorted({f["code"] for f in a["findings"]})),
                tuple(sorted({f["code"] for f in b["findings"]})),
                only_a,
                only_b,
                _near(b, job.near),
                errors,
            )
        )
    return out


# ----------------------------------------------------------------------------- the report


def conclusion_label(status: str, disorders: Sequence[str]) -> str:
    if status == "rejected":
        return "(rejected)"
    if status == "inconsistent":
        return "(inconsistent sample)"
    return " + ".join(sorted(disorders)) or "(no disorder)"


@dataclass
class Transition:
    old: str
    new: str
    count: int = 0
    examples: list[str] = field(default_factory=list)
    rules: Counter[str] = field(default_factory=Counter)
    expected: bool | None = None  # None: no expected-transitions file given
    why: str = ""


@dataclass
class ImpactReport:
    old: dict[str, str]
    new: dict[str, str]
    corpus: str
    cuts: list[ChangedCut] = field(default_factory=list)
    rows: int = 0
    status_pairs: Counter[tuple[str, str]] = field(default_factory=Counter)
    changed_disorders: int = 0
    changed_findings: int = 0
    changed_any: int = 0
    unreadable: int = 0
    rejected: Counter[str] = field(default_factory=Counter)  # "old" / "new" / "both"
    reject_reasons: Counter[tuple[str, str]] = field(default_factory=Counter)
    malformed: list[dict[str, str]] = field(default_factory=list)
    transitions: dict[tuple[str, str], Transition] = field(default_factory=dict)
    rules: dict[str, Counter[str]] = field(default_factory=dict)  # rule -> {"fired->not": n, "not->fired": n}
    rule_examples: dict[str, list[str]] = field(default_factory=dict)
    findings_gained: Counter[str] = field(default_factory=Counter)
    findings_lost: Counter[str] = field(default_factory=Counter)
    near_counts: Counter[int] = field(default_factory=Counter)
    near_changed: Counter[int] = field(default_factory=Counter)
    near_examples: dict[int, list[tuple[str, float]]] = field(default_factory=dict)
    expected_file: str = ""
    seconds: float = 0.0
    workers: int = 1

    # folding ---------------------------------------------------------------------------
    def add(self, o: Outcome) -> None:
        (_, where, case_id, sa, sb, da, db, fa, fb, only_a, only_b, near, errors) = o
        self.rows += 1
        ident = case_id or where
        self.status_pairs[(sa, sb)] += 1
        if errors:
            self._reject(o, ident)
        la, lb = conclusion_label(sa, da), conclusion_label(sb, db)
        dis = la != lb
        fin = fa != fb
        self.changed_disorders += dis
        self.changed_findings += fin
        self.changed_any += dis or fin
        if fin:
            self.findings_gained.update(set(fb) - set(fa))
            self.findings_lost.update(set(fa) - set(fb))
        for rule in only_a + only_b:
            c = self.rules.setdefault(rule, Counter())
            c["fired_then_not" if rule in only_a else "not_then_fired"] += 1
            ex = self.rule_examples.setdefault(rule, [])
            if len(ex) < EXAMPLES:
                ex.append(ident)
        if dis:
            key = (la, lb)
            t = self.transitions.get(key)
            if t is None:
                t = self.transitions[key] = Transition(*key)
            t.count += 1
            t.rules.update(only_a + only_b)
            if len(t.examples) < EXAMPLES:
                t.examples.append(ident)
        for i, margin in near:
            self.near_counts[i] += 1
            self.near_changed[i] += dis or fin
            ex2 = self.near_examples.setdefault(i, [])
            if len(ex2) < EXAMPLES:
                ex2.append((ident, margin))

    def _reject(self, o: Outcome, ident: str) -> None:
        (_, where, _, sa, sb, *_rest, errors) = o
        side = "both" if sa == sb == "rejected" else ("old" if sa == "rejected" else "new")
        self.rejected[side] += 1
        if any(code == "input.unreadable" for _, code, _ in errors):
            self.unreadable += 1
        for f, code, _ in errors:
            self.reject_reasons[(f or "(row)", code)] += 1
        if len(self.malformed) < MALFORMED_LISTED:
            self.malformed.append(
                {
                    "where": where,
                    "case_id": ident,
                    "rejected_by": side,
                    "errors": "; ".join(f"{f or '(row)'}: {m}" for f, _, m in errors),
                }
            )

    # reading ---------------------------------------------------------------------------
    @property
    def unexpected(self) -> list[Transition]:
        return [t for t in self.transitions.values() if t.expected is False]

    def sorted_transitions(self) -> list[Transition]:
        return sorted(self.transitions.values(), key=lambda t: (-t.count, t.old, t.new))

    def as_dict(self, timing: bool = True) -> dict[str, Any]:
        d: dict[str, Any] = {
            "old": self.old,
            "new": self.new,
            "corpus": self.corpus,
            "rows": self.rows,
            "changed": {
                "disorders": self.changed_disorders,
                "findings": self.changed_findings,
                "any": self.changed_any,
            },
            "status_pairs": [
                {"old": a, "new": b, "count": n} for (a, b), n in sorted(self.status_pairs.items())
            ],
            "rejected": {
                "unreadable_rows": self.unreadable,
                "by_side": dict(sorted(self.rejected.items())),
                "reasons": [
                    {"field": f, "code": c, "count": n}
                    for (f, c), n in sorted(self.reject_reasons.items(), key=lambda x: (-x[1], x[0]))
                ],
                "listed": self.malformed,
            },
            "transitions": [
                {
                    "old": t.old,
                    "new": t.new,
                    "count": t.count,
                    "examples": t.examples,
                    "rules": dict(sorted(t.rules.items(), key=lambda x: (-x[1], x[0]))),
                    "expected": t.expected,
                    "why": t.why,
                }
                for t in self.sorted_transitions()
            ],
            "rules": [
                {
                    "rule": r,
                    "changed": sum(c.values()),
                    "fired_then_not": c["fired_then_not"],
                    "not_then_fired": c["not_then_fired"],
                    "examples": self.rule_examples[r],
                }
                for r, c in sorted(self.rules.items(), key=lambda x: (-sum(x[1].values()), x[0]))
            ],
            "findings": {
                "gained": dict(sorted(self.findings_gained.items())),
                "lost": dict(sorted(self.findings_lost.items())),
            },
            "near_thresholds": [
                {
                    "cut": c.label,
                    "old": c.old,
                    "new": c.new,
                    "cases": self.near_counts[i],
                    "of_which_changed": self.near_changed[i],
                    "examples": [{"case": e, "margin": m} for e, m in self.near_examples.get(i, [])],
                }
                for i, c in enumerate(self.cuts)
            ],
            "expected_file": self.expected_file,
            "unexpected": len(self.unexpected),
        }
        if timing:
            d["timing"] = {
                "seconds": round(self.seconds, 3),
                "workers": self.workers,
                "rows_per_second": round(self.rows / self.seconds, 1) if self.seconds else None,
            }
        return d


# ----------------------------------------------------------------------------- expected transitions


class ExpectedError(EngineError, ValueError):
    """An expected-transitions file that cannot be used; the message names the entry."""


def _side_label(value: Any, where: str) -> str | None:
    if value == "*":
        return None
    if isinstance(value, list) and all(isinstance(x, str) for x in value):
        return conclusion_label("interpreted", value)
    if value in ("rejected", "inconsistent", "no disorder"):
        return {
            "rejected": "(rejected)",
            "inconsistent": "(inconsistent sample)",
            "no disorder": "(no disorder)",
        }[value]
    raise ExpectedError(
        f"{where}: {value!r} is not a disorder list, '*', 'no disorder', 'rejected' or 'inconsistent'"
    )


def load_expected(path: str | Path) -> list[dict[str, Any]]:
    import yaml

    try:
        data = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError) as exc:
        raise ExpectedError(f"{path}: cannot be read: {exc}") from None
    entries = data.get("expected") if isinstance(data, dict) else None
    if not isinstance(entries, list):
        raise ExpectedError(f"{path}: expected a mapping with a list under 'expected'")
    out = []
    for i, e in enumerate(entries):
        where = f"{path}: expected[{i}]"
        if not isinstance(e, dict) or "from" not in e or "to" not in e:
            raise ExpectedError(f"{where}: each entry needs 'from' and 'to'")
        unknown = set(e) - {"from", "to", "max_cases", "reason"}
        if unknown:
            raise ExpectedError(
                f"{where}: unknown key(s) {', '.join(sorted(unknown))}; accepted: from, to, max_cases, reason"
            )
        cap = e.get("max_cases")
        if cap is not None and (not isinstance(cap, int) or isinstance(cap, bool) or cap < 0):
            raise ExpectedError(f"{where}.max_cases: {cap!r} is not a whole number of 0 or more")
        out.append(
            {
                "from": _side_label(e["from"], where + ".from"),
                "to": _side_label(e["to"], where + ".to"),
                "max_cases": cap,
                "reason": str(e.get("reason") or ""),
                "index": i,
            }
        )
    return out


def judge(report: ImpactReport, expected: list[dict[str, Any]]) -> None:
    """Mark each transition expected or not (first matching entry wins; a ceiling applies per entry)."""
    used: Counter[int] = Counter()
    for t in report.sorted_transitions():
        match = next((e for e in expected if e["from"] in (None, t.old) and e["to"] in (None, t.new)), None)
        if match is None:
            t.expected, t.why = False, "not listed as expected"
            continue
        used[match["index"]] += t.count
        cap = match["max_cases"]
        if cap is not None and used[match["index"]] > cap:
            t.expected, t.why = False, f"above max_cases {cap} of expected[{match['index']}]"
        else:
            t.expected, t.why = True, match["reason"] or f"expected[{match['index']}]"


# ----------------------------------------------------------------------------- the run


def replay(
    old: CompiledRulebook,
    new: CompiledRulebook,
    corpus: str | Path,
    *,
    workers: int = 1,
    chunk_size: int = 250,
    mapping: Any = None,
    fmt: str | None = None,
    expected: list[dict[str, Any]] | None = None,
    expected_file: str = "",
    on_progress: Callable[[int, float], None] | None = None,
) -> ImpactReport:
    """Stream the corpus under both rulebooks. Raises TableError when the corpus cannot be read at all."""
    from gasrules.tables.pool import OrderedPool, chunked
    from gasrules.tables.readers import analytes_of, open_table

    cuts = changed_cutpoints(old, new)
    job = Job(old, new, tuple(near_specs(old, new, cuts)))
    report = ImpactReport(
        old.identity, new.identity, str(corpus), cuts=cuts, workers=workers, expected_file=expected_file
    )
    analytes = {**analytes_of(old), **analytes_of(new)}
    t0 = time.perf_counter()
    with open_table(corpus, analytes, mapping=mapping, fmt=fmt) as table:
        with OrderedPool(replay_chunk, payload=job, workers=workers) as pool:
            for outcomes in pool.map(chunked(iter(table), chunk_size)):
                for o in outcomes:
                    report.add(o)
                if on_progress is not None:
                    on_progress(report.rows, table.progress())
    report.seconds = time.perf_counter() - t0
    if expected is not None:
        judge(report, expected)
    return report


# ----------------------------------------------------------------------------- renderers

_CAUTION = (
    "Decision support only: it supports, never replaces, clinical judgement; local laboratory ranges and "
    "protocols prevail. The replay shows what the rules would conclude, not what happened to patients."
)


def _pct(n: int, total: int) -> str:
    return f"{100.0 * n / total:.2f} %" if total else "-"


def _ident(d: dict[str, str]) -> str:
    return f"{d['id']} {d['version']} (sha256 {d['sha256'][:12]})"


def render_text(r: ImpactReport) -> str:
    d = r.as_dict()
    lines = [
        f"Impact of {_ident(r.new)} against {_ident(r.old)}",
        f"Corpus: {r.corpus}: {r.rows:,} rows",
        f"Changed disorders: {r.changed_disorders:,} ({_pct(r.changed_disorders, r.rows)}); changed findings: "
        f"{r.changed_findings:,} ({_pct(r.changed_findings, r.rows)}); any change: {r.changed_any:,}",
        f"Rejected rows: {sum(r.rejected.values()):,} (unreadable {r.unreadable:,}; by side "
        + ", ".join(f"{k} {v:,}" for k, v in sorted(r.rejected.items()))
        + ")"
        if r.rejected
        else "Rejected rows: 0",
    ]
    moved = [(a, b, n) for (a, b), n in sorted(r.status_pairs.items()) if a != b]
    if moved:
        lines.append("Status changes: " + "; ".join(f"{a} -> {b}: {n:,}" for a, b, n in moved))
    if r.expected_file:
        lines.append(f"Expected transitions: {r.expected_file}: {len(r.unexpected)} unexpected")
    lines += ["", "Transitions (old disorders -> new disorders):"]
    if not r.transitions:
        lines.append("  none")
    for t in d["transitions"]:
        flag = (
            ""
            if t["expected"] is None
            else ("  [expected]" if t["expected"] else f"  [UNEXPECTED: {t['why']}]")
        )
        lines.append(f"  {t['count']:>8,}  {t['old']}  ->  {t['new']}{flag}")
        rules = ", ".join(f"{k} ({v})" for k, v in list(t["rules"].items())[:4])
        lines.append(f"            rules: {rules or '-'}; e.g. {', '.join(t['examples'])}")
    lines += ["", "Rules whose outcome changed (fired->not fired / not fired->fired):"]
    for x in d["rules"][:40] or [
        {"rule": "none", "changed": 0, "fired_then_not": 0, "not_then_fired": 0, "examples": []}
    ]:
        lines.append(
            f"  {x['changed']:>8,}  {x['rule']}  ({x['fired_then_not']:,} / {x['not_then_fired']:,})"
            + (f"  e.g. {', '.join(x['examples'][:3])}" if x["examples"] else "")
        )
    if r.findings_gained or r.findings_lost:
        lines += ["", "Findings gained / lost:"]
        for code in sorted(set(r.findings_gained) | set(r.findings_lost)):
            lines.append(f"  +{r.findings_gained[code]:<7,} -{r.findings_lost[code]:<7,} {code}")
    lines += ["", "Cases close to a changed threshold (under the new rulebook):"]
    for n in d["near_thresholds"] or [
        {
            "cut": "no changed numeric threshold",
            "cases": 0,
            "of_which_changed": 0,
            "examples": [],
            "old": "",
            "new": "",
        }
    ]:
        ex = ", ".join(f"{e['case']} ({e['margin']:+g})" for e in n["examples"][:3])
        lines.append(
            f"  {n['cases']:>8,}  {n['cut']} {n['old']}->{n['new']} ({n['of_which_changed']:,} changed)"
            + (f"  e.g. {ex}" if ex else "")
        )
    if r.reject_reasons:
        lines += ["", "Rejected rows by reason (every row counted; first ones listed in JSON/HTML):"]
        for x in d["rejected"]["reasons"][:20]:
            lines.append(f"  {x['count']:>8,}  {x['field']}: {x['code']}")
        for m in r.malformed[:10]:
            lines.append(f"    {m['where']} [{m['case_id']}] {m['errors']}")
    if r.seconds:
        lines += [
            "",
            f"{r.rows:,} rows in {r.seconds:.1f} s on {r.workers} worker(s): {r.rows / r.seconds:,.0f} rows/s",
        ]
    lines += ["", _CAUTION]
    return "\n".join(lines)


def render_json(r: ImpactReport, timing: bool = True) -> str:
    return json.dumps(r.as_dict(timing), indent=2, ensure_ascii=False)


_CSS = (
    "body{font:14px/1.45 system-ui,sans-serif;margin:2em auto;max-width:70em;color:#222}"
    "table{border-collapse:collapse;margin:.5em 0 1.5em;width:100%}th,td{border:1px solid #ccc;padding:.3em .5em;"
    "text-align:left;vertical-align:top}th{background:#f3f3f3}td.n{text-align:right;font-variant-numeric:tabular-nums}"
    ".bad{background:#fde8e8}.ok{background:#e8f6ea}.note{color:#555;font-size:90%}code{font-size:92%}"
)


def render_html(r: ImpactReport) -> str:
    from html import escape as e

    d = r.as_dict()

    def table(head: list[str], rows: list[list[Any]], classes: list[str] | None = None) -> str:
        out = ["<table><tr>" + "".join(f"<th>{e(h)}</th>" for h in head) + "</tr>"]
        for i, row in enumerate(rows):
            cls = f' class="{classes[i]}"' if classes and classes[i] else ""
            out.append(
                f"<tr{cls}>"
                + "".join(
                    f'<td class="n">{v:,}</td>' if isinstance(v, int) else f"<td>{e(str(v))}</td>"
                    for v in row
                )
                + "</tr>"
            )
        return "\n".join(out) + "</table>"

    parts = [
        f"<!doctype html><html lang=en><head><meta charset=utf-8><title>Impact {e(_ident(r.new))}</title>"
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Impact of {e(_ident(r.new))}</h1><p>against {e(_ident(r.old))}, corpus <code>{e(r.corpus)}</code></p>",
        table(
            ["Rows", "Changed disorders", "Changed findings", "Any change", "Rejected", "Unreadable"],
            [
                [
                    r.rows,
                    r.changed_disorders,
                    r.changed_findings,
                    r.changed_any,
                    sum(r.rejected.values()),
                    r.unreadable,
                ]
            ],
        ),
    ]
    if r.expected_file:
        parts.append(
            f"<p>Expected transitions from <code>{e(r.expected_file)}</code>: "
            f"<strong>{len(r.unexpected)} unexpected</strong></p>"
        )
    ts = d["transitions"]
    parts += [
        "<h2>Transitions</h2>",
        table(
            ["Cases", "Old disorders", "New disorders", "Rules responsible", "Examples", "Expected"],
            [
                [
                    t["count"],
                    t["old"],
                    t["new"],
                    ", ".join(f"{k} ({v})" for k, v in t["rules"].items()),
                    ", ".join(t["examples"]),
                    "-" if t["expected"] is None else ("yes" if t["expected"] else "NO: " + t["why"]),
                ]
                for t in ts
            ],
            ["" if t["expected"] is None else ("ok" if t["expected"] else "bad") for t in ts],
        ),
    ]
    parts += [
        "<h2>Rules whose outcome changed</h2>",
        table(
            ["Rule", "Cases", "Fired, now not", "Not fired, now fired", "Examples"],
            [
                [x["rule"], x["changed"], x["fired_then_not"], x["not_then_fired"], ", ".join(x["examples"])]
                for x in d["rules"]
            ],
        ),
    ]
    parts += [
        "<h2>Findings gained and lost</h2>",
        table(
            ["Finding", "Gained", "Lost"],
            [
                [c, r.findings_gained[c], r.findings_lost[c]]
                for c in sorted(set(r.findings_gained) | set(r.findings_lost))
            ],
        ),
    ]
    parts += [
        "<h2>Cases close to a changed threshold</h2><p class=note>Under the new rulebook, the compared value "
        "lies within the distance the threshold moved (at least one reporting step).</p>",
        table(
            ["Cut-point", "Old", "New", "Cases", "Of which changed", "Examples (margin)"],
            [
                [
                    n["cut"],
                    f"{n['old']:g}",
                    f"{n['new']:g}",
                    n["cases"],
                    n["of_which_changed"],
                    ", ".join(f"{x['case']} ({x['margin']:+g})" for x in n["examples"]),
                ]
                for n in d["near_thresholds"]
            ],
        ),
    ]
    parts += [
        "<h2>Rejected rows</h2><p class=note>Every row is counted; the first "
        f"{MALFORMED_LISTED} are listed.</p>",
        table(
            ["Field", "Code", "Rows"], [[x["field"], x["code"], x["count"]] for x in d["rejected"]["reasons"]]
        ),
        table(
            ["Where", "Case", "Rejected by", "Errors"],
            [[m["where"], m["case_id"], m["rejected_by"], m["errors"]] for m in r.malformed],
        ),
    ]
    parts.append(f"<p class=note>{e(_CAUTION)}</p></body></html>")
    return "\n".join(parts)


RENDERERS: dict[str, Callable[[ImpactReport], str]] = {
    "text": render_text,
    "json": render_json,
    "html": render_html,
}

__all__ = [
    "ExpectedError",
    "ImpactReport",
    "TableError",
    "Transition",
    "conclusion_label",
    "judge",
    "load_expected",
    "replay",
    "replay_chunk",
]
