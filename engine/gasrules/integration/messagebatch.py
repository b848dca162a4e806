"""`gasrules batch` with HL7 v2 or FHIR on either side (the tabular path is :mod:`gasrules.integration.batch`).

* HL7 v2 or FHIR **in**, CSV / JSON Lines / Parquet **out**: the messages are read into cases
  (:mod:`gasrules.integration.interfaces`; a message that cannot be read is a rejected case naming its
  errors) and handed to the ordinary tabular run, so the output has the same columns as for a
  JSON Lines input.
* Any input, **FHIR out** (``--format fhir``, or a target ending ``.fhir.ndjson``): one FHIR
  Bundle per case, one per line (NDJSON), in input order.
* Any input, **HL7 v2 out** (``--format hl7``, or a ``.hl7`` target): one preliminary ORU^R01
  per case, segments ending in CR, messages separated by a newline; ``.mllp`` targets are
  MLLP-framed instead.

N cases in, N out; output goes to a temporary file renamed into place at the end.
"""

from __future__ import annotations

import dataclasses
import json
import os
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from gasrules.evaluation.evaluator import UNREADABLE
from gasrules.integration.batch import BatchOptions, BatchSummary, RunHooks, run_batch
from gasrules.integration.interfaces import (
    Incoming,
    InterfaceSettings,
    input_format,
    read_incoming,
    to_fhir,
    to_hl7,
)

__all__ = ["message_formats", "run_message_batch"]

MESSAGE_OUT = ("fhir", "hl7")


def message_formats(
    source: str, target: str, in_format: str | None, out_format: str | None
) -> tuple[str | None, str | None]:
    """(message input format or None, message output format or None) for a batch run."""
    src = None
    if in_format in ("hl7", "fhir"):
        src = in_format
    elif in_format is None and not Path(source).is_dir():
        found = input_format(str(source))
        src = found if found in ("hl7", "fhir") else None
    out = None
    if out_format in MESSAGE_OUT:
        out = out_format
    elif out_format is None:
        name = str(target).lower()
        if name.endswith((".hl7", ".mllp")):
            out = "hl7"
        elif name.endswith((".fhir.ndjson", ".fhir.jsonl")):
            out = "fhir"
    return src, out


def run_message_batch(
    rb: Any,
    source: str | Path,
    target: str,
    options: BatchOptions,
    hooks: RunHooks | None,
    src_fmt: str | None,
    out_fmt: str | None,
    settings: InterfaceSettings,
) -> BatchSummary:
    """One run with HL7 v2 or FHIR on at least one side (see module doc)."""
    hooks = hooks or RunHooks()
    rb = hooks.rulebook if hooks.rulebook is not None else rb
    if out_fmt is None:  # messages in, a table out: through the tabular run
        return _messages_to_table(rb, source, target, options, hooks, src_fmt or "hl7")
    summary = BatchSummary(output=str(target), rulebook=dict(rb.identity), notes=hooks.notes)
    t0 = time.perf_counter()
    try:
        pairs = _message_cases(rb, str(source), src_fmt) if src_fmt else _table_cases(rb, source, options)
        with _Output(target, mllp=str(target).lower().endswith(".mllp")) as out:
            for n, (incoming, case, preread) in enumerate(pairs, 1):
                result = preread if preread is not None else _interpret(rb, case, hooks)
                unreadable = isinstance(case, dict) and UNREADABLE in case
                if hooks.observe is not None:
                    other = (
                        _interpret(hooks.candidate, case, RunHooks()) if hooks.candidate is not None else None
                    )
                    hooks.observe(case, result, other, unreadable)
                summary.add(result["status"], result.get("disorders") or [], unreadable)
                if out_fmt == "fhir":
                    out.write(
                        json.dumps(to_fhir(result, incoming, rb, settings.codesystem_url), ensure_ascii=False)
                        + "\n",
                        hl7=False,
                    )
                else:
                    ident = (
                        incoming.control_id
                        if incoming and incoming.control_id
                        else result.get("case_id") or n
                    )
                    out.write(to_hl7(result, incoming, settings, f"GR-{ident}"), hl7=True)
    finally:
        if hooks.close is not None:
            hooks.close()
    summary.seconds = time.perf_counter() - t0
    return summary


def _interpret(rb: Any, case: Any, hooks: RunHooks) -> dict[str, Any]:
    from gasrules.evaluation.evaluator import interpret

    return interpret(rb, case, hooks.trace)


def _message_cases(
    rb: Any, source: str, fmt: str
) -> Iterator[tuple[Incoming | None, Any, dict[str, Any] | None]]:
    for incoming in read_incoming(source, fmt, rb.inputs):
        yield incoming, incoming.case, None


def _table_cases(
    rb: Any, source: str | Path, options: BatchOptions
) -> Iterator[tuple[Incoming | None, Any, dict[str, Any] | None]]:
    from gasrules.tables.readers import analytes_of, interpret_row, open_table

    with open_table(source, analytes_of(rb), mapping=options.mapping, fmt=options.in_format) as table:
        for row in table:
            preread = interpret_row(rb, row) if row.errors else None
            yield None, row.case, preread


def _messages_to_table(
    rb: Any, source: str | Path, target: str, options: BatchOptions, hooks: RunHooks, fmt: str
) -> BatchSummary:
    """Messages as JSON Lines cases in a temporary file, then the ordinary tabular run."""
    handle, tmp = tempfile.mkstemp(suffix=".jsonl", prefix="gasrules-messages-")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as f:
            for incoming in read_incoming(str(source), fmt, rb.inputs):
                f.write(json.dumps(incoming.case, ensure_ascii=False) + "\n")
        plain = dataclasses.replace(options, in_format="jsonl")
        return run_batch(rb, tmp, target, plain, hooks)
    finally:
        Path(tmp).unlink(missing_ok=True)


class _Output:
    """A text target written to a temporary file beside it and renamed at a clean end."""

    def __init__(self, target: str, mllp: bool) -> None:
        self.target, self.mllp = target, mllp
        self._tmp: Path | None = None
        self._f: Any = None

    def __enter__(self) -> _Output:
        if self.target == "-":
            import sys

            self._f = sys.stdout
        else:
            path = Path(self.target)
            self._tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
            self._f = self._tmp.open("w", encoding="utf-8", newline="")
        return self

    def write(self, text: str, hl7: bool) -> None:
        if hl7 and self.mllp:
            self._f.write("\x0b" + text + "\x1c\r")
        else:
            self._f.write(text + ("\n" if hl7 else ""))

    def __exit__(self, exc_type: Any, *exc: Any) -> None:
        if self._tmp is None:
            self._f.flush()
            return
        self._f.close()
        if exc_type is None:
            os.replace(self._tmp, self.target)
        else:
            self._tmp.unlink(missing_ok=True)
