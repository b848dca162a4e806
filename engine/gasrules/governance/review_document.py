"""The review document: a rulebook rendered for a rules committee, as HTML and Markdown.

:func:`build_document` gathers everything from the compiled rulebook (never written twice):
identity and intended use; every parameter with value (and per-sample-type values), unit,
bounds or choices, rationale, source with evidence tag, and the file and line that set it;
every derived value with its formula; every rule by step with its doc sections (what it
concludes, why, example, references), its condition with names replaced by labels and current
parameter values, its findings and its status. With ``since`` it adds the classed changes from
:mod:`gasrules.governance.diff`; with a corpus as well, an impact summary (cases whose disorders or
findings change, the largest transitions with example case ids). With ``cohorts``, the
operating-characteristics table on the simulated cohorts (:mod:`gasrules.verification.cohort_table`).

:func:`render_markdown` and :func:`render_html` are pure functions of that document. The HTML
is one self-contained file: inline style, no script, no external resource, everything escaped.
"""

from __future__ import annotations

import html
import re
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.rulebook.bibliography import describe, keys_of

__all__ = [
    "ReviewDocument",
    "build_document",
    "condition_text",
    "impact_summary",
    "render_html",
    "render_markdown",
]

CAUTION = (
    "Decision support only: it supports, and never replaces, clinical judgement; local laboratory ranges "
    "and protocols prevail."
)
EXAMPLES = 3
TOP_TRANSITIONS = 15


@dataclass
class ReviewDocument:
    identity: dict[str, Any]
    metadata: dict[str, Any]
    files: list[str]
    parameters: list[dict[str, Any]]
    derived: list[dict[str, Any]]
    steps: list[dict[str, Any]]  # {name, label, core, rules: [...]}
    changes: dict[str, Any] | None = None  # from rulediff, when since is given
    impact: dict[str, Any] | None = None  # when a corpus is given too
    cohorts: dict[str, Any] | None = None  # operating characteristics on the simulated cohorts
    cautions: list[str] = field(default_factory=list)
    base_intended_use: dict[str, Any] | None = None  # an overlay's base's, when it differs from the overlay's
    coverage: dict[str, str] | None = None  # rule and threshold coverage of the rulebook's suite


# ---------------------------------------------------------------- plain-language conditions

_TOKEN = re.compile(
    r"""\bknown\(\s*(?P<known>[A-Za-z_]\w*)\s*\)|\bhas\(\s*["'](?P<has>[^"']+)["']\s*\)"""
    r"""|(?P<quoted>"[^"]*"|'[^']*')|(?<![\w.])(?P<name>[A-Za-z_]\w*)(?!\w)(?!\s*\()"""
)
_WORDS = {"and", "or", "not", "if", "else", "True", "False"}


def _number(v: Any) -> str:
    return f"{v:g}" if isinstance(v, float) else str(v)


def _param_text(p: Any) -> str:
    unit = f" {p.unit}" if p.unit and p.unit != "1" else ""
    value = f"{_number(p.value)}{unit}"
    if p.by_values:
        value += " (" + ", ".join(f"{k}: {_number(v)}" for k, v in sorted(p.by_values.items())) + ")"
    return f"{p.label if p.label != p.name else p.name} [{value}]"


def condition_text(rb: Any, text: str | None) -> str:
    """``ph < ph_low and known(albumin)`` -> ``pH < ph_low [7.35 [pH] (venous: 7.3)] and Albumin is known``."""
    if not text:
        return "always (when its inputs are known)"

    def one(m: re.Match[str]) -> str:
        if m.group("known"):
            return f"{_label(rb, m.group('known'))} is known"
        if m.group("has"):
            return f"'{m.group('has')}' was concluded"
        word = m.group("name")
        if not word or word in _WORDS:
            return m.group(0)
        if word in rb.parameters:
            return _param_text(rb.parameters[word])
        return _label(rb, word)

    return _TOKEN.sub(one, text)


def _label(rb: Any, name: str) -> str:
    if name in rb.inputs:
        return rb.inputs[name].label or name
    if name in rb.derived:
        return rb.derived[name].label or name
    return name


# ---------------------------------------------------------------- building


def _where(loc: Any) -> str:
    return f"{loc.file}:{loc.line}" if getattr(loc, "line", 0) else str(getattr(loc, "file", ""))


def _entry_text(rb: Any, key: str) -> str:
    """A bibliography key as the reader sees it: the key and the publication it names."""
    entries = getattr(rb.bibliography, "entries", None) or {}
    return f"[{key}] {describe(entries[key])}" if key in entries else f"[{key}]"


def _citation(rb: Any, source: dict[str, Any]) -> str:
    """A parameter's source: its bibliography keys (with the publications) and its note."""
    parts = [_entry_text(rb, k) for k in keys_of(source.get("ref"))]
    if source.get("note"):
        parts.append(str(source["note"]))
    return "; ".join(parts)


def _reference(rb: Any, item: Any) -> str:
    """One of a rule's `doc.references`: a key, {ref, note} or {note}, as text."""
    if isinstance(item, str):
        return _entry_text(rb, item)
    text = _entry_text(rb, item["ref"]) if item.get("ref") else ""
    return f"{text} ({item['note']})" if text else str(item.get("note", ""))


def _parameters(rb: Any) -> list[dict[str, Any]]:
    rows = []
    for name, p in rb.parameters.items():
        rows.append(
            {
                "name": name,
                "label": p.label if p.label != name else "",
                "value": p.value,
                "unit": p.unit,
                "by": {"input": p.by_input, "values": dict(p.by_values)} if p.by_input else None,
                "bounds": list(p.bounds) if p.bounds else None,
                "choices": list(p.choices) if p.choices else None,
                "rationale": p.rationale,
                "citation": _citation(rb, p.source),
                "refs": keys_of(p.source.get("ref")),
                "evidence": p.source.get("evidence", ""),
                "set_by": _where(p.set_by),
                "declared_at": _where(p.location),
            }
        )
    return rows


def _rules(rb: Any) -> list[dict[str, Any]]:
    steps: dict[str, dict[str, Any]] = {
        n: {"name": n, "label": s.label, "core": s.core, "rules": []} for n, s in rb.steps.items()
    }
    for r in rb.rules:
        step = steps.setdefault(r.step, {"name": r.step, "label": r.step, "core": False, "rules": []})
        step["rules"].append(
            {
                "id": r.id,
                "title": r.title,
                "status": r.status,
                "suspended_reason": r.suspended_reason,
                "condition": r.when.text if r.when else "",
                "condition_text": condition_text(rb, r.when.text if r.when else None),
                "needs": sorted(r.needs),
                "stops": r.stop,
                "disorders": list(r.disorders),
                "qualifiers": dict(r.qualifiers),
                "findings": [{"code": f.code, "severity": f.severity, "text": f.text} for f in r.findings],
                "concludes": r.doc.get("concludes", ""),
                "why": r.doc.get("why", ""),
                "example": r.doc.get("example", ""),
                "references": [_reference(rb, item) for item in r.doc.get("references", [])],
                "where": _where(r.location),
            }
        )
    return [s for s in steps.values() if s["rules"]]


def build_document(
    rulebook_path: str | Path,
    *,
    since: str | Path | None = None,
    corpus: str | Path | None = None,
    workers: int = 1,
    cohorts: bool = False,
) -> ReviewDocument:
    """Everything the committee reads; RulebookError for a broken rulebook."""
    from gasrules.rulebook.build import load_rulebook

    rb = load_rulebook(rulebook_path)
    doc = ReviewDocument(
        identity=dict(rb.identity),
        metadata=dict(rb.metadata),
        files=list(rb.files),
        parameters=_parameters(rb),
        derived=[
            {
                "name": n,
                "label": d.label,
                "formula": d.expr.text,
                "unit": d.unit,
                "when": condition_text(rb, d.when.text) if d.when else "",
                "reported": d.report,
            }
            for n, d in rb.derived.items()
        ],
        steps=_rules(rb),
        cautions=list(rb.presentation.get("cautions") or [CAUTION]),
        base_intended_use=_base_intended_use(rulebook_path, rb.metadata.get("intended_use")),
        coverage=_coverage(rulebook_path, rb),
    )
    if since is not None:
        from gasrules.governance.diff import diff_paths

        d = diff_paths(since, rulebook_path)
        doc.changes = d.as_dict()
        if corpus is not None:
            doc.impact = impact_summary(load_rulebook(since), rb, corpus, workers=workers)
    if cohorts:
        from gasrules.verification.cohort_table import table_for

        doc.cohorts = table_for(rulebook_path, rb, workers=workers)
    return doc


def impact_summary(old: Any, new: Any, corpus: str | Path, *, workers: int = 1) -> dict[str, Any]:
    """Replay a corpus under both rulebooks: how many cases change disorders or findings, the
    largest disorder transitions with example ids. Streams; unreadable rows are counted."""
    from gasrules.tables.pool import interpret_many
    from gasrules.tables.readers import analytes_of, open_table

    total = unreadable = changed_disorders = changed_findings = 0
    transitions: Counter[tuple[str, str]] = Counter()
    examples: dict[tuple[str, str], list[str]] = {}
    rows: list[Any] = []

    def flush() -> None:
        nonlocal changed_disorders, changed_findings
        cases = [r.case for r in rows]
        for row, a, b in zip(
            rows, interpret_many(old, cases, workers, False), interpret_many(new, cases, workers, False)
        ):
            da, db = sorted(a.get("disorders") or []), sorted(b.get("disorders") or [])
            fa = sorted(f["code"] for f in a.get("findings") or [])
            fb = sorted(f["code"] for f in b.get("findings") or [])
            changed_findings += fa != fb
            if da != db:
                changed_disorders += 1
                key = (" + ".join(da) or "(none)", " + ".join(db) or "(none)")
                transitions[key] += 1
                ex = examples.setdefault(key, [])
                if len(ex) < EXAMPLES:
                    ex.append(str(row.case.get("case_id") or row.where))
        rows.clear()

    with open_table(corpus, analytes_of(new)) as table:
        for row in table:
            total += 1
            if row.errors:
                unreadable += 1
                continue
            rows.append(row)
            if len(rows) >= 2048:
                flush()
    flush()
    return {
        "corpus": str(corpus),
        "cases": total,
        "unreadable": unreadable,
        "changed_disorders": changed_disorders,
        "changed_findings": changed_findings,
        "transitions": [
            {"old": a, "new": b, "count": n, "examples": examples[(a, b)]}
            for (a, b), n in transitions.most_common(TOP_TRANSITIONS)
        ],
        "more_transitions": max(0, len(transitions) - TOP_TRANSITIONS),
    }


# ---------------------------------------------------------------- Markdown


def _md(v: Any) -> str:
    text = "" if v is None else (_number(v) if isinstance(v, (int, float)) else str(v))
    return text.replace("|", "\\|").replace("\n", " ")


def _value_cell(p: dict[str, Any]) -> str:
    text = f"{_md(p['value'])} {p['unit']}".strip()
    if p["by"]:
        text += (
            " ("
            + ", ".join(f"{k}: {_md(v)}" for k, v in sorted(p["by"]["values"].items()))
            + f"; by {p['by']['input']})"
        )
    return text


def _limits_cell(p: dict[str, Any]) -> str:
    if p["bounds"]:
        return f"{_md(p['bounds'][0])} to {_md(p['bounds'][1])}"
    if p["choices"]:
        return "one of " + ", ".join(p["choices"])
    return "none"


def _base_intended_use(path: str | Path, own: Any) -> dict[str, Any] | None:
    """The intended use of the base an overlay extends, when it differs from the overlay's."""
    from gasrules.rulebook.overlay import load_chain

    docs, problems = load_chain(path)
    if problems or len(docs) < 2:
        return None
    base = (docs[0].data.get("metadata") or {}).get("intended_use") or {}
    return dict(base) if base != (own or {}) else None


def _coverage(path: str | Path, rb: Any) -> dict[str, str] | None:
    """ "N covered + M declared unreachable of T" for rules and threshold sides, from the suite
    beside the rulebook (None when it has no cases)."""
    from gasrules.verification import suite as S

    loaded = S.load_suite(Path(path))
    if not loaded.files:
        return None
    results = S.run_suite(rb, loaded)
    rules = S.rule_coverage(rb, results, loaded.unreachable)
    sides = S.threshold_coverage(rb, results, loaded.unreachable)
    return {"rules": f"{rules['summary']} active rules", "thresholds": f"{sides['summary']} threshold sides"}


def _use_text(use: dict[str, Any]) -> str:
    parts = [f"{k}: {use[k]}" for k in ("population", "setting") if use.get(k)]
    if use.get("exclusions"):
        parts.append("exclusions: " + "; ".join(map(str, use["exclusions"])))
    return " | ".join(parts)


def _head(doc: ReviewDocument) -> list[tuple[str, str]]:
    md, ident = doc.metadata, doc.identity
    use = md.get("intended_use") or {}
    rows = [
        ("Rulebook", f"{ident['id']} {ident['version']}"),
        ("Title", str(md.get("title", ""))),
        ("Status", str(md.get("status", ""))),
        ("Effective date", str(md.get("effective_date", ""))),
        ("Content sha256", ident["sha256"]),
        ("Files", ", ".join(doc.files)),
    ]
    if use:
        rows += [("Population", str(use.get("population", ""))), ("Setting", str(use.get("setting", "")))]
        if use.get("exclusions"):
            rows.append(("Exclusions", "; ".join(map(str, use["exclusions"]))))
    if doc.base_intended_use is not None:
        rows.append(("Intended use of the base (differs)", _use_text(doc.base_intended_use)))
    if doc.coverage is not None:
        rows.append(("Rule coverage", doc.coverage["rules"]))
        rows.append(("Threshold coverage", doc.coverage["thresholds"]))
    owners = md.get("owners") or []
    if owners:
        rows.append(("Owners", "; ".join(f"{o.get('name')} ({o.get('role', '')})" for o in owners)))
    return rows


def render_markdown(doc: ReviewDocument) -> str:
    ident = doc.identity
    out = [f"# {doc.metadata.get('title', ident['id'])}: review document", ""]
    out += [f"> {c}" for c in doc.cautions] + [""]
    out += ["| | |", "|---|---|"] + [f"| {k} | {_md(v)} |" for k, v in _head(doc)] + [""]
    if doc.changes is not None:
        out += _md_changes(doc.changes, doc.impact)
    if doc.cohorts is not None:
        from gasrules.verification.cohort_table import render_markdown as cohorts_markdown

        out += ["## Simulated cohorts (operating characteristics)", "", cohorts_markdown(doc.cohorts)]
    out += [
        f"## Parameters ({len(doc.parameters)})",
        "",
        "| Parameter | Value | Guard rails | Source (evidence) | Set by | Rationale |",
        "|---|---|---|---|---|---|",
    ]
    for p in doc.parameters:
        name = f"`{p['name']}`" + (f" {_md(p['label'])}" if p["label"] else "")
        out.append(
            f"| {name} | {_value_cell(p)} | {_limits_cell(p)} | {_md(p['citation'])} ({p['evidence']}) | "
            f"{_md(p['set_by'])} | {_md(p['rationale'])} |"
        )
    out += [
        "",
        f"## Derived values ({len(doc.derived)})",
        "",
        "| Name | Formula | Unit | Computed when |",
        "|---|---|---|---|",
    ]
    out += [
        f"| `{d['name']}` {_md(d['label'])} | `{_md(d['formula'])}` | {_md(d['unit'])} | {_md(d['when']) or 'always'} |"
        for d in doc.derived
    ]
    out += ["", "## Rules", ""]
    for step in doc.steps:
        out += [
            f"### {step['label']} ({len(step['rules'])} rule(s){'; core step' if step['core'] else ''})",
            "",
        ]
        for r in step["rules"]:
            status = (
                ""
                if r["status"] == "active"
                else f" **[{r['status'].upper()}{': ' + r['suspended_reason'] if r['suspended_reason'] else ''}]**"
            )
            out += [f"#### `{r['id']}`: {r['title']}{status}", ""]
            if r["concludes"]:
                out.append(f"* **Concludes:** {r['concludes']}")
            if r["why"]:
                out.append(f"* **Why:** {r['why']}")
            out.append(f"* **When:** {r['condition_text']}")
            if r["condition"]:
                out.append(f"* **Condition as written:** `{r['condition']}`")
            if r["disorders"]:
                out.append("* **Disorders:** " + ", ".join(r["disorders"]))
            for f in r["findings"]:
                out.append(f"* **Finding** `{f['code']}` ({f['severity']}): {f['text']}")
            if r["example"]:
                out.append(f"* **Example:** {r['example']}")
            if r["references"]:
                out.append("* **References:** " + "; ".join(r["references"]))
            out += [f"* Defined at {r['where']}" + ("; stops later rules" if r["stops"] else ""), ""]
    return "\n".join(out).rstrip() + "\n"


def _md_changes(ch: dict[str, Any], impact: dict[str, Any] | None) -> list[str]:
    old, new = ch["old"], ch["new"]
    out = [
        f"## Changes since {old['id']} {old['version']}",
        "",
        f"* Change class: **{ch['required']}**; version {old['version']} -> {new['version']} ({ch['bump']} bump)",
        f"* Version check: {ch['version_error'] or 'the version bump covers the change'}",
        "* Changes: " + ", ".join(f"{n} {k}" for k, n in ch["counts"].items() if n and k != "none"),
        "",
    ]
    if ch["changes"]:
        out += ["| Class | Kind | Id | What | Old | New | Why |", "|---|---|---|---|---|---|---|"]
        out += [
            f"| {c['cls']} | {c['kind']} | `{_md(c['key'])}` | {_md(c['aspect'])} | {_md(_short(c['old']))} | "
            f"{_md(_short(c['new']))} | {_md(c['why'])} |"
            for c in ch["changes"]
        ]
        out.append("")
    if impact is not None:
        out += [
            f"### Impact on {impact['corpus']}",
            "",
            f"{impact['cases']:,} cases ({impact['unreadable']:,} unreadable, counted not dropped): "
            f"{impact['changed_disorders']:,} change their disorders, {impact['changed_findings']:,} their findings.",
            "",
        ]
        if impact["transitions"]:
            out += ["| Cases | Old disorders | New disorders | Examples |", "|---|---|---|---|"]
            out += [
                f"| {t['count']:,} | {_md(t['old'])} | {_md(t['new'])} | {_md(', '.join(t['examples']))} |"
                for t in impact["transitions"]
            ]
            if impact["more_transitions"]:
                out.append(f"| | ... {impact['more_transitions']} more transitions | | |")
            out.append("")
    return out


def _short(v: Any, width: int = 80) -> str:
    text = "" if v is None else (_number(v) if isinstance(v, (int, float)) else str(v))
    return text if len(text) <= width else text[: width - 3] + "..."


# ---------------------------------------------------------------- HTML

_STYLE = """body{font:15px/1.45 system-ui,sans-serif;max-width:1200px;margin:2em auto;padding:0 1em;color:#222}
table{border-collapse:collapse;width:100%;margin:.5em 0 1.5em}th,td{border:1px solid #ccc;padding:.3em .5em;
vertical-align:top;text-align:left}th{background:#f0f0f0}code{background:#f5f5f5;padding:0 .2em}
.caution{border-left:4px solid #b60;background:#fff6e8;padding:.5em 1em}.rule{border:1px solid #ddd;
padding:.5em 1em;margin:.8em 0}.suspended,.retired{background:#f7f0f0}.major{color:#a00;font-weight:bold}
.minor{color:#a60}.patch{color:#060}dt{font-weight:bold}dd{margin:0 0 .4em 1.5em}"""


def _e(v: Any) -> str:
    return html.escape("" if v is None else (_number(v) if isinstance(v, (int, float)) else str(v)))


def _table(head: list[str], rows: list[list[str]]) -> str:
    return (
        "<table><tr>"
        + "".join(f"<th>{h}</th>" for h in head)
        + "</tr>"
        + "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
        + "</table>"
    )


def render_html(doc: ReviewDocument) -> str:
    ident = doc.identity
    title = f"{doc.metadata.get('title', ident['id'])}: review document"
    parts = [
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
        f"<style>{_STYLE}</style></head><body><h1>{_e(title)}</h1>"
    ]
    parts += [f'<p class="caution">{_e(c)}</p>' for c in doc.cautions]
    parts.append(_table(["", ""], [[_e(k), _e(v)] for k, v in _head(doc)]))
    if doc.changes is not None:
        parts.append(_html_changes(doc.changes, doc.impact))
    if doc.cohorts is not None:
        from gasrules.verification.cohort_table import render_html as cohorts_html

        parts.append("<h2>Simulated cohorts (operating characteristics)</h2>" + cohorts_html(doc.cohorts))
    parts.append(f"<h2>Parameters ({len(doc.parameters)})</h2>")
    parts.append(
        _table(
            ["Parameter", "Value", "Guard rails", "Source (evidence)", "Set by", "Rationale"],
            [
                [
                    f"<code>{_e(p['name'])}</code> {_e(p['label'])}",
                    _e(_value_cell(p).replace("\\|", "|")),
                    _e(_limits_cell(p)),
                    f"{_e(p['citation'])} ({_e(p['evidence'])})",
                    _e(p["set_by"]),
                    _e(p["rationale"]),
                ]
                for p in doc.parameters
            ],
        )
    )
    parts.append(f"<h2>Derived values ({len(doc.derived)})</h2>")
    parts.append(
        _table(
            ["Name", "Formula", "Unit", "Computed when"],
            [
                [
                    f"<code>{_e(d['name'])}</code> {_e(d['label'])}",
                    f"<code>{_e(d['formula'])}</code>",
                    _e(d["unit"]),
                    _e(d["when"] or "always"),
                ]
                for d in doc.derived
            ],
        )
    )
    parts.append("<h2>Rules</h2>")
    for step in doc.steps:
        parts.append(
            f"<h3>{_e(step['label'])} ({len(step['rules'])} rule(s){'; core step' if step['core'] else ''})</h3>"
        )
        for r in step["rules"]:
            status = (
                ""
                if r["status"] == "active"
                else f" <strong>[{_e(r['status'].upper())}{': ' + _e(r['suspended_reason']) if r['suspended_reason'] else ''}]</strong>"
            )
            items = [
                ("Concludes", _e(r["concludes"])),
                ("Why", _e(r["why"])),
                ("When", _e(r["condition_text"])),
                ("Condition as written", f"<code>{_e(r['condition'])}</code>" if r["condition"] else ""),
                ("Disorders", _e(", ".join(r["disorders"]))),
            ]
            items += [(f"Finding {f['code']} ({f['severity']})", _e(f["text"])) for f in r["findings"]]
            items += [
                ("Example", _e(r["example"])),
                ("References", _e("; ".join(r["references"]))),
                ("Defined at", _e(r["where"]) + ("; stops later rules" if r["stops"] else "")),
            ]
            body = "".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in items if v)
            parts.append(
                f'<div class="rule {_e(r["status"])}" id="{_e(r["id"])}"><h4><code>{_e(r["id"])}</code>: '
                f"{_e(r['title'])}{status}</h4><dl>{body}</dl></div>"
            )
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _html_changes(ch: dict[str, Any], impact: dict[str, Any] | None) -> str:
    old, new = ch["old"], ch["new"]
    out = [
        f"<h2>Changes since {_e(old['id'])} {_e(old['version'])}</h2><ul>",
        f'<li>Change class: <span class="{_e(ch["required"])}">{_e(ch["required"])}</span>; version '
        f"{_e(old['version'])} &rarr; {_e(new['version'])} ({_e(ch['bump'])} bump)</li>",
        f"<li>Version check: {_e(ch['version_error'] or 'the version bump covers the change')}</li></ul>",
    ]
    if ch["changes"]:
        out.append(
            _table(
                ["Class", "Kind", "Id", "What", "Old", "New", "Why"],
                [
                    [
                        f'<span class="{_e(c["cls"])}">{_e(c["cls"])}</span>',
                        _e(c["kind"]),
                        f"<code>{_e(c['key'])}</code>",
                        _e(c["aspect"]),
                        _e(_short(c["old"])),
                        _e(_short(c["new"])),
                        _e(c["why"]),
                    ]
                    for c in ch["changes"]
                ],
            )
        )
    if impact is not None:
        out.append(
            f"<h3>Impact on {_e(impact['corpus'])}</h3><p>{impact['cases']:,} cases ({impact['unreadable']:,} "
            f"unreadable, counted not dropped): {impact['changed_disorders']:,} change their disorders, "
            f"{impact['changed_findings']:,} their findings.</p>"
        )
        if impact["transitions"]:
            out.append(
                _table(
                    ["Cases", "Old disorders", "New disorders", "Examples"],
                    [
                        [f"{t['count']:,}", _e(t["old"]), _e(t["new"]), _e(", ".join(t["examples"]))]
                        for t in impact["transitions"]
                    ],
                )
            )
    return "\n".join(out)
