"""The socket layer of `gasrules serve`: uvicorn with one of its parsers, plus guards it lacks.

uvicorn parses HTTP with httptools (llhttp, Node.js's parser; the default, measured faster by
tools/bench_serve.py) or h11 (pure Python; ``serve.http_parser: h11``). Both refuse a
non-digit or differing duplicate ``Content-Length`` with 400; h11 merges identical duplicates,
as RFC 9110 allows, llhttp refuses them too. uvicorn has no deadline on reading a
request's headers, and its keep-alive timer stops at the first byte of the next request, so a
client sending a byte every few seconds would hold its connection for ever. The protocol here
adds:

* a **request deadline**: from a connection's first byte (or the first byte after the previous
  response) to the end of the request's body. A request still incomplete at the deadline gets
  ``408`` (JSON) and the connection is closed; the application waiting for the body sees a
  disconnect. The start time goes to the application in ``scope["extensions"]
  ["gasrules.started"]``.
* a **connection cap**: a connection beyond ``max_connections`` gets an immediate ``503`` and
  is closed; the request deadline keeps slow clients from holding their places.

:func:`make_server` binds the socket first (port 0 picks a free port) so that callers and tests
know the address before serving starts.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
import socket
import sys
import threading
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime
from typing import Any

import h11
import orjson
import uvicorn
from uvicorn.protocols.http.h11_impl import H11Protocol

__all__ = ["BoundServer", "make_server", "raw_error"]

MAX_HEADER_BYTES = 16 * 1024


def raw_error(
    status: int, reason: str, code: str, message: str, extra: tuple[tuple[str, str], ...] = ()
) -> bytes:
    """A complete HTTP/1.1 response with a JSON error body and ``Connection: close``."""
    body = orjson.dumps({"error": {"code": code, "message": message}})
    head = [
        f"HTTP/1.1 {status} {reason}",
        "content-type: application/json",
        f"content-length: {len(body)}",
        "connection: close",
        "cache-control: no-store",
        *(f"{k}: {v}" for k, v in extra),
    ]
    return ("\r\n".join(head) + "\r\n\r\n").encode("ascii") + body


class _CoalescingTransport:
    """A transport whose writes in one event-loop turn leave in one send: a response's status
    line, headers and body are written by separate calls, which would otherwise cost a system
    call (and a TCP segment) each."""

    def __init__(self, transport: asyncio.Transport, loop: asyncio.AbstractEventLoop) -> None:
        self._transport, self._loop = transport, loop
        self._pending: list[bytes] = []

    def write(self, data: bytes) -> None:
        if not self._pending:
            self._loop.call_soon(self._flush)
        self._pending.append(bytes(data))

    def _flush(self) -> None:
        if self._pending:
            data = b"".join(self._pending)
            self._pending.clear()
            if not self._transport.is_closing():
                self._transport.write(data)

    def close(self) -> None:
        self._flush()
        self._transport.close()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._transport, name)


class GuardMixin:
    """A request deadline and a connection cap for uvicorn's HTTP protocols (class attributes
    set by :func:`protocol_class`)."""

    request_timeout: float = 10.0
    max_connections: int = 1024

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self.transport = _CoalescingTransport(transport, self.loop)  # type: ignore[assignment]
        self._deadline: asyncio.TimerHandle | None = None
        self._started = time.monotonic()
        if len(self.connections) > self.max_connections:
            transport.write(
                raw_error(
                    503,
                    "Service Unavailable",
                    "http.busy",
                    f"the service already holds {self.max_connections} connections; retry shortly",
                    (("retry-after", "1"),),
                )
            )
            transport.close()
            return
        self._arm()

    def send_400_response(self, msg: str) -> None:
        """The parser refused the request: a JSON 400 (uvicorn's own is plain text)."""
        self.transport.write(
            raw_error(
                400,
                "Bad Request",
                "http.bad_request",
                "the request is not valid HTTP/1.1: check "
                "the request line and headers; Content-Length must be digits only, and repeated "
                "Content-Length headers must agree",
            )
        )
        self.transport.close()

    def _arm(self, delay: float | None = None) -> None:
        self._disarm()
        self._deadline = self.loop.call_later(
            delay if delay is not None else self.request_timeout, self._on_deadline
        )

    def _disarm(self) -> None:
        if getattr(self, "_deadline", None) is not None:
            self._deadline.cancel()  # type: ignore[union-attr]
            self._deadline = None

    def data_received(self, data: bytes) -> None:
        if self._deadline is None and not self._body_done():
            self._started = time.monotonic()
            self._arm()
        super().data_received(data)
        scope = self.scope
        if scope is not None and "extensions" not in scope:  # the guard's deadline starts here
            scope["extensions"] = {"gasrules.started": self._started}  # type: ignore[typeddict-unknown-key]
        if self._body_done():
            self._disarm()

    def _body_done(self) -> bool:
        """The current request has been read whole (the application is working on it)."""
        cycle = self.cycle
        return cycle is not None and not cycle.response_complete and not cycle.more_body

    def on_response_complete(self) -> None:
        self._disarm()
        super().on_response_complete()

    def connection_lost(self, exc: Exception | None) -> None:
        self._disarm()
        super().connection_lost(exc)

    def _on_deadline(self) -> None:
        self._deadline = None
        if self.transport.is_closing():
            return
        cycle = self.cycle
        active = cycle is not None and not cycle.response_complete
        if active and (cycle.response_started or self._body_done()):
            return
        if not active or not cycle.response_started:
            self.transport.write(
                raw_error(
                    408,
                    "Request Timeout",
                    "http.timeout",
                    f"the request was not received within {self.request_timeout:g} s",
                )
            )
        if active:
            cycle.disconnected = True
            cycle.message_event.set()
        conn = getattr(self, "conn", None)
        if isinstance(conn, h11.Connection) and conn.our_state != h11.ERROR:
            try:
                conn.send(h11.ConnectionClosed())
            except h11.LocalProtocolError:
                pass
        self.transport.close()


class GuardedH11Protocol(GuardMixin, H11Protocol):
    """uvicorn's h11 protocol, guarded."""


def _httptools_protocol() -> type | None:
    try:
        from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol
    except ImportError:
        return None
    return type("GuardedHttpToolsProtocol", (GuardMixin, HttpToolsProtocol), {})


def protocol_class(request_timeout: float, max_connections: int, parser: str = "httptools") -> type:
    """The guarded protocol on ``parser``: ``httptools`` (llhttp, the default; faster) or
    ``h11`` (pure Python)."""
    base = _httptools_protocol() if parser == "httptools" else GuardedH11Protocol
    if base is None:
        raise ValueError("the httptools parser is not installed")
    return type(
        "GasrulesHttpProtocol",
        (base,),
        {"request_timeout": request_timeout, "max_connections": max_connections},
    )


class _Server(uvicorn.Server):
    """uvicorn's server without its signal handling: the caller decides (``gasrules serve``
    stops gracefully on SIGINT or SIGTERM and exits 0; tests stop it from another thread)."""

    @contextlib.contextmanager
    def capture_signals(self) -> Iterator[None]:
        yield


class JsonLogHandler(logging.Handler):
    """uvicorn's own messages (protocol errors, start, stop) as JSON lines on stderr, like the
    request log of :mod:`gasrules.service.asgi`."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            line = orjson.dumps(
                {
                    "ts": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
                    "level": record.levelname.lower(),
                    "event": "server",
                    "logger": record.name,
                    "message": record.getMessage(),
                }
            )
            sys.stderr.write(line.decode() + "\n")
            sys.stderr.flush()
        except Exception:
            self.handleError(record)


def json_server_logs(level: int = logging.WARNING) -> None:
    """Route uvicorn's loggers to :class:`JsonLogHandler` (once)."""
    logger = logging.getLogger("uvicorn")
    if not any(isinstance(h, JsonLogHandler) for h in logger.handlers):
        logger.addHandler(JsonLogHandler())
    logger.setLevel(level)
    logger.propagate = False


class BoundServer:
    """A uvicorn server on an already bound socket. ``serve_forever`` blocks (in any thread);
    ``shutdown`` asks it to stop and waits; ``server_address`` is the bound (host, port)."""

    def __init__(
        self,
        app: Any,
        sock: socket.socket,
        *,
        request_timeout: float,
        keep_alive: float,
        max_connections: int,
        parser: str = "httptools",
        ssl_certfile: str | None = None,
        ssl_keyfile: str | None = None,
    ) -> None:
        self.socket = sock
        self.server_address = sock.getsockname()[:2]
        self.config = uvicorn.Config(
            app,
            http=protocol_class(request_timeout, max_connections, parser),
            loop="asyncio",
            lifespan="on",
            ws="none",
            interface="asgi3",
            log_config=None,
            access_log=False,
            server_header=False,
            proxy_headers=False,
            timeout_keep_alive=max(1, round(keep_alive)),
            h11_max_incomplete_event_size=MAX_HEADER_BYTES,
            timeout_graceful_shutdown=5,
            ssl_certfile=ssl_certfile,
            ssl_keyfile=ssl_keyfile,
        )
        self.server = _Server(self.config)
        json_server_logs()
        self._done = threading.Event()

    def serve_forever(self) -> None:
        try:
            self.server.run(sockets=[self.socket])
        finally:
            self._done.set()

    def shutdown(self, timeout: float = 10.0) -> None:
        self.server.should_exit = True
        self._done.wait(timeout)

    def stop_on_signals(self) -> Callable[[], None]:
        """SIGINT and SIGTERM ask for a graceful stop (main thread only); returns a restorer."""

        def stop(*_: object) -> None:
            self.server.should_exit = True

        previous = {sig: signal.signal(sig, stop) for sig in (signal.SIGINT, signal.SIGTERM)}
        return lambda: [signal.signal(sig, h) for sig, h in previous.items()] and None

    def server_close(self) -> None:
        self.socket.close()


def make_server(
    app: Any,
    host: str,
    port: int,
    *,
    request_timeout: float,
    keep_alive: float,
    max_connections: int,
    parser: str = "httptools",
    ssl_certfile: str | None = None,
    ssl_keyfile: str | None = None,
) -> BoundServer:
    """Bind ``host:port`` (0 picks a free port) and wrap the ASGI ``app``. Raises OSError."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    # IPPROTO_TCP explicitly: asyncio turns Nagle off (TCP_NODELAY) only on sockets whose
    # protocol says TCP; with Nagle on, a response's body waits ~40 ms behind its headers.
    sock = socket.socket(family, socket.SOCK_STREAM, socket.IPPROTO_TCP)
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((host, port))
        sock.listen(256)
    except OSError:
        sock.close()
        raise
    sock.setblocking(False)
    return BoundServer(
        app,
        sock,
        request_timeout=request_timeout,
        keep_alive=keep_alive,
        max_connections=max_connections,
        parser=parser,
        ssl_certfile=ssl_certfile,
        ssl_keyfile=ssl_keyfile,
    )
