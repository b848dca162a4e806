"""Decision records: writing an append-only, hash-chained JSON Lines log of interpretations.

Verification, repair, replay and their text live in :mod:`gasrules.governance.audit`; the names are also
reachable from here (loaded on first use) for code written before the split.

One line per entry. A decision entry holds::

    record_format 1 · kind "decision" · seq (1-based) · time (UTC, ISO 8601, "Z")
    input   the case, with identifier keys in its context kept, masked or dropped (context_policy)
    result  the result as given (trace included); its echoed ``context`` gets the same policy
    rulebook {id, version, sha256} · engine_version · context_policy
    input_sha256 / output_sha256   sha256 of canonical JSON of ``input`` / ``result`` as logged
    prev           the previous entry's entry_sha256 (64 zeros for the first)
    entry_sha256   sha256 of canonical JSON of the entry without this field

A repair entry (kind "repair") is chained the same way and records what :func:`repair_log` did.
Beside the log, ``LOG.anchor`` holds ``{count, last_sha256, log_size}``; it is replaced atomically
(temp file, fsync, os.replace, fsync of the directory) after every append.

Canonical JSON (:func:`record_json`, the one encoder of every record): ``json.dumps(obj, sort_keys=True,
separators=(",", ":"), ensure_ascii=False, allow_nan=False)`` encoded as UTF-8. orjson was
measured and rejected for hashing: its float text differs from the standard library's for
exponent forms (``1e-05`` vs ``0.00001``, ``4e-08`` vs ``4e-8``; values such as [H+] in mol/L
hit this), it writes NaN as null and it refuses integers beyond 64 bits; its decoder silently
turns integers of 2**64 and above into floats, so it is not used for reading either. The
standard-library form is reproducible by an auditor with nothing but Python. Large parts
(input, result) are encoded once and spliced into the entry (:func:`_compose`): same bytes.

Identifier masking: each configured key (case-insensitive, at any depth inside ``context``) gets
``"hmac-sha256:" + the first mask_chars hex digits of HMAC-SHA256(salt, canonical JSON of the
value)``. The same value under the same salt always masks alike, so cases stay linkable.
``drop`` removes those keys. A context that is not an object is masked or dropped whole.

Torn tail (our design): appends write one whole line, fsync, then the anchor. A crash can leave
(a) a partial last line: no trailing newline, or an unreadable last line that the anchor never
counted (the anchor ends where that line begins): ``torn_tail``; the writer refuses to append until
:func:`repair_log` moves the torn bytes to ``LOG.torn-<seq>-<time>`` (kept as evidence), truncates
the log to the last complete line and appends a chained repair entry saying so; or (b) a complete
last line the anchor does not count yet: ``anchor_lag`` (a warning); the next writer refreshes
the anchor. Repair never touches a broken chain: that stays visible; start a new log instead.
A log that is shorter than its anchor, or has no anchor, is only re-anchored when the operator
passes ``acknowledge_anchor=True``, and that too is recorded in a repair entry.


Writer errors are :class:`RecordError` with ``code`` one of the verification codes listed in
:mod:`gasrules.governance.audit` (the writer refuses a log in that state) or ``record.not_json`` (a value canonical JSON cannot hold; ``field`` names
where), ``record.bad_config``, ``record.bad_clock``, ``record.no_rulebook``.
"""

from __future__ import annotations

import fcntl
import hashlib
import hmac
import json
import os
import threading
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError

__all__ = [
    "AppendReceipt",
    "DecisionLog",
    "RecordConfig",
    "RecordError",
    "anchor_path",
    "apply_context_policy",
    "entry_hash",
    "mask_value",
    "record_json",
    "sha256_hex",
]
_MOVED = frozenset(
    {
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
        "REPLAY_OUTCOMES",
    }
)

RECORD_FORMAT = 1
ZERO_SHA = "0" * 64
CONTEXT_POLICIES = ("keep", "mask", "drop")
DEFAULT_IDENTIFIER_KEYS: tuple[str, ...] = (
    "record_number",
    "patient_id",
    "mrn",
    "name",
    "patient_name",
    "given_name",
    "family_name",
    "birth_date",
    "date_of_birth",
    "dob",
    "address",
    "phone",
    "email",
    "insurance_number",
)
LOG_CODES = (
    "log_missing",
    "malformed_line",
    "malformed_entry",
    "entry_hash_mismatch",
    "input_hash_mismatch",
    "output_hash_mismatch",
    "chain_break",
    "seq_gap",
    "torn_tail",
    "truncated",
    "anchor_missing",
    "anchor_malformed",
    "anchor_mismatch",
    "anchor_lag",
    "witness_missing",
)
WARNING_CODES = frozenset({"anchor_lag"})
_ENTRY_FIELDS = {
    "record_format": int,
    "kind": str,
    "seq": int,
    "time": str,
    "engine_version": str,
    "prev": str,
    "entry_sha256": str,
}
_DECISION_FIELDS = {
    "input": object,
    "result": dict,
    "rulebook": dict,
    "context_policy": str,
    "input_sha256": str,
    "output_sha256": str,
}


class RecordError(EngineError):
    """A decision record could not be written, or a log cannot be appended to or repaired."""

    def __init__(
        self,
        code: str,
        message: str,
        *,
        path: str = "",
        line: int | None = None,
        field: str = "",
        accepted: str = "",
    ):
        self.code, self.path, self.line = code, path, line
        self.field, self.accepted = field, accepted
        where = f"{path}:{line}: " if path and line else (f"{path}: " if path else "")
        extra = f" (field {field}; accepted: {accepted})" if field else ""
        super().__init__(f"{where}{code}: {message}{extra}")


# ---------------------------------------------------------------- canonical JSON and hashing


def record_json(obj: Any, where: str = "") -> bytes:
    """The canonical encoding of records, manifests and anchors (see the module docstring):
    numbers as written, NaN refused. Rulebook identity has its own rules (``identity_json``)."""
    try:
        return json.dumps(
            obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
        ).encode("utf-8")
    except (TypeError, ValueError) as exc:
        raise RecordError(
            "record.not_json",
            f"cannot encode as canonical JSON: {exc}",
            field=where or "<value>",
            accepted="JSON values: finite numbers, strings, lists, objects with string keys",
        ) from exc


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


_KEYS: dict[str, bytes] = {}


def _compose(parts: Mapping[str, bytes]) -> bytes:
    """Canonical JSON of an object whose member values are already canonical bytes."""
    items = []
    for k, v in sorted(parts.items()):
        key = _KEYS.get(k)
        if key is None:
            key = json.dumps(k, ensure_ascii=False).encode("utf-8")
            if len(_KEYS) < 256:  # entry field names; a bound against odd tampered logs
                _KEYS[k] = key
        items.append(key + b":" + v)
    return b"{" + b",".join(items) + b"}"


def _require_str_keys(obj: Any, where: str) -> None:
    """Reject non-string object keys: json.dumps would turn them into strings, and the entry
    read back would hash differently. Fast walk first; paths are built only on failure."""
    stack = [obj]
    while stack:
        o = stack.pop()
        if type(o) is dict:
            for k, v in o.items():
                if type(k) is not str:
                    raise RecordError(
                        "record.not_json",
                        f"object key {k!r} is not a string",
                        field=_path_to(obj, k, where),
                        accepted="string keys only",
                    )
                if type(v) in (dict, list, tuple):
                    stack.append(v)
        elif type(o) in (list, tuple):
            stack.extend(v for v in o if type(v) in (dict, list, tuple))


def _path_to(obj: Any, bad: Any, where: str) -> str:
    """The path of the first object holding key ``bad`` (only called after a failed check)."""
    if isinstance(obj, dict) and any(k is bad for k in obj):
        return where
    kids = obj.items() if isinstance(obj, dict) else enumerate(obj) if isinstance(obj, (list, tuple)) else ()
    for k, v in kids:
        found = _path_to(v, bad, f"{where}[{k}]" if isinstance(k, int) else f"{where}.{k}")
        if found:
            return found
    return ""


def entry_hash(entry: Mapping[str, Any]) -> str:
    """entry_sha256 of an entry: sha256 of its canonical JSON without ``entry_sha256``."""
    return sha256_hex(_compose({k: record_json(v, k) for k, v in entry.items() if k != "entry_sha256"}))


# ---------------------------------------------------------------- configuration and masking


@dataclass(frozen=True)
class RecordConfig:
    """How decision records are written. ``clock`` returns an aware datetime (tests pin it)."""

    context_policy: str = "drop"
    identifier_keys: tuple[str, ...] = DEFAULT_IDENTIFIER_KEYS
    salt: str = ""
    mask_chars: int = 16
    fsync: bool = True
    clock: Callable[[], datetime] | None = None
    anchor_key: bytes = field(
        default=b"", repr=False
    )  # HMAC key for keyed anchors (kept outside the log's folder)

    def __post_init__(self) -> None:
        if self.context_policy not in CONTEXT_POLICIES:
            raise RecordError(
                "record.bad_config",
                f"unknown policy {self.context_policy!r}",
                field="context_policy",
                accepted=" | ".join(CONTEXT_POLICIES),
            )
        if self.context_policy == "mask" and len(self.salt) < 16:
            raise RecordError(
                "record.bad_config",
                "masking needs a secret salt",
                field="salt",
                accepted="a string of at least 16 characters",
            )
        if not 8 <= self.mask_chars <= 64:
            raise RecordError(
                "record.bad_config",
                f"mask_chars is {self.mask_chars}",
                field="mask_chars",
                accepted="an integer from 8 to 64",
            )
        if any(not isinstance(k, str) or not k for k in self.identifier_keys):
            raise RecordError(
                "record.bad_config",
                "identifier keys must be non-empty strings",
                field="identifier_keys",
                accepted="a list of key names",
            )

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any]) -> RecordConfig:
        """Build from a configuration section (keys as the field names; no clock)."""
        known = {"context_policy", "identifier_keys", "salt", "mask_chars", "fsync"}
        unknown = sorted(set(data) - known)
        if unknown:
            raise RecordError(
                "record.bad_config",
                f"unknown setting {unknown[0]!r}",
                field=unknown[0],
                accepted=", ".join(sorted(known)),
            )
        kwargs = dict(data)
        if "identifier_keys" in kwargs:
            kwargs["identifier_keys"] = tuple(kwargs["identifier_keys"])
        return cls(**kwargs)


def mask_value(value: Any, salt: str, chars: int = 16) -> str:
    digest = hmac.new(salt.encode("utf-8"), record_json(value), hashlib.sha256).hexdigest()
    return "hmac-sha256:" + digest[:chars]


def _apply(obj: Any, cfg: RecordConfig, keys: frozenset[str], path: str, touched: list[str]) -> Any:
    if isinstance(obj, dict):
        out: dict[str, Any] = {}
        for k, v in obj.items():
            here = f"{path}/{k}"
            if isinstance(k, str) and k.lower() in keys:
                touched.append(here)
                if cfg.context_policy == "mask":
                    out[k] = mask_value(v, cfg.salt, cfg.mask_chars)
                continue  # drop
            out[k] = _apply(v, cfg, keys, here, touched)
        return out
    if isinstance(obj, list):
        return [_apply(v, cfg, keys, f"{path}/{i}", touched) for i, v in enumerate(obj)]
    return obj


def apply_context_policy(record: Any, cfg: RecordConfig) -> tuple[Any, list[str]]:
    """A copy of a case or result with identifiers in ``context`` treated per the policy.

    Returns the copy and the JSON-pointer paths of the values masked or dropped. Anything but
    ``context`` is left untouched; a record that is not an object is returned as is.
    """
    if cfg.context_policy == "keep" or not isinstance(record, dict) or "context" not in record:
        return record, []
    out = dict(record)
    ctx = record["context"]
    if not isinstance(ctx, dict):
        if cfg.context_policy == "mask":
            out["context"] = mask_value(ctx, cfg.salt, cfg.mask_chars)
        else:
            del out["context"]
        return out, ["/context"]
    touched: list[str] = []
    out["context"] = _apply(ctx, cfg, frozenset(k.lower() for k in cfg.identifier_keys), "/context", touched)
    return out, touched


# ---------------------------------------------------------------- anchor and tail reading


def anchor_path(log: str | os.PathLike[str]) -> Path:
    return Path(str(log) + ".anchor")


def _read_anchor(path: Path) -> tuple[dict[str, Any] | None, str]:
    """(anchor, problem): problem is "" or "anchor_missing" or "anchor_malformed"."""
    try:
        data = json.loads(path.read_bytes())
    except FileNotFoundError:
        return None, "anchor_missing"
    except (OSError, ValueError):
        return None, "anchor_malformed"
    ok = (
        isinstance(data, dict)
        and isinstance(data.get("count"), int)
        and isinstance(data.get("log_size"), int)
        and isinstance(data.get("last_sha256"), str)
    )
    return (data, "") if ok else (None, "anchor_malformed")


def anchor_hmac(key: bytes, count: int, last: str, size: int) -> str:
    """HMAC-SHA256 of an anchor's canonical JSON: without the key, a rewritten log and anchor
    cannot carry a valid one."""
    body = record_json({"count": count, "last_sha256": last, "log_size": size})
    return hmac.new(key, body, hashlib.sha256).hexdigest()


def _write_anchor(path: Path, count: int, last: str, size: int, do_fsync: bool, key: bytes = b"") -> None:
    tmp = path.with_name(f"{path.name}.tmp{os.getpid()}")
    fields: dict[str, Any] = {"count": count, "last_sha256": last, "log_size": size}
    if key:
        fields["hmac"] = anchor_hmac(key, count, last, size)
    data = record_json(fields) + b"\n"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        os.write(fd, data)
        if do_fsync:
            os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(tmp, path)
    if do_fsync:
        _fsync_dir(path.parent)


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@dataclass(frozen=True)
class _Tail:
    """The end of a log: last complete line, where complete lines end, and torn bytes."""

    size: int
    good_end: int
    last_line: bytes | None
    torn: bytes


def _read_tail(fd: int, size: int) -> _Tail:
    buf, pos = b"", size
    while True:
        nl = buf.rfind(b"\n")
        if (nl >= 0 and buf.rfind(b"\n", 0, nl) >= 0) or pos == 0:
            break
        step = min(1 << 16, pos)
        pos -= step
        buf = os.pread(fd, step, pos) + buf
    nl = buf.rfind(b"\n")
    if nl < 0:
        return _Tail(size, 0, None, buf)
    start = buf.rfind(b"\n", 0, nl) + 1
    return _Tail(size, pos + nl + 1, buf[start:nl], buf[nl + 1 :])


def _anchor_verdict(
    anchor: Mapping[str, Any], last_seq: int, last_sha: str, last_prev: str, last_len: int, good_end: int
) -> tuple[str, str]:
    """Compare the anchor with the log's last complete entry: ("", "") when consistent."""
    a_count, a_sha, a_size = anchor["count"], anchor["last_sha256"], anchor["log_size"]
    if (a_count, a_sha, a_size) == (last_seq, last_sha, good_end):
        return "", ""
    if a_count == last_seq - 1 and a_sha == last_prev and a_size == good_end - last_len:
        return "anchor_lag", (
            f"entry {last_seq} is complete but the anchor still counts "
            f"{a_count} (crash between append and anchor update)"
        )
    if last_seq < a_count:
        return "truncated", (
            f"the anchor says {a_count} entries and {a_size} bytes; the log "
            f"ends at entry {last_seq} and {good_end} bytes"
        )
    return "anchor_mismatch", (
        f"the anchor says entry {a_count} {a_sha[:12]}... at {a_size} "
        f"bytes; the log ends with entry {last_seq} {last_sha[:12]}... "
        f"at {good_end} bytes"
    )


# ---------------------------------------------------------------- writer


@dataclass(frozen=True)
class AppendReceipt:
    seq: int
    entry_sha256: str
    time: str


class _Store:
    """An open log file: lock, tail state, raw chained append. Used by the writer and repair."""

    def __init__(self, path: str | os.PathLike[str], do_fsync: bool, key: bytes = b""):
        self.path = Path(path)
        self.anchor = anchor_path(self.path)
        self.do_fsync = do_fsync
        self.key = key
        existed = self.path.exists()
        self.fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
        self._tlock = threading.Lock()
        self._cache: tuple[int, int, str] | None = None  # (size, count, last_sha)
        if not existed and do_fsync:
            _fsync_dir(self.path.parent)

    def close(self) -> None:
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1

    @contextmanager
    def locked(self) -> Iterator[None]:
        with self._tlock:
            fcntl.flock(self.fd, fcntl.LOCK_EX)
            try:
                yield
            finally:
                fcntl.flock(self.fd, fcntl.LOCK_UN)

    def state(self, *, heal_lag: bool = True) -> tuple[int, str, int]:
        """(count, last_sha256, size) of a log fit for appending, else RecordError."""
        size = os.fstat(self.fd).st_size
        if self._cache and self._cache[0] == size:
            return self._cache[1], self._cache[2], size
        tail = _read_tail(self.fd, size)
        where = str(self.path)
        if tail.torn:
            raise RecordError(
                "torn_tail",
                f"the last {len(tail.torn)} bytes are an incomplete "
                "line (crash mid-write); run repair_log() on this log",
                path=where,
            )
        anchor, problem = _read_anchor(self.anchor)
        if tail.last_line is None:  # empty log: new, or emptied
            fresh = anchor is not None and (anchor["count"], anchor["log_size"]) == (0, 0)
            if problem == "anchor_missing" or fresh:
                if not fresh:
                    _write_anchor(self.anchor, 0, ZERO_SHA, 0, self.do_fsync, self.key)
                self._cache = (0, 0, ZERO_SHA)
                return 0, ZERO_SHA, 0
            state = "unreadable" if anchor is None else f"at entry {anchor['count']}"
            raise RecordError(
                problem or "truncated",
                f"the log is empty but its anchor is {state}; run verify_log()",
                path=where,
            )
        try:
            last = json.loads(tail.last_line or b"")
            seq, sha, prev = last["seq"], last["entry_sha256"], last["prev"]
            good = entry_hash(last) == sha
        except (ValueError, KeyError, TypeError, RecordError):
            if anchor is not None and anchor["log_size"] == size - len(tail.last_line or b"") - 1:
                raise RecordError(
                    "torn_tail",
                    "the last line is unreadable and the anchor never "
                    "counted it (crash mid-write); run repair_log() on this log",
                    path=where,
                ) from None
            raise RecordError(
                "malformed_line", "the last entry cannot be read; run verify_log()", path=where
            ) from None
        if not good:
            raise RecordError(
                "entry_hash_mismatch",
                f"the last entry (seq {seq}) does not match its entry_sha256; run verify_log()",
                path=where,
            )
        if problem:
            raise RecordError(
                problem,
                f"{self.anchor.name}: {problem.replace('_', ' ')}; "
                "run repair_log(acknowledge_anchor=True) after checking",
                path=where,
            )
        assert anchor is not None
        code, why = _anchor_verdict(anchor, seq, sha, prev, len(tail.last_line or b"") + 1, size)
        if code == "anchor_lag" and heal_lag:
            _write_anchor(self.anchor, seq, sha, size, self.do_fsync, self.key)
        elif code:
            raise RecordError(code, why + "; run verify_log()", path=where)
        self._cache = (size, seq, sha)
        return seq, sha, size

    def append(self, parts: dict[str, bytes], count: int, last: str) -> tuple[int, str]:
        """Chain and write one entry (caller holds the lock); returns (seq, entry_sha256)."""
        seq = count + 1
        parts = {
            **parts,
            "seq": str(seq).encode(),
            "prev": record_json(last),
            "record_format": str(RECORD_FORMAT).encode(),
        }
        sha = sha256_hex(_compose(parts))
        line = _compose({**parts, "entry_sha256": record_json(sha)}) + b"\n"
        before = os.fstat(self.fd).st_size
        try:
            view = memoryview(line)
            while view:
                view = view[os.write(self.fd, view) :]
            if self.do_fsync:
                os.fsync(self.fd)
        except BaseException:
            try:  # leave no torn line behind if we still can
                os.ftruncate(self.fd, before)
            finally:
                self._cache = None
            raise
        size = before + len(line)
        self._cache = (size, seq, sha)
        _write_anchor(self.anchor, seq, sha, size, self.do_fsync, self.key)
        return seq, sha


def _now(clock: Callable[[], datetime] | None) -> str:
    t = clock() if clock else datetime.now(UTC)
    if t.tzinfo is None:
        raise RecordError(
            "record.bad_clock",
            "the clock returned a naive datetime",
            field="clock",
            accepted="a timezone-aware datetime",
        )
    return t.astimezone(UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def _engine_version() -> str:
    from gasrules.core.version import __version__  # late: the package __init__ may import this module

    return str(__version__)


def _rulebook_ref(rulebook: Any, result: Any) -> dict[str, Any]:
    if rulebook is not None and not isinstance(rulebook, Mapping):
        ref = {k: getattr(rulebook, k, None) for k in ("id", "version", "sha256")}
    else:
        ref = dict(
            rulebook
            if rulebook is not None
            else (result.get("rulebook") if isinstance(result, dict) else None) or {}
        )
    if not all(isinstance(ref.get(k), str) and ref.get(k) for k in ("id", "version", "sha256")):
        raise RecordError(
            "record.no_rulebook",
            "no rulebook id, version and sha256 given",
            field="rulebook",
            accepted="a CompiledRulebook or {id, version, sha256}, or a result carrying them",
        )
    return {k: ref[k] for k in ("id", "version", "sha256")}


class DecisionLog:
    """Appends decision records to one log. Safe across threads and processes (flock).

    Opening checks the log's end and refuses (RecordError with a verification code) a torn
    tail, a truncated log or a missing or disagreeing anchor. Use as a context manager.
    """

    def __init__(self, path: str | os.PathLike[str], config: RecordConfig | None = None):
        self.config = config or RecordConfig()
        self._store = _Store(path, self.config.fsync, self.config.anchor_key)
        try:
            with self._store.locked():
                self._store.state()
        except BaseException:
            self._store.close()
            raise

    @property
    def path(self) -> Path:
        return self._store.path

    def append(
        self, case: Any, result: Mapping[str, Any], *, rulebook: Any = None, engine_version: str | None = None
    ) -> AppendReceipt:
        """Record one interpretation; the rulebook and engine version default to the result's."""
        cfg = self.config
        logged_case, _ = apply_context_policy(case, cfg)
        logged_result, _ = apply_context_policy(dict(result), cfg)
        _require_str_keys(logged_case, "input")
        _require_str_keys(logged_result, "result")
        input_b = record_json(logged_case, "input")
        result_b = record_json(logged_result, "result")
        version = engine_version or result.get("engine_version") or _engine_version()
        parts = {
            "kind": b'"decision"',
            "input": input_b,
            "result": result_b,
            "rulebook": record_json(_rulebook_ref(rulebook, result)),
            "engine_version": record_json(str(version)),
            "context_policy": record_json(cfg.context_policy),
            "input_sha256": record_json(sha256_hex(input_b)),
            "output_sha256": record_json(sha256_hex(result_b)),
        }
        with self._store.locked():
            count, last, _ = self._store.state()
            time = _now(cfg.clock)
            parts["time"] = record_json(time)
            seq, sha = self._store.append(parts, count, last)
        return AppendReceipt(seq, sha, time)

    def close(self) -> None:
        self._store.close()

    def __enter__(self) -> DecisionLog:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def __getattr__(name: str) -> Any:
    """Names that moved to gasrules.governance.audit, loaded on first use (audit imports this module)."""
    if name in _MOVED:
        from gasrules.governance import audit

        return getattr(audit, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
