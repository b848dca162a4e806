"""The release directory: approved manifests, the suspension register and the rulebook archive.

Layout (all plain files, readable without gasrules)::

    <release dir>/manifests/<id>-<version>-<sha256[:12]>.json   one approved release each
    <release dir>/suspensions.jsonl                                hash-chained suspend/lift events
    <archive>/<sha256>/rulebook.yaml                               the resolved rulebook, flattened
    <archive>/<sha256>/identity.json                               {id, version, sha256, files, archived}

A manifest carries ``manifest_sha256`` (sha256 of its canonical JSON without that field); one that
does not hash to it is reported as damaged and never counts as an approval. Suspension events
chain like decision records (``prev`` = the previous event's ``event_sha256``); a broken chain
makes the register unreadable (:class:`RegistryError`), so an edited register fails closed.

The archive stores the *resolved* rulebook (overlays applied) as one self-contained YAML file
whose identity hash equals the original's; archiving checks that by loading it back. A rule
suspension is applied by archiving a variant: the approved rulebook's resolved content plus a
``suspend`` list, which the engine evaluates as suspended rules (trace outcome ``suspended``).
The variant has its own sha256, named in the suspension event and in every decision record
made under it, so replay finds it in the archive.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.governance.decision_log import ZERO_SHA, record_json, sha256_hex

__all__ = [
    "ManifestEntry",
    "RegistryError",
    "SuspensionState",
    "append_suspension",
    "approvals_for",
    "archive_loader",
    "archive_rulebook",
    "flatten_resolved",
    "load_archived",
    "manifest_hash",
    "read_manifests",
    "read_suspensions",
    "suspension_state",
    "utc_now",
    "write_manifest",
]

MANIFEST_FORMAT = "gasrules-release/1"


class RegistryError(EngineError):
    """The release directory or archive cannot be used as asked. ``code`` is stable."""

    def __init__(self, code: str, message: str, where: str = ""):
        self.code, self.where = code, where
        super().__init__(f"{where + ': ' if where else ''}{code}: {message}")


def utc_now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


# ---------------------------------------------------------------- manifests


def manifest_hash(manifest: dict[str, Any]) -> str:
    return sha256_hex(record_json({k: v for k, v in manifest.items() if k != "manifest_sha256"}))


def manifests_dir(release_dir: Path) -> Path:
    return Path(release_dir) / "manifests"


def write_manifest(release_dir: Path, manifest: dict[str, Any]) -> Path:
    """Seal (add manifest_sha256) and write a new manifest; never overwrites one. A manifest
    written now records the identity hash scheme of its sha256 (``hash_scheme``)."""
    from gasrules.rulebook.identity import HASH_SCHEME

    rb = manifest["rulebook"]
    sealed = {"hash_scheme": HASH_SCHEME, **manifest}
    sealed["manifest_sha256"] = manifest_hash(sealed)
    target = manifests_dir(release_dir) / f"{_safe(rb['id'])}-{_safe(rb['version'])}-{rb['sha256'][:12]}.json"
    target.parent.mkdir(parents=True, exist_ok=True)
    data = json.dumps(sealed, indent=2, sort_keys=True, ensure_ascii=False).encode("utf-8") + b"\n"
    try:
        with open(target, "xb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except FileExistsError:
        raise RegistryError(
            "release.exists",
            "this rulebook version and content is already released; a release is never rewritten",
            str(target),
        ) from None
    return target


def _safe(text: str) -> str:
    return "".join(c if c.isalnum() or c in "._-" else "_" for c in str(text))


@dataclass(frozen=True)
class ManifestEntry:
    path: Path
    manifest: dict[str, Any]
    problem: str = ""  # "" when the manifest is intact

    @property
    def rulebook(self) -> dict[str, Any]:
        rb = self.manifest.get("rulebook")
        return rb if isinstance(rb, dict) else {}


def read_manifests(release_dir: Path) -> list[ManifestEntry]:
    """Every manifest, oldest first (by its date, then file name), each checked against its hash."""
    out: list[ManifestEntry] = []
    folder = manifests_dir(release_dir)
    if not folder.is_dir():
        return out
    for path in sorted(folder.glob("*.json")):
        try:
            data = json.loads(path.read_bytes())
        except (OSError, ValueError) as exc:
            out.append(ManifestEntry(path, {}, f"unreadable: {exc}"))
            continue
        if not isinstance(data, dict) or not isinstance(data.get("rulebook"), dict):
            out.append(ManifestEntry(path, data if isinstance(data, dict) else {}, "not a release manifest"))
            continue
        problem = (
            ""
            if data.get("manifest_sha256") == manifest_hash(data)
            else "does not match its manifest_sha256 (edited after release)"
        )
        out.append(ManifestEntry(path, data, problem))
    out.sort(key=lambda e: (str(e.manifest.get("date", "")), e.path.name))
    return out


def manifest_scheme(entry: ManifestEntry) -> int:
    """The identity hash scheme a manifest's sha256 was made under (1 when it says none)."""
    scheme = entry.manifest.get("hash_scheme", 1)
    return scheme if isinstance(scheme, int) and not isinstance(scheme, bool) else 0


def approvals_for(
    release_dir: Path, sha256: str, *, legacy_sha256: str = "", archive: Path | None = None
) -> tuple[ManifestEntry | None, list[ManifestEntry]]:
    """(the intact manifest approving ``sha256`` or None, every manifest read).

    A manifest made under hash scheme 1 (``legacy_sha256``, which covered inputs, parameters,
    derived values and rules only) approves the rulebook only when the resolved rulebook archived
    at that release has, under today's scheme, the same ``sha256``: what was approved, every
    text and label included, is what runs."""
    from gasrules.rulebook.identity import HASH_SCHEME

    entries = read_manifests(release_dir)
    for entry in entries:
        if entry.problem:
            continue
        got, scheme = entry.rulebook.get("sha256"), manifest_scheme(entry)
        if scheme == HASH_SCHEME and got == sha256:
            return entry, entries
        if scheme == 1 and legacy_sha256 and got == legacy_sha256 and archive is not None:
            try:
                archived = load_archived(archive, legacy_sha256)
            except (LookupError, RegistryError, EngineError):
                continue
            if archived.sha256 == sha256:
                return entry, entries
    return None, entries


# ---------------------------------------------------------------- archive


def flatten_resolved(res: Any, extra_suspensions: Iterable[tuple[str, str]] = ()) -> dict[str, Any]:
    """One self-contained rulebook document with the resolved content of ``res``."""
    from gasrules.rulebook.identity import resolved_document

    return resolved_document(res, extra_suspensions)


def archive_rulebook(
    archive: Path, rulebook_path: Path, extra_suspensions: Iterable[tuple[str, str]] = ()
) -> str:
    """Store the resolved rulebook (plus any extra rule suspensions); return its sha256.

    The stored file is loaded back and must have the sha256 it is filed under.
    """
    import yaml

    from gasrules.rulebook.build import load_rulebook
    from gasrules.rulebook.overlay import resolve_path

    res = resolve_path(Path(rulebook_path))
    doc = flatten_resolved(res, list(extra_suspensions))
    bibliography = _merged_bibliography(res)
    if bibliography is not None:
        doc["bibliography"] = "bibliography.yaml"  # archived beside the rulebook: same identity
    archive = Path(archive)
    archive.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=".incoming-", dir=archive))
    try:
        text = yaml.safe_dump(doc, sort_keys=False, allow_unicode=True, width=100)
        (tmp / "rulebook.yaml").write_text(
            "# Resolved rulebook archived by gasrules: do not edit.\n" + text, encoding="utf-8"
        )
        if bibliography is not None:
            (tmp / "bibliography.yaml").write_text(
                "# Bibliography of the archived rulebook: do not edit.\n"
                + yaml.safe_dump(bibliography, sort_keys=False, allow_unicode=True, width=100),
                encoding="utf-8",
            )
        rb = load_rulebook(tmp / "rulebook.yaml", cache=False)
        identity = {**rb.identity, "files": [d.file for d in res.documents], "archived": utc_now()}
        (tmp / "identity.json").write_text(json.dumps(identity, indent=2) + "\n", encoding="utf-8")
        target = archive / rb.sha256
        if target.exists():
            load_archived(archive, rb.sha256)  # already there: it must still be intact
        else:
            os.rename(tmp, target)
        return rb.sha256
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


def _merged_bibliography(res: Any) -> dict[str, Any] | None:
    """The entries every bibliography of the chain declares, as one bibliography document (None: none)."""
    from gasrules.core.errors import RulebookError
    from gasrules.rulebook.bibliography import load_bibliographies

    bib, problems = load_bibliographies(res.documents)
    if problems:
        raise RulebookError(problems)
    return {"format": "gasrules-bibliography/1", "entries": bib.entries} if bib.entries else None


def load_archived(archive: Path, sha256: str) -> Any:
    """The archived rulebook with this sha256. LookupError when absent; RegistryError when altered."""
    from gasrules.rulebook.build import load_rulebook

    if len(sha256) != 64 or any(c not in "0123456789abcdef" for c in sha256):
        raise LookupError(f"{sha256!r} is not a sha256")
    path = Path(archive) / sha256 / "rulebook.yaml"
    if not path.is_file():
        raise LookupError(f"no archived rulebook {sha256[:12]}... in {archive}")
    rb = load_rulebook(path)
    if not rb.matches_sha256(sha256):  # filed under scheme 2, or under scheme 1 before it
        raise RegistryError(
            "archive.altered", f"the archived file now hashes to {rb.sha256[:12]}...", str(path)
        )
    return rb


def archive_loader(archive: Path) -> Any:
    """A ``sha256 -> rulebook`` function for :func:`gasrules.governance.audit.replay_log`."""
    return lambda sha: load_archived(archive, sha)


# ---------------------------------------------------------------- suspension register


def register_path(release_dir: Path) -> Path:
    return Path(release_dir) / "suspensions.jsonl"


def read_suspensions(release_dir: Path) -> list[dict[str, Any]]:
    """Every suspend/lift event in order; RegistryError if the register was edited."""
    path = register_path(release_dir)
    if not path.exists():
        return []
    events: list[dict[str, Any]] = []
    prev = ZERO_SHA
    with open(path, "rb") as fh:
        for number, raw in enumerate(fh, 1):
            where = f"{path}:{number}"
            try:
                event = json.loads(raw)
            except ValueError:
                raise RegistryError("suspensions.damaged", "line is not JSON", where) from None
            if not isinstance(event, dict) or event.get("prev") != prev:
                raise RegistryError(
                    "suspensions.damaged",
                    "the chain is broken (an event was edited, removed or reordered)",
                    where,
                )
            if sha256_hex(record_json({k: v for k, v in event.items() if k != "event_sha256"})) != event.get(
                "event_sha256"
            ):
                raise RegistryError("suspensions.damaged", "event does not match its event_sha256", where)
            prev = event["event_sha256"]
            events.append(event)
    return events


def append_suspension(release_dir: Path, event: dict[str, Any]) -> dict[str, Any]:
    """Chain and append one event (under an exclusive lock); returns the sealed event."""
    import fcntl

    path = register_path(release_dir)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "ab") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            events = read_suspensions(release_dir)
            sealed = {
                **event,
                "seq": len(events) + 1,
                "prev": events[-1]["event_sha256"] if events else ZERO_SHA,
            }
            sealed["event_sha256"] = sha256_hex(record_json(sealed))
            fh.write(record_json(sealed) + b"\n")
            fh.flush()
            os.fsync(fh.fileno())
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
    return sealed


@dataclass(frozen=True)
class SuspensionState:
    """What is suspended for one approved rulebook (by its sha256)."""

    sha256: str
    rulebook_reason: str = ""  # non-empty: the whole rulebook is suspended
    rulebook_event: dict[str, Any] = field(default_factory=dict)
    rules: dict[str, str] = field(default_factory=dict)  # rule id -> reason
    variant_sha256: str = ""  # archived rulebook with those rules suspended

    @property
    def suspended(self) -> bool:
        return bool(self.rulebook_reason)


def suspension_state(events: Iterable[dict[str, Any]], sha256: str) -> SuspensionState:
    """Fold the events for ``sha256`` (suspend/lift of the rulebook or of single rules)."""
    reason, event_of, rules, variant = "", {}, {}, ""
    for e in events:
        if e.get("rulebook", {}).get("sha256") != sha256:
            continue
        rule, action = e.get("rule"), e.get("action")
        if rule:
            if action == "suspend":
                rules[rule] = str(e.get("reason", ""))
            else:
                rules.pop(rule, None)
            variant = str(e.get("variant_sha256") or "")
        elif action == "suspend":
            reason, event_of = str(e.get("reason", "")), e
        else:
            reason, event_of = "", {}
    return SuspensionState(sha256, reason, event_of, rules, variant if rules else "")
