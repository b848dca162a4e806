"""The ``serve:`` section of a settings file: address, limits and options of `gasrules serve`.

Every key is optional; a command-line flag given explicitly wins over the file, the file over the
built-in default. Relative paths are taken from the settings file's directory. A bad value is a
:class:`~gasrules.governance.settings.SettingsError` naming ``serve.<key>``, its ``file:line:col`` and the
accepted range. ``docs/settings.example.yaml`` is a complete, commented example.

Keys (default, accepted range):

==================  ===========================  ===========================================
host                127.0.0.1                    an address to listen on
port                8080                         0-65535 (0 picks a free port)
max_body            1048576                      1024-1073741824 bytes of request body
timeout             10                           0.1-3600 s from a request's first byte to the
                                                 end of its body; also a batch's time limit
keep_alive          5                            0.5-600 s an idle connection is kept
max_batch           10000                        1-1000000 cases per batch request
max_connections     1024                         1-100000 open connections
max_concurrency     64                           1-10000 API requests in progress (probes exempt)
max_depth           32                           2-1000 nesting levels of a JSON body
max_case_fields     256                          8-100000 fields of one case
response_floor      8388608                      1024-2147483648 response bytes always allowed
response_ratio      64                           1-100000 response bytes per request byte
cors_origins        []                           a list of origins (``https://ehr.example.org``)
                                                 or ``["*"]``
cds_keys            none                         CDS Hooks key configuration file
cds_window_minutes  0                            0-1440
feedback_log        cds-feedback.jsonl           a file path
access_log          true                         true or false (JSON log line per request)
http_parser         httptools                    httptools (llhttp) or h11 (pure Python)
tls_certfile        none                         PEM certificate chain (uvicorn serves TLS)
tls_keyfile         none                         PEM private key
==================  ===========================  ===========================================
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from gasrules.governance.settings import SettingsError

__all__ = ["SERVE_KEYS", "serve_section"]

# key -> (kind, low, high)
SERVE_KEYS: dict[str, tuple[str, float, float]] = {
    "host": ("str", 0, 0),
    "port": ("int", 0, 65535),
    "max_body": ("int", 1024, 1 << 30),
    "timeout": ("float", 0.1, 3600),
    "keep_alive": ("float", 0.5, 600),
    "max_batch": ("int", 1, 1_000_000),
    "max_connections": ("int", 1, 100_000),
    "max_concurrency": ("int", 1, 10_000),
    "max_depth": ("int", 2, 1000),
    "max_case_fields": ("int", 8, 100_000),
    "response_floor": ("int", 1024, 1 << 31),
    "response_ratio": ("int", 1, 100_000),
    "cors_origins": ("list", 0, 0),
    "cds_keys": ("path", 0, 0),
    "cds_window_minutes": ("float", 0, 1440),
    "feedback_log": ("path", 0, 0),
    "access_log": ("bool", 0, 0),
    "http_parser": ("parser", 0, 0),
    "tls_certfile": ("path", 0, 0),
    "tls_keyfile": ("path", 0, 0),
}


def _accepted(kind: str, low: float, high: float) -> str:
    return {
        "int": f"a whole number from {low:g} to {high:g}",
        "float": f"a number from {low:g} to {high:g}",
        "str": "a non-empty string",
        "path": "a file path",
        "bool": "true or false",
        "list": "a list of strings",
        "parser": "httptools or h11",
    }[kind]


def convert(key: str, value: Any, where: str, base: Path | None) -> Any:
    """``value`` of ``serve.<key>`` checked and converted; raises SettingsError."""
    kind, low, high = SERVE_KEYS[key]

    def bad(why: str) -> SettingsError:
        return SettingsError(f"serve.{key}", why, _accepted(kind, low, high), where)

    if kind in ("int", "float"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad(f"{value!r} is not a number")
        if kind == "int" and not float(value).is_integer():
            raise bad(f"{value!r} is not a whole number")
        if not low <= value <= high:
            raise bad(f"{value!r} is out of range")
        return int(value) if kind == "int" else float(value)
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad(f"{value!r} is not true or false")
        return value
    if kind == "list":
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
            raise bad(f"{value!r} is not a list of strings")
        return tuple(value)
    if not isinstance(value, str) or not value.strip():
        raise bad(f"{value!r} is not a non-empty string")
    if kind == "parser" and value not in ("httptools", "h11"):
        raise bad(f"unknown parser {value!r}")
    if kind == "path":
        path = Path(value).expanduser()
        return str(path if path.is_absolute() or base is None else base / path)
    return value


def serve_section(file: str | os.PathLike[str] | None) -> dict[str, Any]:
    """The checked ``serve:`` values of a settings file (empty without a file or section), as
    :class:`~gasrules.service.handlers.ServiceConfig` field names (``timeout`` etc. keep their names)."""
    if file is None:
        return {}
    from gasrules.rulebook.loader import load_document

    path = Path(file)
    doc, problems = load_document(path)
    if problems or doc is None:
        first = problems[0] if problems else None
        raise SettingsError(
            "--settings",
            first.message if first else "cannot read the file",
            "a readable YAML mapping",
            str(first.location) if first else str(path),
        )
    data = doc.data if isinstance(doc.data, dict) else {}
    section = data.get("serve")
    if section is None:
        return {}
    if not isinstance(section, dict):
        raise SettingsError("serve", "expected a mapping", ", ".join(SERVE_KEYS), str(doc.locate(("serve",))))
    out: dict[str, Any] = {}
    for key, value in section.items():
        where = str(doc.locate(("serve", key)))
        if key not in SERVE_KEYS:
            raise SettingsError(f"serve.{key}", "unknown setting", ", ".join(SERVE_KEYS), where)
        out[key] = convert(key, value, where, path.parent)
    return out
