"""Stage 5: render results, traces and rulebook problems for people.

Pure functions from data to text. The JSON contract is the result dict itself; this module
only makes it readable: the headline first, critical findings first, values in the
rulebook's display units, what could not be assessed, then the cautions.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from gasrules.core import units as U
from gasrules.core.errors import Problem
from gasrules.core.model import CompiledRulebook
from gasrules.evaluation.evaluator import format_quantity

_MARK = {"critical": "!!", "warning": " !", "info": "  "}


def render_result(rb: CompiledRulebook, result: dict[str, Any], trace: bool = False) -> str:
    lines = [f"{_status_word(result['status'])}: {result['headline']}"]
    if result.get("case_id"):
        lines[0] = f"[{result['case_id']}] " + lines[0]
    if result["errors"]:
        lines.append("")
        lines.append("Input errors:")
        for e in result["errors"]:
            lines.append(f"  - {e['field'] or '(case)'}: {e['message']} (accepted: {e['accepted']})")
    if result["values"]:
        lines.append("")
        lines.append("Values:")
        width = max(len(_label(rb, n)) for n in result["values"])
        for name, value in result["values"].items():
            unit = result["units"].get(name, "")
            precision = rb.derived[name].precision if name in rb.derived else 2
            lines.append(f"  {_label(rb, name).ljust(width)}  {format_quantity(rb, value, unit, precision)}")
    if result["findings"]:
        lines.append("")
        lines.append("Findings:")
        for f in result["findings"]:
            lines.append(f"  {_MARK.get(f['severity'], '  ')} {f['text']}  [{f['code']}]")
    if result["not_assessed"]:
        lines.append("")
        lines.append("Not assessed:")
        for n in result["not_assessed"]:
            lines.append(f"  - {n['what']}: {n['why']}")
    lines.append("")
    lines.append("Cautions:")
    for c in result["cautions"]:
        lines.append(f"  * {c}")
    rbid = result["rulebook"]
    lines.append("")
    lines.append(
        f"Rulebook {rbid['id']} {rbid['version']} (sha256 {rbid['sha256'][:12]}), engine {result['engine_version']}"
    )
    if trace:
        lines.append("")
        lines.append(render_trace(result["trace"]))
    return "\n".join(lines)


def _status_word(status: str) -> str:
    return {
        "interpreted": "INTERPRETED",
        "partial": "PARTIAL",
        "inconsistent": "INCONSISTENT",
        "rejected": "REJECTED",
    }.get(status, status.upper())


def _label(rb: CompiledRulebook, name: str) -> str:
    d = rb.derived.get(name)
    return d.label if d is not None else name


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def render_trace(events: Iterable[dict[str, Any]], only: Iterable[str] | None = None) -> str:
    """The trace in words: one block per rule, in evaluation order."""
    wanted = set(only) if only is not None else None
    lines = ["Trace (every rule, in evaluation order):"]
    for ev in events:
        if wanted is not None and ev["rule"] not in wanted:
            continue
        lines.append(f"  {ev['outcome'].upper():<22} {ev['rule']}  ({ev['title']})")
        reads = ev.get("reads") or {}
        if reads:
            lines.append(
                "      read: "
                + ", ".join(f"{k}={_fmt(v) if v is not None else 'missing'}" for k, v in reads.items())
            )
        for name, p in (ev.get("parameters") or {}).items():
            sel = f", {p['selected_by']}" if "selected_by" in p else ""
            lines.append(
                f"      param {name}={_fmt(p['value'])} {U.label(p['unit'])}".rstrip()
                + f"  (set at {p['set_by']}{sel})"
            )
        for c in ev.get("comparisons") or []:
            if c["compared"] is None:
                lines.append(
                    f"      compare {c['quantity']} {c['op']} {c['threshold']}: {c['quantity']} unavailable"
                )
                continue
            shown = _fmt(c["compared"])
            full = "" if c["value"] == c["compared"] else f" (full value {_fmt(c['value'])})"
            state = ("not evaluated" if c.get("holds") is None else ("true" if c["holds"] else "false")) + (
                ", decisive" if c.get("decisive") else ""
            )
            lines.append(
                f"      compare {c['quantity']} {shown}{full} {c['op']} {c['threshold']} {_fmt(c['threshold_value'])}"
                f": {state}; margin {_fmt(c['margin']) if c['margin'] is not None else 'n/a'}"
            )
        if ev.get("missing"):
            lines.append("      missing: " + ", ".join(ev["missing"]))
        if ev.get("reason"):
            lines.append("      reason: " + ev["reason"])
        if ev.get("asserted"):
            lines.append("      asserted: " + ", ".join(ev["asserted"]))
    return "\n".join(lines)


def render_problems(problems: list[Problem], rulebook: str) -> str:
    errors = [p for p in problems if not p.is_warning]
    warnings = [p for p in problems if p.is_warning]
    lines = []
    if errors:
        lines.append(f"{len(errors)} error(s):")
        lines += ["  " + p.render() for p in errors]
    if warnings:
        if lines:
            lines.append("")
        lines.append(f"{len(warnings)} warning(s):")
        lines += ["  " + p.render() for p in warnings]
    if not lines:
        lines.append(f"{rulebook}: no problems found")
    return "\n".join(lines)
