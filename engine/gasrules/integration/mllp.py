"""`gasrules listen`: an MLLP listener (asyncio) that interprets ORU^R01 and acknowledges.

For each framed message, in order on its connection:

1. the header is read from the bytes (MSH-18 decides how the rest is decoded);
2. a message whose MSH-3, MSH-4 and MSH-10 were already answered within ``dedupe_minutes``
   gets the same acknowledgement again and is **not** interpreted twice (a retransmission
   arriving while the first copy is still being processed waits for its answer);
3. a message that is not ORU^R01, has no MSH-10, or declares an unsupported character set is
   rejected: ``AR``, with ERR-2 at the MSH field and an HL7 table 0357 code in ERR-3;
4. a message whose content cannot be used (a value that is not a number, an unknown unit, a
   missing required field) gets ``AE`` with one ERR per error, naming its segment, occurrence
   and field (``OBX^4^5``); nothing is filed;
5. otherwise the case is interpreted, the result ORU^R01 is **filed** (written to a temporary
   name in ``outbox`` and renamed) and, when ``forward`` is set, **forwarded** over MLLP and
   its acknowledgement awaited; only then is ``AA`` sent. If filing or forwarding fails the
   answer is ``AR`` (ERR-3 207), nothing is remembered, and a retransmission is processed anew.

MSA-2 is always the message's MSH-10. The acknowledgement is written in the message's own
character set. Settings (``interfaces.listen`` in a settings file; flags override)::

    interfaces:
      facility: SITE-LAB               # MSH-4 of the acknowledgements and result messages
      listen:
        host: 127.0.0.1
        port: 2575
        outbox: ../hl7-out             # a folder; required
        forward: 10.1.2.3:2576         # optional MLLP destination for the result messages
        forward_timeout: 10            # seconds to connect, send and receive its ACK
        dedupe_minutes: 60             # remember answered MSH-10 this long
        max_message: 1048576           # bytes in one frame
        idle_timeout: 300              # close a connection silent this long
        max_connections: 256           # open connections; one more is closed at once
"""

from __future__ import annotations

import asyncio
import json
import os
import re
import sys
import time
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from gasrules.core.errors import EngineError
from gasrules.integration.hl7wire import (
    MllpDecoder,
    RawHeader,
    ack,
    decode,
    encoding_of,
    frame,
    raw_header,
)
from gasrules.integration.interfaces import InterfaceSettings, incoming_from_hl7, to_hl7
from gasrules.integration.standard_codes import Issue

__all__ = ["ListenConfig", "Listener", "listen_settings"]


@dataclass(frozen=True)
class ListenConfig:
    host: str = "127.0.0.1"
    port: int = 2575
    outbox: Path | None = None
    forward: tuple[str, int] | None = None
    forward_timeout: float = 10.0
    dedupe_minutes: float = 60.0
    max_message: int = 1_048_576
    idle_timeout: float = 300.0
    max_connections: int = 256
    max_remembered: int = 100_000


_KEYS = {
    "host": ("str", 0, 0),
    "port": ("int", 0, 65535),
    "outbox": ("path", 0, 0),
    "forward": ("hostport", 0, 0),
    "forward_timeout": ("float", 0.1, 600),
    "dedupe_minutes": ("float", 0, 10_080),
    "max_message": ("int", 1024, 1 << 30),
    "idle_timeout": ("float", 1, 86_400),
    "max_connections": ("int", 1, 100_000),
}


def parse_hostport(text: str) -> tuple[str, int]:
    """'host:port' -> (host, port); raises ValueError naming the accepted form."""
    host, sep, port = text.rpartition(":")
    if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise ValueError(f"{text!r} is not HOST:PORT (a port from 1 to 65535)")
    return host.strip("[]"), int(port)


def listen_settings(value: Any, doc: Any, base: Path) -> dict[str, Any]:
    """The checked ``interfaces.listen`` mapping (ListenConfig field names)."""
    from gasrules.governance.settings import SettingsError

    if not isinstance(value, dict):
        raise SettingsError(
            "interfaces.listen",
            "expected a mapping",
            ", ".join(_KEYS),
            str(doc.locate(("interfaces", "listen"))),
        )
    out: dict[str, Any] = {}
    for key, raw in value.items():
        where = str(doc.locate(("interfaces", "listen", key)))
        if key not in _KEYS:
            raise SettingsError(f"interfaces.listen.{key}", "unknown setting", ", ".join(_KEYS), where)
        kind, low, high = _KEYS[key]
        name = f"interfaces.listen.{key}"
        if kind in ("int", "float"):
            if (
                isinstance(raw, bool)
                or not isinstance(raw, (int, float))
                or not low <= raw <= high
                or (kind == "int" and not float(raw).is_integer())
            ):
                raise SettingsError(
                    name, f"{raw!r} is out of range", f"a number from {low:g} to {high:g}", where
                )
            out[key] = int(raw) if kind == "int" else float(raw)
        elif not isinstance(raw, str) or not raw.strip():
            raise SettingsError(name, f"{raw!r} is not a non-empty string", "a string", where)
        elif kind == "path":
            path = Path(raw).expanduser()
            out[key] = path if path.is_absolute() else base / path
        elif kind == "hostport":
            try:
                out[key] = parse_hostport(raw)
            except ValueError as exc:
                raise SettingsError(name, str(exc), "HOST:PORT", where) from None
        else:
            out[key] = raw
    return out


class ForwardError(EngineError):
    """The result message could not be delivered to the forward destination."""


class _Answer:
    """One acknowledgement and whether it may be remembered (AR for a failure may not)."""

    def __init__(self, text: str, code: str, remember: bool) -> None:
        self.text, self.code, self.remember = text, code, remember


class Listener:
    """The MLLP service: ``await start()``, then ``port``; ``await stop()``."""

    def __init__(
        self,
        interpreter: Any,
        config: ListenConfig,
        settings: InterfaceSettings,
        log: Callable[..., None] | None = None,
    ) -> None:
        if config.outbox is None:
            raise ValueError("an outbox folder is required (interfaces.listen.outbox or --outbox)")
        self.interpreter, self.config, self.settings = interpreter, config, settings
        self.catalog = interpreter.rulebook.inputs
        self.log = log or _stderr_log
        self._answered: OrderedDict[tuple[str, str, str], tuple[float, _Answer]] = OrderedDict()
        self._pending: dict[tuple[str, str, str], asyncio.Future[_Answer]] = {}
        self._server: asyncio.AbstractServer | None = None
        self._sequence = 0
        self._open = 0  # connections being served
        self.interpreted = 0  # cases interpreted (for operators and tests)

    @property
    def port(self) -> int:
        assert self._server is not None and self._server.sockets
        return int(self._server.sockets[0].getsockname()[1])

    async def start(self) -> None:
        self.config.outbox.mkdir(parents=True, exist_ok=True)  # type: ignore[union-attr]
        self._server = await asyncio.start_server(self._connection, self.config.host, self.config.port)

    async def stop(self) -> None:
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()

    # -- connections
    async def _connection(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        decoder = MllpDecoder(self.config.max_message)
        peer = writer.get_extra_info("peername")
        if self._open >= self.config.max_connections:
            self.log(
                event="refused", peer=str(peer), reason=f"already {self.config.max_connections} connections"
            )
            writer.close()
            return
        self._open += 1
        try:
            while True:
                try:
                    data = await asyncio.wait_for(reader.read(65536), self.config.idle_timeout)
                except TimeoutError:
                    break
                if not data:
                    break
                try:
                    frames = decoder.feed(data)
                except ValueError as exc:  # an oversized frame: answer and hang up
                    self.log(event="refused", peer=str(peer), reason=str(exc))
                    issue = Issue("message", "hl7.too_large", str(exc))
                    writer.write(frame(self._ack("AR", None, [issue]).encode("ascii")))
                    break
                for raw in frames:
                    answer, header = await self._answer(raw)
                    writer.write(frame(answer.text.encode(encoding_of(header), "replace")))
                    await writer.drain()
        except (ConnectionError, asyncio.IncompleteReadError):
            pass
        finally:
            self._open -= 1
            writer.close()

    # -- one message
    async def _answer(self, raw: bytes) -> tuple[_Answer, RawHeader | None]:
        started = time.perf_counter()
        header = raw_header(raw)
        key = (header.raw(3), header.raw(4), header.raw(10)) if header else ("", "", "")
        if header is None or not header.raw(10):
            issue = (
                Issue(
                    "MSH[1]-10",
                    "hl7.no_control_id",
                    "MSH-10 (message control id) is missing; it is needed to acknowledge the message",
                )
                if header
                else Issue("message", "hl7.no_msh", "the message does not start with an MSH segment")
            )
            return _Answer(self._ack("AR", header, [issue]), "AR", False), header
        known = self._remembered(key)
        if known is not None:
            self.log(event="retransmission", control_id=key[2], ack=known.code)
            return known, header
        if key in self._pending:
            return await asyncio.shield(self._pending[key]), header
        future: asyncio.Future[_Answer] = asyncio.get_running_loop().create_future()
        self._pending[key] = future
        try:
            answer = await self._process(raw, header)
        except Exception as exc:
            self.log(
                event="internal_error", control_id=key[2], error=type(exc).__name__, detail=str(exc)[:200]
            )
            issue = Issue(
                "message",
                "hl7.delivery",
                "internal error while processing the message; it was not filed; send it again",
            )
            answer = _Answer(self._ack("AR", header, [issue]), "AR", False)
        finally:
            del self._pending[key]
        future.set_result(answer)
        if answer.remember:
            self._remember(key, answer)
        self.log(
            event="message",
            control_id=key[2],
            ack=answer.code,
            ms=round((time.perf_counter() - started) * 1000, 2),
        )
        return answer, header

    async def _process(self, raw: bytes, header: RawHeader) -> _Answer:
        kind = (header.get(9, 1), header.get(9, 2))
        if kind != ("ORU", "R01"):
            shown = "^".join(k for k in kind if k) or "nothing"
            issue = Issue(
                "MSH[1]-9", "hl7.message_type", f"message type is {shown}; this service accepts ORU^R01"
            )
            return _Answer(self._ack("AR", header, [issue]), "AR", True)
        text, problem = decode(raw)
        if problem is not None:
            return _Answer(self._ack("AR", header, [problem]), "AR", True)
        incoming = incoming_from_hl7(raw, self.catalog)
        if incoming.errors:
            return _Answer(self._ack("AE", header, incoming.errors), "AE", True)
        result = await asyncio.to_thread(self.interpreter.interpret, incoming.case, False)
        self.interpreted += 1
        message = to_hl7(result, incoming, self.settings, f"GR-{header.raw(10)}")
        try:
            path = await asyncio.to_thread(self._file, header.raw(10), message)
            if self.config.forward is not None:
                await self._forward(message)
        except (OSError, ForwardError) as exc:
            issue = Issue(
                "message", "hl7.delivery", f"the result was not delivered ({exc}); send the message again"
            )
            self.log(event="delivery_failed", control_id=header.raw(10), reason=str(exc))
            return _Answer(self._ack("AR", header, [issue]), "AR", False)
        self.log(event="filed", control_id=header.raw(10), path=str(path), status=result["status"])
        return _Answer(self._ack("AA", header, []), "AA", True)

    def _file(self, control_id: str, message: str) -> Path:
        safe = re.sub(r"[^A-Za-z0-9._-]", "_", control_id)[:80] or "message"
        stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%S%f")
        outbox = self.config.outbox
        assert outbox is not None
        final = outbox / f"{stamp}-{safe}.hl7"
        tmp = outbox / f".{final.name}.tmp"
        with tmp.open("w", encoding="utf-8", newline="") as f:
            f.write(message)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, final)
        return final

    async def _forward(self, message: str) -> None:
        host, port = self.config.forward  # type: ignore[misc]
        timeout = self.config.forward_timeout
        try:
            reader, writer = await asyncio.wait_for(asyncio.open_connection(host, port), timeout)
        except (OSError, TimeoutError) as exc:
            raise ForwardError(f"cannot connect to {host}:{port}: {exc or 'timed out'}") from None
        try:
            writer.write(frame(message.encode("utf-8")))
            await writer.drain()
            decoder = MllpDecoder(self.config.max_message)
            deadline = time.monotonic() + timeout
            while True:
                left = deadline - time.monotonic()
                data = await asyncio.wait_for(reader.read(65536), max(0.01, left))
                if not data:
                    raise ForwardError(f"{host}:{port} closed the connection before its ACK")
                frames = decoder.feed(data)
                if frames:
                    break
        except TimeoutError:
            raise ForwardError(f"no acknowledgement from {host}:{port} within {timeout:g} s") from None
        except (OSError, ValueError) as exc:
            raise ForwardError(f"{host}:{port}: {exc}") from None
        finally:
            writer.close()
        reply = raw_header(frames[0])
        msa = re.search(rb"(?:^|[\r\n])MSA\|([A-Z]{2})", frames[0])
        code = msa.group(1).decode() if msa else ""
        if reply is None or code not in ("AA", "CA"):
            raise ForwardError(f"{host}:{port} answered {code or 'without an MSA segment'}")

    # -- acknowledgements and memory
    def _ack(self, code: str, header: RawHeader | None, errors: list[Issue]) -> str:
        self._sequence += 1
        now = datetime.now(UTC)
        return ack(
            code,
            header,
            control_id=f"GRACK{now:%Y%m%d%H%M%S}{self._sequence:06d}",
            timestamp=now.strftime("%Y%m%d%H%M%S"),
            application=self.settings.application,
            facility=self.settings.facility,
            errors=errors,
        )

    def _remembered(self, key: tuple[str, str, str]) -> _Answer | None:
        entry = self._answered.get(key)
        if entry is None:
            return None
        if entry[0] < time.monotonic():
            del self._answered[key]
            return None
        return entry[1]

    def _remember(self, key: tuple[str, str, str], answer: _Answer) -> None:
        now = time.monotonic()
        self._answered[key] = (now + self.config.dedupe_minutes * 60, answer)
        self._answered.move_to_end(key)
        while self._answered and (
            len(self._answered) > self.config.max_remembered or next(iter(self._answered.values()))[0] < now
        ):
            self._answered.popitem(last=False)


def _stderr_log(**fields: Any) -> None:
    line = json.dumps(
        {"ts": datetime.now(UTC).isoformat(timespec="milliseconds"), "service": "listen", **fields},
        default=str,
    )
    sys.stderr.write(line + "\n")
    sys.stderr.flush()
