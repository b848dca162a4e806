"""Runtime settings: one frozen object from defaults, a settings file, environment and flags.

Later sources win: built-in defaults < ``--settings FILE`` (YAML) < ``GASRULES_*`` environment
variables < explicit overrides (command-line flags). Relative paths in a file are taken from the
file's own directory. Every bad value is a :class:`SettingsError` naming the setting (with
``file:line:col`` when it came from a file, or the variable name) and the accepted form.

Settings file (every key optional)::

    rulebook: ../rulebooks/adult/rulebook.yaml   # the active rulebook
    strict: true                   # refuse a rulebook that matches no approved release
    releases:
      dir: /srv/gasrules/releases    # release manifests and the suspension register
      archive: /srv/gasrules/archive # resolved rulebooks by sha256 (default: <dir>/archive)
      roster: /srv/gasrules/people.yaml  # who may author or approve, with stable ids (optional)
    decision_log:
      path: /srv/gasrules/decisions.jsonl
      context_policy: mask           # keep | mask | drop   (identifier keys inside `context`)
      identifier_keys: [mrn, name, patient_id]
      mask_chars: 16
      fsync: true
      anchor_key_file: /etc/gasrules/anchor.key   # optional: HMAC on the anchor (outside the log's folder)
    limits:
      corpus_unreadable_percent: 1 # impact and shadow exit 4 when more corpus rows are unreadable
      yaml_nodes: 1000000          # YAML nodes a rulebook file may expand to (alias bombs)
      rulebook_bytes: 10485760     # largest rulebook file read
    rulebook_roots: [/srv/gasrules/rulebooks]   # when set, every file of an extends chain lies under one
    shadow:
      rulebook: ../candidate/rulebook.yaml
      log: /srv/gasrules/disagreements.jsonl
    serve: {...}        # `gasrules serve` (gasrules.service.settings)
    interfaces: {...}   # HL7 v2 / FHIR output and `gasrules listen` (gasrules.integration.interfaces)

docs/settings.example.yaml is a complete, commented example.

The masking salt is a secret and is read only from the environment (``GASRULES_MASK_SALT``),
never from the file. Environment variables: GASRULES_RULEBOOK, GASRULES_STRICT (1/0, true/false,
yes/no, on/off), GASRULES_RELEASE_DIR, GASRULES_ARCHIVE_DIR, GASRULES_DECISION_LOG,
GASRULES_CONTEXT_POLICY, GASRULES_IDENTIFIER_KEYS (comma separated), GASRULES_MASK_SALT,
GASRULES_MASK_CHARS, GASRULES_LOG_FSYNC, GASRULES_SHADOW_RULEBOOK, GASRULES_SHADOW_LOG, GASRULES_ROSTER,
GASRULES_ANCHOR_KEY_FILE, GASRULES_CORPUS_UNREADABLE_PERCENT, GASRULES_YAML_NODE_BUDGET, GASRULES_RULEBOOK_MAX_BYTES, GASRULES_RULEBOOK_ROOTS (os.pathsep separated).
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.governance.decision_log import (
    CONTEXT_POLICIES,
    DEFAULT_IDENTIFIER_KEYS,
    RecordConfig,
    RecordError,
)

__all__ = ["Settings", "SettingsError", "load_settings", "read_anchor_key"]


class SettingsError(EngineError):
    """A setting has a value we cannot use. ``where`` is file:line:col or the variable name."""

    def __init__(self, setting: str, message: str, accepted: str, where: str = ""):
        self.setting, self.accepted, self.where = setting, accepted, where
        prefix = f"{where}: " if where else ""
        super().__init__(f"{prefix}setting {setting}: {message}; accepted: {accepted}")


@dataclass(frozen=True)
class Settings:
    """Everything the runtime needs beyond the case. Immutable; build with :func:`load_settings`."""

    rulebook: Path | None = None
    strict: bool = False
    release_dir: Path | None = None
    archive_dir: Path | None = None
    roster: Path | None = None  # site roster of authors and approvers (people.py)
    decision_log: Path | None = None
    context_policy: str = "drop"
    identifier_keys: tuple[str, ...] = DEFAULT_IDENTIFIER_KEYS
    mask_salt: str = field(default="", repr=False)
    mask_chars: int = 16
    log_fsync: bool = True
    anchor_key_file: Path | None = None  # HMAC key of keyed anchors, kept outside the log's folder
    shadow_rulebook: Path | None = None
    shadow_log: Path | None = None
    yaml_nodes: int = 1_000_000
    corpus_unreadable_percent: float = 1.0  # impact/shadow exit 4 above this share of unreadable corpus rows
    rulebook_bytes: int = 10 * 1024 * 1024
    rulebook_roots: tuple[Path, ...] = ()
    sources: tuple[str, ...] = ()  # where values came from, for `--show-settings` and errors

    @property
    def archive(self) -> Path | None:
        """The rulebook archive: explicit, else ``<release_dir>/archive``, else none."""
        if self.archive_dir is not None:
            return self.archive_dir
        return self.release_dir / "archive" if self.release_dir is not None else None

    def limits(self) -> Any:
        """The rulebook read limits (:class:`gasrules.rulebook.loader.Limits`)."""
        from gasrules.rulebook.loader import Limits

        return Limits(
            yaml_nodes=self.yaml_nodes,
            file_bytes=self.rulebook_bytes,
            roots=tuple(p.expanduser().resolve() for p in self.rulebook_roots),
        )

    def record_config(self) -> RecordConfig:
        """The decision-record configuration (raises SettingsError for a bad combination)."""
        key = b""
        if self.anchor_key_file is not None and self.decision_log is not None:
            key = read_anchor_key(self.anchor_key_file, self.decision_log)
        try:
            return RecordConfig(
                context_policy=self.context_policy,
                identifier_keys=self.identifier_keys,
                salt=self.mask_salt,
                mask_chars=self.mask_chars,
                fsync=self.log_fsync,
                anchor_key=key,
            )
        except RecordError as exc:
            name = {"salt": "GASRULES_MASK_SALT"}.get(exc.field, f"decision_log.{exc.field}")
            raise SettingsError(name, str(exc).split(": ", 1)[-1].split(" (field")[0], exc.accepted) from None


def too_many_unreadable(unreadable: int, rows: int, settings: Settings) -> str:
    """A message when more than ``corpus_unreadable_percent`` of a corpus's rows could not be
    read (those commands then exit 4), else ""."""
    limit = settings.corpus_unreadable_percent
    if rows and unreadable * 100.0 > limit * rows:
        return (
            f"{unreadable:,} of {rows:,} corpus rows ({100.0 * unreadable / rows:.1f} %) could not be read, more "
            f"than the limit of {limit:g} % (setting limits.corpus_unreadable_percent)"
        )
    return ""


def read_anchor_key(key_file: Path, log: Path) -> bytes:
    """The anchor key: at least 16 bytes, from a file outside the log's folder (someone who can
    rewrite the log's folder must not find the key there)."""
    name = "decision_log.anchor_key_file"
    accepted = "a file of at least 16 bytes outside the decision log's folder"
    key_path, folder = Path(key_file).resolve(), Path(log).resolve().parent
    if key_path.parent == folder or folder in key_path.parents:
        raise SettingsError(name, f"{key_file} lies inside the decision log's folder {folder}", accepted)
    try:
        key = key_path.read_bytes().strip()
    except OSError as exc:
        raise SettingsError(name, f"cannot read {key_file}: {exc.strerror or exc}", accepted) from None
    if len(key) < 16:
        raise SettingsError(name, f"{key_file} holds {len(key)} bytes", accepted)
    return key


# setting name -> (file key path, environment variable, kind)
_TABLE: dict[str, tuple[tuple[str, ...], str, str]] = {
    "rulebook": (("rulebook",), "GASRULES_RULEBOOK", "path"),
    "strict": (("strict",), "GASRULES_STRICT", "bool"),
    "release_dir": (("releases", "dir"), "GASRULES_RELEASE_DIR", "path"),
    "archive_dir": (("releases", "archive"), "GASRULES_ARCHIVE_DIR", "path"),
    "roster": (("releases", "roster"), "GASRULES_ROSTER", "path"),
    "decision_log": (("decision_log", "path"), "GASRULES_DECISION_LOG", "path"),
    "context_policy": (("decision_log", "context_policy"), "GASRULES_CONTEXT_POLICY", "policy"),
    "identifier_keys": (("decision_log", "identifier_keys"), "GASRULES_IDENTIFIER_KEYS", "keys"),
    "mask_salt": ((), "GASRULES_MASK_SALT", "secret"),
    "mask_chars": (("decision_log", "mask_chars"), "GASRULES_MASK_CHARS", "int"),
    "log_fsync": (("decision_log", "fsync"), "GASRULES_LOG_FSYNC", "bool"),
    "anchor_key_file": (("decision_log", "anchor_key_file"), "GASRULES_ANCHOR_KEY_FILE", "path"),
    "shadow_rulebook": (("shadow", "rulebook"), "GASRULES_SHADOW_RULEBOOK", "path"),
    "yaml_nodes": (("limits", "yaml_nodes"), "GASRULES_YAML_NODE_BUDGET", "count"),
    "corpus_unreadable_percent": (
        ("limits", "corpus_unreadable_percent"),
        "GASRULES_CORPUS_UNREADABLE_PERCENT",
        "percent",
    ),
    "rulebook_bytes": (("limits", "rulebook_bytes"), "GASRULES_RULEBOOK_MAX_BYTES", "count"),
    "rulebook_roots": (("rulebook_roots",), "GASRULES_RULEBOOK_ROOTS", "paths"),
    "shadow_log": (("shadow", "log"), "GASRULES_SHADOW_LOG", "path"),
}
_SECTIONS = {
    "releases": {"dir", "archive", "roster"},
    "limits": {"yaml_nodes", "rulebook_bytes", "corpus_unreadable_percent"},
    "shadow": {"rulebook", "log"},
    "decision_log": {"path", "context_policy", "identifier_keys", "mask_chars", "fsync", "anchor_key_file"},
}
# Sections read by their own modules (servesettings, interfaces), which check their keys.
_OWN_SECTIONS = {"serve", "interfaces"}
_TOP = {"rulebook", "strict", "rulebook_roots"} | set(_SECTIONS) | _OWN_SECTIONS
_TRUE, _FALSE = {"1", "true", "yes", "on"}, {"0", "false", "no", "off"}
_ACCEPTED = {
    "path": "a file or directory path",
    "bool": "true or false (1/0, yes/no, on/off)",
    "policy": " | ".join(CONTEXT_POLICIES),
    "keys": "a list of key names (comma separated in the environment)",
    "int": "an integer",
    "percent": "a number from 0 to 100",
    "count": "a whole number of at least 1",
    "paths": "a list of directories (os.pathsep separated in the environment)",
    "secret": "a string of at least 16 characters",
}


def _convert(name: str, kind: str, value: Any, where: str, base: Path | None) -> Any:
    def bad(why: str) -> SettingsError:
        return SettingsError(name, why, _ACCEPTED[kind], where)

    if kind == "bool":
        if isinstance(value, bool):
            return value
        if isinstance(value, (str, int)) and str(value).strip().lower() in _TRUE | _FALSE:
            return str(value).strip().lower() in _TRUE
        raise bad(f"{value!r} is not a yes/no value")
    if kind == "int":
        try:
            if isinstance(value, bool) or (isinstance(value, float) and not value.is_integer()):
                raise ValueError
            return int(value)
        except (TypeError, ValueError):
            raise bad(f"{value!r} is not an integer") from None
    if kind == "percent":
        try:
            if isinstance(value, bool):
                raise ValueError
            number = float(value)
        except (TypeError, ValueError):
            raise bad(f"{value!r} is not a number") from None
        if not 0 <= number <= 100:
            raise bad(f"{value!r} is outside 0 to 100")
        return number
    if kind == "count":
        if (
            isinstance(value, bool)
            or not isinstance(value, (int, str))
            or not str(value).strip().isdigit()
            or int(value) < 1
        ):
            raise bad(f"{value!r} is not a whole number of at least 1")
        return int(value)
    if kind == "paths":
        items = value.split(os.pathsep) if isinstance(value, str) else value
        if not isinstance(items, list) or not all(isinstance(p, str) and p.strip() for p in items):
            raise bad(f"{value!r} is not a list of directories")
        return tuple(
            Path(p).expanduser() if Path(p).expanduser().is_absolute() or base is None else base / p
            for p in items
        )
    if kind == "keys":
        items = value.split(",") if isinstance(value, str) else value
        if not isinstance(items, list) or not all(isinstance(k, str) and k.strip() for k in items):
            raise bad(f"{value!r} is not a list of names")
        return tuple(k.strip() for k in items)
    if not isinstance(value, str) or not value.strip():
        raise bad(f"{value!r} is not a non-empty string")
    if kind == "policy" and value not in CONTEXT_POLICIES:
        raise bad(f"unknown policy {value!r}")
    if kind == "path":
        path = Path(value).expanduser()
        return path if path.is_absolute() or base is None else base / path
    return value


def _from_file(path: Path) -> dict[str, Any]:
    from gasrules.rulebook.loader import load_document

    doc, problems = load_document(path)
    if problems or doc is None:
        first = problems[0] if problems else None
        raise SettingsError(
            "--settings",
            first.message if first else "cannot read the file",
            "a readable YAML mapping",
            str(first.location) if first else str(path),
        )
    data = doc.data if doc.data is not None else {}
    if not isinstance(data, dict):
        raise SettingsError(
            "--settings", "the file is not a mapping", "a YAML mapping of settings", str(doc.locate(()))
        )
    for key, body in data.items():
        if key not in _TOP:
            raise SettingsError(str(key), "unknown setting", ", ".join(sorted(_TOP)), str(doc.locate((key,))))
        if key in _SECTIONS:
            if not isinstance(body, dict):
                raise SettingsError(
                    key, "expected a mapping", ", ".join(sorted(_SECTIONS[key])), str(doc.locate((key,)))
                )
            for sub in body:
                if sub not in _SECTIONS[key]:
                    raise SettingsError(
                        f"{key}.{sub}",
                        "unknown setting",
                        ", ".join(sorted(_SECTIONS[key])),
                        str(doc.locate((key, sub))),
                    )
    out: dict[str, Any] = {}
    for name, (keys, _env, kind) in _TABLE.items():
        if not keys:
            continue
        node: Any = data
        for k in keys:
            node = node.get(k) if isinstance(node, dict) else None
        if node is not None:
            out[name] = _convert(".".join(keys), kind, node, str(doc.locate(keys)), path.parent)
    return out


def load_settings(
    file: str | os.PathLike[str] | None = None, *, env: Mapping[str, str] | None = None, **overrides: Any
) -> Settings:
    """Settings from defaults, then ``file``, then ``env`` (default os.environ), then overrides.

    Overrides are field names of :class:`Settings` with ready values (None means "not given").
    """
    values: dict[str, Any] = {}
    sources: list[str] = []
    if file is not None:
        values.update(_from_file(Path(file)))
        sources.append(str(file))
    environ = os.environ if env is None else env
    for name, (_keys, var, kind) in _TABLE.items():
        raw = environ.get(var)
        if raw is not None and raw != "":
            values[name] = raw if kind == "secret" else _convert(var, kind, raw, var, None)
            sources.append(var)
    unknown = sorted(set(overrides) - {f.name for f in dataclasses.fields(Settings)})
    if unknown:
        raise SettingsError(unknown[0], "unknown override", ", ".join(_TABLE))
    for name, value in overrides.items():
        if value is not None:
            values[name] = Path(value) if _TABLE.get(name, ((), "", ""))[2] == "path" else value
            sources.append(f"flag:{name}")
    settings = Settings(**values, sources=tuple(sources))
    if settings.decision_log is not None or settings.shadow_log is not None:
        settings.record_config()  # fail now, not at the first case
    return settings
