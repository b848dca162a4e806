"""Suspend or reinstate a rule or a whole rulebook, with a recorded reason.

The event goes to the suspension register of the release directory (hash-chained,
:mod:`gasrules.governance.registry`). A whole-rulebook suspension makes every runtime refuse that rulebook
(exit code 6) until it is lifted. Suspending single rules archives a variant of the rulebook
with those rules suspended (the engine then reports them as ``suspended`` in the trace and draws
no conclusion from them); the runtime uses that variant while the suspension stands.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.governance.registry import (
    SuspensionState,
    append_suspension,
    archive_rulebook,
    read_suspensions,
    suspension_state,
    utc_now,
)

__all__ = ["SuspensionError", "change_suspension", "current_state", "render_state"]

MIN_REASON = 10


class SuspensionError(EngineError):
    def __init__(self, code: str, message: str):
        self.code = code
        super().__init__(f"{code}: {message}")


def current_state(rulebook_path: str | Path, release_dir: str | Path) -> tuple[Any, SuspensionState]:
    from gasrules.rulebook.build import load_rulebook

    rb = load_rulebook(rulebook_path)
    return rb, suspension_state(read_suspensions(Path(release_dir)), rb.sha256)


def change_suspension(
    rulebook_path: str | Path,
    *,
    release_dir: str | Path,
    reason: str,
    by: str,
    rule: str | None = None,
    lift: bool = False,
    archive: str | Path | None = None,
    now: Callable[[], str] = utc_now,
) -> dict[str, Any]:
    """Record one suspend (or, with ``lift``, reinstate) event; returns the sealed event."""
    release_dir = Path(release_dir)
    archive_dir = Path(archive) if archive is not None else release_dir / "archive"
    if len(reason.strip()) < MIN_REASON:
        raise SuspensionError(
            "suspension.reason",
            f"give a reason of at least {MIN_REASON} characters (what was seen, and what happens next)",
        )
    if not by.strip():
        raise SuspensionError("suspension.by", "name who decided (--by)")
    rb, state = current_state(rulebook_path, release_dir)
    event: dict[str, Any] = {
        "action": "lift" if lift else "suspend",
        "rulebook": rb.identity,
        "rule": rule,
        "reason": reason.strip(),
        "by": by.strip(),
        "time": now(),
    }
    what = f"rulebook {rb.id} {rb.version}"
    if rule is None:
        if lift and not state.suspended:
            raise SuspensionError("suspension.not_suspended", f"{what} is not suspended")
        if not lift and state.suspended:
            raise SuspensionError(
                "suspension.already", f"{what} is already suspended: {state.rulebook_reason}"
            )
        return append_suspension(release_dir, event)
    spec = {r.id: r for r in rb.rules}.get(rule)
    if spec is None:
        raise SuspensionError("suspension.unknown_rule", f"{what} has no rule {rule!r}")
    if spec.status != "active":
        raise SuspensionError("suspension.not_active", f"rule {rule} is {spec.status} in the rulebook itself")
    rules = dict(state.rules)
    if lift:
        if rule not in rules:
            raise SuspensionError("suspension.not_suspended", f"rule {rule} of {what} is not suspended")
        del rules[rule]
    else:
        if rule in rules:
            raise SuspensionError("suspension.already", f"rule {rule} is already suspended: {rules[rule]}")
        rules[rule] = reason.strip()
    archive_rulebook(archive_dir, Path(rulebook_path))  # the rulebook itself, for replay
    if rules:
        event["variant_sha256"] = archive_rulebook(archive_dir, Path(rulebook_path), sorted(rules.items()))
    return append_suspension(release_dir, event)


def render_state(rb: Any, state: SuspensionState) -> str:
    head = f"{rb.id} {rb.version} (sha256 {rb.sha256[:16]}...)"
    lines = [f"{head}: " + (f"SUSPENDED: {state.rulebook_reason}" if state.suspended else "in service")]
    for rule, why in sorted(state.rules.items()):
        lines.append(f"  rule {rule} suspended: {why}")
    if state.rules:
        lines.append(f"  running as variant {state.variant_sha256[:16]}...")
    return "\n".join(lines)
