"""Shadow mode: a candidate rulebook runs beside the active one; disagreements are recorded.

Only the active result is ever shown (:class:`gasrules.governance.runtime.Runtime` returns it); the
candidate's conclusions are compared with :func:`gasrules.governance.audit.compare_results` (status,
disorders, qualifiers, finding codes, values, errors) and each case where they differ becomes one
line in the disagreement log (JSON Lines, appended and flushed under a lock)::

    kind "disagreement" · time · case_id · input (context policy applied) · input_sha256
    active    {rulebook {id, version, sha256}, status, disorders, qualifiers, findings [codes]}
    candidate {the same for the candidate}
    differences [{field, active, candidate}]

:func:`summarize` reads a log back: disagreements by field, disorder-set transitions with counts
and example case ids, and the rulebook pairs involved; :func:`render_summary` prints it.
"""

from __future__ import annotations

import fcntl
import json
import os
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from gasrules.governance.decision_log import RecordConfig, apply_context_policy, record_json, sha256_hex

__all__ = ["ShadowRecorder", "ShadowSummary", "disagreement", "render_summary", "summarize"]

EXAMPLES_PER_TRANSITION = 5


def _brief(result: Mapping[str, Any]) -> dict[str, Any]:
    return {
        "rulebook": result.get("rulebook"),
        "status": result.get("status"),
        "disorders": sorted(result.get("disorders") or []),
        "qualifiers": dict(result.get("qualifiers") or {}),
        "findings": sorted(
            str(f.get("code")) for f in result.get("findings") or [] if isinstance(f, Mapping)
        ),
    }


def disagreement(
    case: Any, active: Mapping[str, Any], candidate: Mapping[str, Any], config: RecordConfig | None = None
) -> dict[str, Any] | None:
    """The disagreement record for one case, or None when the two conclusions agree. Pure
    except for the time stamp."""
    from gasrules.governance.audit import compare_results

    diffs = compare_results(active, candidate)
    if not diffs:
        return None
    logged, _ = apply_context_policy(case, config) if config is not None else (case, [])
    return {
        "kind": "disagreement",
        "time": datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z"),
        "case_id": active.get("case_id"),
        "input": logged,
        "input_sha256": sha256_hex(record_json(logged, "input")),
        "active": _brief(active),
        "candidate": _brief(candidate),
        "differences": [{"field": d.field, "active": d.logged, "candidate": d.replayed} for d in diffs],
    }


class ShadowRecorder:
    """Counts compared cases and appends disagreements to ``path`` (None: count only)."""

    def __init__(self, path: str | os.PathLike[str] | None, config: RecordConfig | None = None):
        self.path = Path(path) if path is not None else None
        self.config = config or RecordConfig()
        self.compared = 0
        self.disagreements = 0
        self._fd = -1
        if self.path is not None:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)

    def observe(
        self, case: Any, active: Mapping[str, Any], candidate: Mapping[str, Any]
    ) -> dict[str, Any] | None:
        self.compared += 1
        record = disagreement(case, active, candidate, self.config)
        if record is None:
            return None
        self.disagreements += 1
        if self._fd >= 0:
            line = record_json(record, "disagreement") + b"\n"
            fcntl.flock(self._fd, fcntl.LOCK_EX)
            try:
                view = memoryview(line)
                while view:
                    view = view[os.write(self._fd, view) :]
                if self.config.fsync:
                    os.fsync(self._fd)
            finally:
                fcntl.flock(self._fd, fcntl.LOCK_UN)
        return record

    def close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1


@dataclass
class ShadowSummary:
    path: str
    disagreements: int = 0
    unreadable_lines: list[int] = field(default_factory=list)
    by_field: Counter[str] = field(default_factory=Counter)
    transitions: Counter[tuple[str, str]] = field(default_factory=Counter)
    examples: dict[tuple[str, str], list[str]] = field(default_factory=dict)
    rulebooks: Counter[tuple[str, str]] = field(default_factory=Counter)
    same_disorders: int = 0  # disagreements on findings, values or status only

    def as_dict(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "disagreements": self.disagreements,
            "same_disorders": self.same_disorders,
            "unreadable_lines": self.unreadable_lines,
            "by_field": dict(self.by_field.most_common()),
            "transitions": [
                {"active": a, "candidate": c, "count": n, "examples": self.examples[(a, c)]}
                for (a, c), n in self.transitions.most_common()
            ],
            "rulebooks": [
                {"active": a, "candidate": c, "count": n} for (a, c), n in self.rulebooks.most_common()
            ],
        }


def _label(brief: Mapping[str, Any]) -> str:
    disorders = brief.get("disorders") or []
    status = brief.get("status")
    return " + ".join(disorders) if disorders else f"(no disorder; {status})"


def _name(brief: Mapping[str, Any]) -> str:
    rb = brief.get("rulebook") or {}
    return f"{rb.get('id')} {rb.get('version')} ({str(rb.get('sha256', ''))[:12]})"


def summarize(path: str | os.PathLike[str]) -> ShadowSummary:
    """Read a disagreement log; an unreadable line is counted and named, never skipped silently."""
    summary = ShadowSummary(str(path))
    with open(path, "rb") as fh:
        for number, raw in enumerate(fh, 1):
            try:
                rec = json.loads(raw)
                active, candidate = rec["active"], rec["candidate"]
                fields = [d["field"] for d in rec["differences"]]
            except (ValueError, KeyError, TypeError):
                summary.unreadable_lines.append(number)
                continue
            summary.disagreements += 1
            summary.by_field.update(f.split(".")[0] for f in fields)
            key = (_label(active), _label(candidate))
            if key[0] == key[1]:
                summary.same_disorders += 1
            else:
                summary.transitions[key] += 1
                examples = summary.examples.setdefault(key, [])
                if len(examples) < EXAMPLES_PER_TRANSITION:
                    examples.append(str(rec.get("case_id") or f"line {number}"))
            summary.rulebooks[(_name(active), _name(candidate))] += 1
    return summary


def render_summary(summary: ShadowSummary) -> str:
    lines = [f"{summary.path}: {summary.disagreements} disagreement(s)"]
    if summary.unreadable_lines:
        shown = ", ".join(map(str, summary.unreadable_lines[:10]))
        lines.append(f"  unreadable lines ({len(summary.unreadable_lines)}): {shown}")
    for (a, c), n in summary.rulebooks.most_common():
        lines.append(f"  active {a} vs candidate {c}: {n}")
    if summary.by_field:
        lines.append("  differing: " + ", ".join(f"{k} {n}" for k, n in summary.by_field.most_common()))
    if summary.same_disorders:
        lines.append(f"  same disorders, other differences: {summary.same_disorders}")
    if summary.transitions:
        lines.append("  disorder transitions (active -> candidate):")
        for (a, c), n in summary.transitions.most_common():
            lines.append(f"    {n:>6}  {a} -> {c}   e.g. {', '.join(summary.examples[(a, c)])}")
    return "\n".join(lines)
