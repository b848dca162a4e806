"""The identity of a rulebook: what its sha256 covers, under each hash scheme.

Scheme 2 (now): the whole resolved rulebook (:func:`resolved_document`, what the archive
stores) except ``metadata.status`` and ``metadata.changelog``, as canonical JSON (sorted keys,
no insignificant whitespace, every number a float so that 12 and 12.0 hash alike). Scheme 1
(before): inputs, parameters, derived values, rules and suspensions only; still computed
(``CompiledRulebook.sha256_v1``) so that releases, archives and decision records made under it
verify and replay.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    from gasrules.rulebook.overlay import Resolved

__all__ = [
    "HASH_SCHEME",
    "LIFECYCLE_METADATA",
    "canonical_content",
    "identity_content",
    "identity_hash",
    "identity_json",
    "resolved_document",
]

HASH_SCHEME = 2
"""Identity hash scheme of rulebooks compiled now. 1 (before): inputs, parameters, derived values,
rules and suspensions only. 2: the whole resolved rulebook except lifecycle metadata."""
LIFECYCLE_METADATA = ("status", "changelog")


def resolved_document(res: Resolved, extra_suspensions: Iterable[tuple[str, str]] = ()) -> dict[str, Any]:
    """One self-contained rulebook document with the resolved content of ``res`` (what the
    archive stores and what identity scheme 2 hashes)."""
    doc: dict[str, Any] = {"format": "gasrules/1", "metadata": res.metadata}
    if res.display_units:
        doc["display_units"] = res.display_units
    for section in ("steps", "inputs", "parameters", "derived"):
        doc[section] = {name: body for name, (body, _ref) in getattr(res, section).items()}
    doc["rules"] = [body for body, _ref in res.rules]
    suspend = [{"rule": rule, "reason": why} for rule, why, _ref in res.suspensions]
    suspend += [{"rule": rule, "reason": why} for rule, why in extra_suspensions]
    if suspend:
        doc["suspend"] = suspend
    if res.presentation:
        doc["presentation"] = res.presentation
    constraints = getattr(res, "constraints", None)
    if constraints:
        doc["constraints"] = [body for body, _ref in constraints]
    return doc


def identity_content(res: Resolved) -> dict[str, Any]:
    """What the identity hash (scheme 2) covers: everything a user can see or that decides a
    result, i.e. the whole resolved rulebook except lifecycle metadata (status, changelog).
    Release and approval records live in manifests, outside the rulebook."""
    doc = dict(resolved_document(res))
    doc.pop("format", None)
    doc["metadata"] = {k: v for k, v in res.metadata.items() if k not in LIFECYCLE_METADATA}
    return doc


def canonical_content(res: Resolved) -> dict[str, Any]:
    """What identity scheme 1 covered (kept so releases and records made under it still verify)."""
    rules = []
    for body, _ in res.rules:
        r = dict(body)
        if r.get("id") in {s for s, _, _ in res.suspensions}:
            r["status"] = "suspended"
        rules.append(r)
    return {
        "id": res.metadata["id"],
        "version": str(res.metadata["version"]),
        "inputs": {k: b for k, (b, _) in res.inputs.items()},
        "parameters": {k: b for k, (b, _) in res.parameters.items()},
        "derived": {k: b for k, (b, _) in res.derived.items()},
        "rules": rules,
        "suspensions": [{"rule": s, "reason": why} for s, why, _ in res.suspensions],
    }


def identity_json(data: Any) -> bytes:
    """The JSON a rulebook's identity hash is taken over (records use their own encoding,
    ``decision_log.record_json``): sorted keys, no insignificant whitespace, and every number
    as a float, so that 12 and 12.0 (the same value written two ways) give the same identity."""
    return json.dumps(
        _numbers(data), sort_keys=True, separators=(",", ":"), ensure_ascii=False, default=str
    ).encode("utf-8")


def _numbers(data: Any) -> Any:
    if isinstance(data, dict):
        return {k: _numbers(v) for k, v in data.items()}
    if isinstance(data, list):
        return [_numbers(v) for v in data]
    if isinstance(data, int) and not isinstance(data, bool):
        return float(data)
    return data


def identity_hash(res: Resolved, scheme: int = HASH_SCHEME) -> str:
    content = identity_content(res) if scheme == 2 else canonical_content(res)
    return hashlib.sha256(identity_json(content)).hexdigest()
