"""Decision-log audit: verify the chain and anchor, repair a crashed log, replay decisions.

The log format and its writer are in :mod:`gasrules.governance.decision_log`. :func:`verify_log` reads a log and
names every problem with its line (never raises on a damaged log); :func:`repair_log` makes a
crashed log appendable again and records what it did in a chained entry; :func:`replay_log`
re-runs each decision with the rulebook it names and reports changed conclusions
(:func:`compare_results`); ``render_*`` give the text the CLI prints.

Limits: the chain detects edits, deletions and reordering by anyone who does not recompute all
later hashes. Someone able to rewrite the whole file and its anchor is caught only by a copy of
``last_sha256`` kept elsewhere: pass it to :func:`verify_log` as ``witness``.

Verification codes (stable; never reused):

=====================  ========  =====================================================
code                   severity  meaning
=====================  ========  =====================================================
log_missing            error     the log file does not exist
malformed_line         error     a complete line is not a JSON object
malformed_entry        error     a field is missing or has the wrong type
entry_hash_mismatch    error     entry_sha256 does not match the entry (entry modified)
input_hash_mismatch    error     input_sha256 does not match the logged input
output_hash_mismatch   error     output_sha256 does not match the logged result
chain_break            error     prev is not the previous line's entry_sha256 (reordered,
                                 duplicated or replaced entry)
seq_gap                error     seq jumps forward: entries are missing (deleted)
torn_tail              error     last line incomplete (no newline, or unreadable and not
                                 yet counted by the anchor): a crash mid-write
truncated              error     the log holds fewer entries than the anchor says
anchor_missing         error     a non-empty log without its anchor file
anchor_malformed       error     the anchor file is not {count, last_sha256, log_size}
anchor_mismatch        error     the log's end does not match the anchor (edited
                                 without the anchor)
anchor_lag             warning   one complete entry beyond the anchor (crash between the
                                 append and the anchor update; healed by the next writer)
witness_missing        error     the witnessed entry_sha256 is not in the chain
anchor_unkeyed         error     a key was given but the anchor carries no HMAC
anchor_hmac_mismatch   error     the anchor's HMAC does not match the key (rewritten without it)
=====================  ========  =====================================================
"""

from __future__ import annotations

import fcntl
import hmac
import json
import math
import os
from bisect import bisect_left
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from gasrules.governance.decision_log import (
    _DECISION_FIELDS,
    _ENTRY_FIELDS,
    WARNING_CODES,
    ZERO_SHA,
    RecordError,
    _anchor_verdict,
    _compose,
    _engine_version,
    _now,
    _read_anchor,
    _read_tail,
    _Store,
    anchor_hmac,
    anchor_path,
    record_json,
    sha256_hex,
)

__all__ = [
    "Difference",
    "LogIssue",
    "RepairReport",
    "ReplayOutcome",
    "ReplayReport",
    "VerifyReport",
    "compare_results",
    "render_replay",
    "render_verify",
    "repair_log",
    "replay_log",
    "verify_log",
]

# ---------------------------------------------------------------- verification


@dataclass(frozen=True)
class LogIssue:
    code: str
    message: str
    line: int | None = None
    seq: int | None = None

    @property
    def severity(self) -> str:
        return "warning" if self.code in WARNING_CODES else "error"

    def render(self, path: str = "") -> str:
        where = f"{path}:{self.line}" if self.line else path
        seq = f" (seq {self.seq})" if self.seq is not None else ""
        return f"{where}: {self.code}{seq}: {self.message}"


@dataclass(frozen=True)
class VerifyReport:
    path: str
    entries: int  # complete lines read
    issues: tuple[LogIssue, ...]  # in line order, anchor checks last
    anchor: dict[str, Any] | None
    last_sha256: str
    repairs: tuple[tuple[int, str], ...] = ()  # (seq, actions) of repair entries
    torn_bytes: int = 0  # length of a torn tail, if any

    @property
    def errors(self) -> tuple[LogIssue, ...]:
        return tuple(i for i in self.issues if i.severity == "error")

    @property
    def warnings(self) -> tuple[LogIssue, ...]:
        return tuple(i for i in self.issues if i.severity == "warning")

    @property
    def ok(self) -> bool:
        return not self.errors

    @property
    def first_problem(self) -> LogIssue | None:
        return self.errors[0] if self.errors else None


def _field_problem(entry: Mapping[str, Any]) -> str:
    kind = entry.get("kind")
    wanted = dict(_ENTRY_FIELDS)
    wanted.update(_DECISION_FIELDS if kind == "decision" else {"repair": dict})
    if kind not in ("decision", "repair"):
        return f"unknown kind {kind!r}"
    for name, typ in wanted.items():
        if name not in entry:
            return f"field {name!r} is missing"
        value = entry[name]
        wrong = type(value) is not int if typ is int else typ is not object and not isinstance(value, typ)
        if wrong:
            return f"field {name!r} is not of type {typ.__name__}"
    return ""


@dataclass
class _Seen:
    line: int
    seq: int | None
    sha: str | None
    prev: str | None
    length: int


def _scan(
    f: Any, size: int, witness: str | None
) -> tuple[list[_Seen], list[LogIssue], int, list[tuple[int, str]], bool]:
    """Read complete lines up to ``size``: per-line facts and per-entry issues."""
    seen: list[_Seen] = []
    issues: list[LogIssue] = []
    repairs: list[tuple[int, str]] = []
    offset, torn, witnessed = 0, 0, False
    for raw in f:
        raw = raw[: size - offset]
        if not raw:
            break
        offset += len(raw)
        if not raw.endswith(b"\n"):
            torn = len(raw)
            break
        number = len(seen) + 1
        rec = _Seen(number, None, None, None, len(raw))
        seen.append(rec)
        try:
            entry = json.loads(raw)
        except ValueError as exc:
            issues.append(LogIssue("malformed_line", f"not JSON: {exc}", number))
            continue
        except RecursionError:
            issues.append(LogIssue("malformed_line", "JSON nested too deeply to read", number))
            continue
        if not isinstance(entry, dict):
            issues.append(LogIssue("malformed_line", "not a JSON object", number))
            continue
        seq = entry.get("seq") if type(entry.get("seq")) is int else None
        problem = _field_problem(entry)
        if problem:
            issues.append(LogIssue("malformed_entry", problem, number, seq))
            continue
        rec.seq, rec.sha, rec.prev = seq, entry["entry_sha256"], entry["prev"]
        witnessed = witnessed or rec.sha == witness
        try:
            parts = {k: record_json(v, k) for k, v in entry.items() if k != "entry_sha256"}
        except RecordError as exc:
            issues.append(LogIssue("malformed_entry", str(exc), number, seq))
            continue
        except (RecursionError, ValueError, TypeError) as exc:
            issues.append(
                LogIssue("malformed_entry", f"cannot be canonicalised ({type(exc).__name__})", number, seq)
            )
            continue
        if sha256_hex(_compose(parts)) != rec.sha:
            issues.append(
                LogIssue(
                    "entry_hash_mismatch",
                    "the entry was modified: its content does not hash to its entry_sha256",
                    number,
                    seq,
                )
            )
        elif entry["kind"] == "repair":
            repairs.append((seq or 0, ",".join(map(str, entry["repair"].get("actions", [])))))
        else:
            for key, part in (("input", "input"), ("output", "result")):
                if sha256_hex(parts[part]) != entry[f"{key}_sha256"]:
                    issues.append(
                        LogIssue(
                            f"{key}_hash_mismatch",
                            f"{key}_sha256 does not match the logged {part}",
                            number,
                            seq,
                        )
                    )
    return seen, issues, torn, repairs, witnessed


def _chain_issues(seen: list[_Seen]) -> list[LogIssue]:
    issues: list[LogIssue] = []
    present = sorted({r.seq for r in seen if r.seq is not None})
    prev_seq, prev_sha, known = 0, ZERO_SHA, True
    for rec in seen:
        if rec.seq is None or rec.sha is None:
            known = False  # cannot chain across an unreadable line; its own issue says why
            continue
        expected = prev_seq + 1
        if known and (rec.seq != expected or rec.prev != prev_sha):
            elsewhere = bisect_left(present, rec.seq) - bisect_left(present, expected)
            if rec.seq > expected and elsewhere <= 0:
                last = f"-{rec.seq - 1}" if rec.seq - 1 > expected else ""
                issues.append(
                    LogIssue(
                        "seq_gap",
                        f"seq jumps from {prev_seq} to {rec.seq}: entry {expected}{last} missing (deleted)",
                        rec.line,
                        rec.seq,
                    )
                )
            elif rec.seq == expected:
                issues.append(
                    LogIssue(
                        "chain_break",
                        f"prev does not match the entry_sha256 "
                        f"of line {rec.line - 1}: that entry was replaced or "
                        "re-hashed, or logs were spliced",
                        rec.line,
                        rec.seq,
                    )
                )
            else:
                issues.append(
                    LogIssue(
                        "chain_break",
                        f"seq {rec.seq} found where {expected} was expected: entries reordered or duplicated",
                        rec.line,
                        rec.seq,
                    )
                )
        prev_seq, prev_sha, known = rec.seq, rec.sha, True
    return issues


def _verify_open(
    f: Any,
    size: int,
    anchor: dict[str, Any] | None,
    anchor_problem: str,
    witness: str | None,
    path: str,
    key: bytes = b"",
) -> VerifyReport:
    seen, issues, torn, repairs, witnessed = _scan(f, size, witness)
    if (
        not torn
        and seen
        and seen[-1].sha is None
        and anchor is not None
        and anchor["log_size"] == size - seen[-1].length
    ):
        # an unreadable last line the anchor never counted: also left by a crash
        torn = seen.pop().length
        issues = [i for i in issues if i.line != len(seen) + 1]
    issues += _chain_issues(seen)
    issues.sort(key=lambda i: i.line or 0)
    last = seen[-1] if seen else None
    last_seq = last.seq if last and last.seq is not None else len(seen)
    last_sha = (last.sha or "") if last else ZERO_SHA
    if torn:
        issues.append(
            LogIssue(
                "torn_tail",
                f"the last {torn} bytes are an incomplete line the "
                "anchor never counted (crash mid-write); run repair_log()",
                len(seen) + 1,
                last_seq + 1,
            )
        )
    good_end = size - torn
    if anchor_problem == "anchor_missing":
        if seen or torn:
            issues.append(LogIssue("anchor_missing", f"{anchor_path(path).name} not found"))
    elif anchor_problem:
        issues.append(
            LogIssue(anchor_problem, f"{anchor_path(path).name} is not {{count, last_sha256, log_size}}")
        )
    elif anchor is not None:
        code, why = _anchor_verdict(
            anchor,
            last_seq,
            last_sha,
            (last.prev or "") if last else ZERO_SHA,
            last.length if last else 0,
            good_end,
        )
        if code == "truncated":
            issues.append(LogIssue(code, why, len(seen) + 1, last_seq + 1))
        elif code:
            issues.append(LogIssue(code, why, len(seen) or None, last_seq if seen else None))
    if witness and not witnessed:
        issues.append(LogIssue("witness_missing", f"no entry has entry_sha256 {witness}"))
    if key and anchor is not None:
        want = anchor_hmac(key, anchor["count"], anchor["last_sha256"], anchor["log_size"])
        got = anchor.get("hmac")
        if not isinstance(got, str) or not hmac.compare_digest(got, want):
            issues.append(
                LogIssue(
                    "anchor_unkeyed" if got is None else "anchor_hmac_mismatch",
                    "the anchor carries no HMAC"
                    if got is None
                    else "the anchor's HMAC does not match (log and anchor rewritten without the key?)",
                )
            )
    return VerifyReport(path, len(seen), tuple(issues), anchor, last_sha, tuple(repairs), torn)


def verify_log(path: str | os.PathLike[str], *, witness: str | None = None, key: bytes = b"") -> VerifyReport:
    """Check every entry's hashes, the chain, seq continuity and the anchor; never raises on
    a damaged log. ``witness``: an entry_sha256 kept elsewhere that must be in the chain.
    ``key``: the anchor key; the anchor must then carry a matching HMAC."""
    p = Path(path)
    if not p.exists():
        return VerifyReport(str(p), 0, (LogIssue("log_missing", f"{p} not found"),), None, "")
    with open(p, "rb") as f:
        fcntl.flock(f.fileno(), fcntl.LOCK_SH)  # a consistent (size, anchor) snapshot
        try:
            size = os.fstat(f.fileno()).st_size
            anchor, problem = _read_anchor(anchor_path(p))
        finally:
            fcntl.flock(f.fileno(), fcntl.LOCK_UN)
        return _verify_open(f, size, anchor, problem, witness, str(p), key)


# ---------------------------------------------------------------- repair


@dataclass(frozen=True)
class RepairReport:
    path: str
    actions: tuple[str, ...]  # truncated_torn_tail, reanchored, anchor_refreshed
    removed_bytes: int = 0
    saved_to: str = ""  # where the torn bytes were kept
    note_seq: int | None = None  # seq of the repair entry written


_ANCHOR_CODES = {"truncated", "anchor_missing", "anchor_malformed", "anchor_mismatch"}


def repair_log(
    path: str | os.PathLike[str],
    *,
    acknowledge_anchor: bool = False,
    clock: Callable[[], datetime] | None = None,
    fsync: bool = True,
    key: bytes = b"",
) -> RepairReport:
    """Make a crashed log appendable again, recording what was done in a chained entry.

    Cuts a torn tail (kept in ``LOG.torn-<seq>-<time>``); with ``acknowledge_anchor`` also
    re-anchors a log whose anchor is missing, unreadable or disagrees. Refuses (RecordError)
    when any entry or the chain is damaged: that log is evidence, start a new one.
    """
    p = Path(path)
    if not p.exists():
        raise RecordError("log_missing", "no log to repair", path=str(p))
    store = _Store(p, fsync, key)
    try:
        with store.locked():
            size = os.fstat(store.fd).st_size
            anchor, problem = _read_anchor(store.anchor)
            with open(p, "rb") as f:
                report = _verify_open(f, size, anchor, problem, None, str(p))
            hard = [i for i in report.errors if i.code not in _ANCHOR_CODES | {"torn_tail"}]
            if hard:
                raise RecordError(
                    hard[0].code,
                    "repair refused, entries are damaged: "
                    f"{hard[0].message}; keep this log as evidence and start a "
                    "new one",
                    path=str(p),
                    line=hard[0].line,
                )
            anchor_codes = sorted({i.code for i in report.errors} & _ANCHOR_CODES)
            if anchor_codes and not acknowledge_anchor:
                raise RecordError(
                    anchor_codes[0],
                    "repair refused: the anchor disagrees with "
                    "the log; check why, then pass acknowledge_anchor=True",
                    path=str(p),
                )
            actions: list[str] = []
            good_end = size - report.torn_bytes
            torn = os.pread(store.fd, report.torn_bytes, good_end)
            time = _now(clock)
            saved = ""
            if torn:
                stamp = time.replace("-", "").replace(":", "").split(".")[0] + "Z"
                saved = f"{p.name}.torn-{report.entries + 1}-{stamp}"
                _write_new_file(p.with_name(saved), torn, fsync)
                os.ftruncate(store.fd, good_end)
                if fsync:
                    os.fsync(store.fd)
                actions.append("truncated_torn_tail")
            if anchor_codes:
                actions.append("reanchored")
            if not actions:
                if report.warnings:
                    store.state(heal_lag=True)
                    return RepairReport(str(p), ("anchor_refreshed",))
                return RepairReport(str(p), ())
            last_line = _read_tail(store.fd, good_end).last_line
            count = json.loads(last_line)["seq"] if last_line else 0
            note = {
                "actions": actions,
                "anchor_before": anchor,
                "problems": [i.code for i in report.issues],
                "removed_bytes": len(torn),
                "removed_sha256": sha256_hex(torn),
                "saved_to": saved,
            }
            parts = {
                "kind": b'"repair"',
                "time": record_json(time),
                "engine_version": record_json(_engine_version()),
                "repair": record_json(note),
            }
            store._cache = None
            seq, _ = store.append(parts, count, report.last_sha256 if report.entries else ZERO_SHA)
            return RepairReport(str(p), tuple(actions), len(torn), saved, seq)
    finally:
        store.close()


def _write_new_file(path: Path, data: bytes, do_fsync: bool) -> None:
    with open(path, "xb") as out:
        out.write(data)
        out.flush()
        if do_fsync:
            os.fsync(out.fileno())


# ---------------------------------------------------------------- replay


@dataclass(frozen=True)
class Difference:
    field: str  # status, disorders, qualifiers.<d>, findings, values.<name>, errors
    logged: Any
    replayed: Any


def _codes(items: Any, *keys: str) -> list[Any]:
    out = []
    for item in items or []:
        if isinstance(item, Mapping):
            out.append(item.get(keys[0]) if len(keys) == 1 else tuple(item.get(k) for k in keys))
    return sorted(out, key=repr)


def _same_number(a: Any, b: Any, rel_tol: float) -> bool:
    if (
        isinstance(a, (int, float))
        and isinstance(b, (int, float))
        and not isinstance(a, bool)
        and not isinstance(b, bool)
    ):
        return math.isclose(a, b, rel_tol=rel_tol, abs_tol=rel_tol)
    return bool(a == b)


def compare_results(
    logged: Mapping[str, Any], replayed: Mapping[str, Any], *, rel_tol: float = 1e-9
) -> tuple[Difference, ...]:
    """What differs in the conclusions of two results. Pure.

    Compares status, disorders (as a set), qualifiers, finding codes (as a multiset), values
    (numbers within ``rel_tol``) and error (field, code) pairs; ignores trace, text, timing,
    context and versions.
    """
    diffs: list[Difference] = []
    if logged.get("status") != replayed.get("status"):
        diffs.append(Difference("status", logged.get("status"), replayed.get("status")))
    a, b = sorted(set(logged.get("disorders") or [])), sorted(set(replayed.get("disorders") or []))
    if a != b:
        diffs.append(Difference("disorders", a, b))
    qa, qb = logged.get("qualifiers") or {}, replayed.get("qualifiers") or {}
    for name in sorted(set(qa) | set(qb)):
        if qa.get(name) != qb.get(name):
            diffs.append(Difference(f"qualifiers.{name}", qa.get(name), qb.get(name)))
    fa, fb = _codes(logged.get("findings"), "code"), _codes(replayed.get("findings"), "code")
    if fa != fb:
        diffs.append(Difference("findings", fa, fb))
    va, vb = logged.get("values") or {}, replayed.get("values") or {}
    for name in sorted(set(va) | set(vb)):
        if name not in va or name not in vb or not _same_number(va[name], vb[name], rel_tol):
            diffs.append(Difference(f"values.{name}", va.get(name), vb.get(name)))
    ea = _codes(logged.get("errors"), "field", "code")
    eb = _codes(replayed.get("errors"), "field", "code")
    if ea != eb:
        diffs.append(Difference("errors", ea, eb))
    return tuple(diffs)


REPLAY_OUTCOMES = ("same", "differs", "rulebook_missing", "rulebook_mismatch", "error", "unreadable")


@dataclass(frozen=True)
class ReplayOutcome:
    line: int
    seq: int | None
    outcome: str  # one of REPLAY_OUTCOMES
    rulebook_sha256: str = ""
    differences: tuple[Difference, ...] = ()
    message: str = ""


@dataclass(frozen=True)
class ReplayReport:
    path: str
    counts: dict[str, int]  # outcome -> number of decision entries
    outcomes: tuple[ReplayOutcome, ...]  # every outcome but "same"

    @property
    def ok(self) -> bool:
        return not self.outcomes


_MISSING = (LookupError, FileNotFoundError)


def replay_log(
    path: str | os.PathLike[str],
    load_rulebook_by_sha256: Callable[[str], Any],
    interpret: Callable[[Any, Any], Mapping[str, Any]],
    *,
    rel_tol: float = 1e-9,
) -> ReplayReport:
    """Re-run every decision entry with the rulebook it names and report changed results.

    ``load_rulebook_by_sha256(sha)`` returns the archived rulebook, or None / raises
    LookupError or FileNotFoundError when it is not archived (reported per entry). Run
    :func:`verify_log` first: replay trusts the entries it reads.
    """
    counts = {o: 0 for o in REPLAY_OUTCOMES}
    outcomes: list[ReplayOutcome] = []
    cache: dict[str, tuple[Any, str]] = {}

    def note(o: ReplayOutcome) -> None:
        counts[o.outcome] += 1
        if o.outcome != "same":
            outcomes.append(o)

    with open(path, "rb") as f:
        for number, raw in enumerate(f, 1):
            try:
                entry = json.loads(raw) if raw.endswith(b"\n") else None
            except (ValueError, RecursionError):
                entry = None
            if not isinstance(entry, dict) or _field_problem(entry):
                note(ReplayOutcome(number, None, "unreadable", message="not a readable entry"))
                continue
            if entry["kind"] != "decision":
                continue
            seq, sha = entry["seq"], str(entry["rulebook"].get("sha256", ""))
            if sha not in cache:
                cache[sha] = _fetch(load_rulebook_by_sha256, sha)
            rulebook, why = cache[sha]
            if why:
                kind = "rulebook_missing" if rulebook is None else "rulebook_mismatch"
                note(ReplayOutcome(number, seq, kind, sha, message=why))
                continue
            try:
                fresh = interpret(rulebook, entry["input"])
            except Exception as exc:  # a replay reports, never stops
                note(ReplayOutcome(number, seq, "error", sha, message=f"{type(exc).__name__}: {exc}"))
                continue
            diffs = compare_results(entry["result"], fresh, rel_tol=rel_tol)
            note(ReplayOutcome(number, seq, "differs" if diffs else "same", sha, diffs))
    return ReplayReport(str(path), counts, tuple(outcomes))


def _fetch(load: Callable[[str], Any], sha: str) -> tuple[Any, str]:
    try:
        rulebook = load(sha)
    except _MISSING as exc:
        return None, f"rulebook {sha[:12]}... not in the archive ({exc})"
    if rulebook is None:
        return None, f"rulebook {sha[:12]}... not in the archive"
    got = getattr(rulebook, "sha256", None)
    if got is None and isinstance(rulebook, Mapping):
        got = rulebook.get("sha256")
    if getattr(rulebook, "matches_sha256", None) is not None and rulebook.matches_sha256(sha):
        return rulebook, ""  # named under today's identity scheme or the one before it
    if got is not None and got != sha:
        return rulebook, f"the archive returned rulebook {str(got)[:12]}... for {sha[:12]}..."
    return rulebook, ""


# ---------------------------------------------------------------- text for the CLI


def render_verify(report: VerifyReport) -> str:
    head = (
        f"{report.path}: {'ok' if report.ok else 'FAILED'}, {report.entries} entries, "
        f"last {report.last_sha256[:16] or '-'}"
    )
    lines = [head] + [f"  {i.severity}: {i.render(report.path)}" for i in report.issues]
    lines += [f"  repair entry seq {seq}: {actions}" for seq, actions in report.repairs]
    return "\n".join(lines)


def render_replay(report: ReplayReport) -> str:
    counts = ", ".join(f"{n} {o}" for o, n in report.counts.items() if n)
    lines = [f"{report.path}: {counts or 'no decision entries'}"]
    for o in report.outcomes:
        lines.append(f"  line {o.line} (seq {o.seq}): {o.outcome}" + (f": {o.message}" if o.message else ""))
        lines += [f"    {d.field}: {d.logged!r} -> {d.replayed!r}" for d in o.differences]
    return "\n".join(lines)
