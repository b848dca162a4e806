"""`gasrules serve` as an ASGI application: Starlette routing and CORS around :class:`App`.

The request guard (a plain ASGI middleware, outermost) gives every request an id (from
``X-Request-ID`` when it is a short token, else a new one), writes one JSON log line per request,
counts it for ``/metrics``, and before the application sees a body:

* refuses more than ``max_concurrency`` API requests in progress with ``503`` (``Retry-After``);
  a request counts once its body has arrived, so slow senders hold no work slot; the probes
  ``/health``, ``/ready`` and ``/metrics`` are exempt and answered on the event loop;
* refuses a chunked body or one without ``Content-Length`` (``411``) and a body above
  ``max_body`` (``413``, after reading and dropping it when it is small enough for the client to
  still read the answer);
* leaves the request deadline (first byte to end of body, ``408``) to the protocol of
  :mod:`gasrules.service.server`, and keeps its own timer only under another server.

The JSON API and CDS Hooks handlers are :class:`gasrules.service.handlers.App`, run in a worker thread so
that a long batch never holds up the probes; with the plain engine (no decision records to
write), a single case of up to 16 KiB arriving while no other API request is in progress is
interpreted on the event loop itself (about a millisecond, less than the hop to a thread).
"""

from __future__ import annotations

import asyncio
import json
import re
import secrets
import sys
import threading
import time
from collections.abc import Awaitable, Callable, MutableMapping
from datetime import UTC, datetime
from typing import Any
from urllib.parse import parse_qs

import anyio
from starlette.applications import Starlette
from starlette.middleware import Middleware
from starlette.middleware.cors import CORSMiddleware
from starlette.requests import Request as StarletteRequest
from starlette.responses import Response as StarletteResponse
from starlette.routing import Route

from gasrules.core.errors import EngineError
from gasrules.service.handlers import App, Request, Response, error_body
from gasrules.service.metrics import Metrics

__all__ = ["asgi_app"]

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]

PROBES = frozenset({"/health", "/ready", "/metrics"})
DRAIN_LIMIT = 16 * 1024 * 1024
INLINE_BODY = 16 * 1024  # a single case this small is interpreted on the event loop itself
_REQUEST_ID = re.compile(r"[A-Za-z0-9._:@/+=-]{1,128}")
_METHODS_WITH_BODY = frozenset({"POST", "PUT", "PATCH"})


class Refusal(EngineError):
    """A request refused before the application: status, error code, message, field."""

    def __init__(
        self, status: int, code: str, message: str, field: str = "", retry_after: str | None = None
    ) -> None:
        super().__init__(message)
        self.status, self.code, self.message, self.field = status, code, message, field
        self.retry_after = retry_after


class ClientGone(EngineError):
    """The client disconnected (or the protocol dropped it) while its body was being read."""


def request_id(headers: list[tuple[bytes, bytes]]) -> str:
    for name, value in headers:
        if name == b"x-request-id":
            text = value.decode("latin-1").strip()
            if _REQUEST_ID.fullmatch(text):
                return text
    return secrets.token_hex(16)


def _header(headers: list[tuple[bytes, bytes]], name: bytes) -> str | None:
    for k, v in headers:
        if k == name:
            return v.decode("latin-1")
    return None


class JsonLog:
    """One JSON object per line on a stream (stderr by default); thread-safe."""

    def __init__(self, enabled: bool, stream: Any = None) -> None:
        self.enabled, self.stream = enabled, stream or sys.stderr
        self._lock = threading.Lock()

    def write(self, **fields: Any) -> None:
        if not self.enabled:
            return
        line = json.dumps(
            {"ts": datetime.now(UTC).isoformat(timespec="milliseconds"), **fields},
            separators=(",", ":"),
            default=str,
        )
        with self._lock:
            self.stream.write(line + "\n")
            self.stream.flush()


class Guard:
    """Request id, log line, metrics, concurrency limit and body limits (see module doc)."""

    def __init__(
        self,
        inner: Any,
        probes: Any,
        service: App,
        metrics: Metrics,
        log: JsonLog,
        flight: dict[str, int] | None = None,
    ) -> None:
        self.inner, self.probes = inner, probes  # the API app; the probes (and lifespan)
        self.service, self.metrics, self.log = service, metrics, log
        self.flight = flight if flight is not None else {"n": 0}  # API requests in progress

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.probes(scope, receive, send)
            return
        started = time.perf_counter()
        rid = request_id(scope["headers"])
        path, method = scope["path"], scope["method"]
        answered = {"status": 0, "bytes": 0}

        async def tagged_send(message: Message) -> None:
            if message["type"] == "http.response.start":
                answered["status"] = message["status"]
                message["headers"] = [*message.get("headers", ()), (b"x-request-id", rid.encode("ascii"))]
            elif message["type"] == "http.response.body":
                answered["bytes"] += len(message.get("body", b""))
            await send(message)

        counted = path not in PROBES
        try:
            if method in _METHODS_WITH_BODY:  # reading costs a coroutine, not a work slot
                body = await self._read_body(scope, receive)
                scope.setdefault("extensions", {})["gasrules.body"] = body
                receive = _replay(body)
            if not counted:  # probes: never limited
                await self.probes(scope, receive, tagged_send)
                return
            if self.flight["n"] >= self.service.config.max_concurrency:
                raise Refusal(
                    503,
                    "http.busy",
                    f"the service is already working on "
                    f"{self.service.config.max_concurrency} requests; retry "
                    "shortly",
                    retry_after="1",
                )
            self.flight["n"] += 1
            try:
                await self.inner(scope, receive, tagged_send)
            finally:
                self.flight["n"] -= 1
        except Refusal as exc:
            await _send_refusal(tagged_send, exc, path.startswith("/cds-services"))
        except ClientGone:
            answered["status"] = answered["status"] or 499
        finally:
            seconds = time.perf_counter() - started
            route = self.service.route_name(path) if path not in PROBES else path.strip("/")
            self.metrics.observe_request(method, route, answered["status"], seconds)
            client = scope.get("client")
            self.log.write(
                level="info",
                event="request",
                request_id=rid,
                method=method,
                path=path,
                status=answered["status"],
                bytes=answered["bytes"],
                ms=round(seconds * 1000, 2),
                client=f"{client[0]}:{client[1]}" if client else None,
            )

    async def _read_body(self, scope: Scope, receive: Receive) -> bytes:
        headers = scope["headers"]
        config = self.service.config
        if "chunked" in (_header(headers, b"transfer-encoding") or "").lower():
            raise Refusal(
                411,
                "http.length_required",
                "chunked bodies are not accepted; send Content-Length",
                "Content-Length",
            )
        raw = _header(headers, b"content-length")
        if raw is None:
            raise Refusal(
                411,
                "http.length_required",
                "Content-Length is required (a whole number of bytes)",
                "Content-Length",
            )
        length = int(raw)  # the HTTP parser has already refused anything but digits
        started = scope.get("extensions", {}).get("gasrules.started")
        # Under gasrules.service.server the protocol enforces the deadline (408, then a
        # disconnect here); elsewhere this guard keeps its own timer.
        deadline = None if started is not None else time.monotonic() + config.timeout
        if length > config.max_body:
            if length <= DRAIN_LIMIT:
                await _drain(receive, deadline if deadline is not None else time.monotonic() + config.timeout)
            raise Refusal(
                413,
                "http.too_large",
                f"body of {length} bytes exceeds the limit of {config.max_body} bytes",
                "Content-Length",
            )
        chunks: list[bytes] = []
        got = 0
        more = True
        while more:
            message = (
                await receive()
                if deadline is None
                else await _receive_by(receive, deadline, length, got, config.timeout)
            )
            if message["type"] == "http.disconnect":
                raise ClientGone
            chunk = message.get("body", b"")
            got += len(chunk)
            if got > length:
                raise Refusal(
                    400, "http.body_length", "the body is longer than its Content-Length", "Content-Length"
                )
            chunks.append(chunk)
            more = message.get("more_body", False)
        return b"".join(chunks)


async def _receive_by(receive: Receive, deadline: float, length: int, got: int, timeout: float) -> Message:
    loop_deadline = asyncio.get_running_loop().time() + (deadline - time.monotonic())
    try:
        async with asyncio.timeout_at(loop_deadline):  # no extra task, unlike wait_for
            return await receive()
    except TimeoutError:
        raise Refusal(
            408,
            "http.timeout",
            f"the {length}-byte body was not received within {timeout:g} s ({got} bytes arrived)",
            "body",
        ) from None


async def _drain(receive: Receive, deadline: float) -> None:
    more = True
    loop_deadline = asyncio.get_running_loop().time() + (deadline - time.monotonic())
    while more:
        try:
            async with asyncio.timeout_at(loop_deadline):
                message = await receive()
        except TimeoutError:
            return
        more = message["type"] == "http.request" and message.get("more_body", False)


def _replay(body: bytes) -> Receive:
    sent = False

    async def receive() -> Message:
        nonlocal sent
        if not sent:
            sent = True
            return {"type": "http.request", "body": body, "more_body": False}
        await asyncio.sleep(3600)  # a handler never waits for a disconnect; cancelled with it
        return {"type": "http.disconnect"}

    return receive


async def _send_refusal(send: Send, exc: Refusal, cds: bool) -> None:
    body = error_body(exc.status, exc.code, exc.message, exc.field, cds)
    headers = [
        (b"content-type", b"application/json"),
        (b"content-length", str(len(body)).encode()),
        (b"cache-control", b"no-store"),
        (b"connection", b"close"),
    ]
    if exc.retry_after:
        headers.append((b"retry-after", exc.retry_after.encode()))
    await send({"type": "http.response.start", "status": exc.status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


# ============================================================================ routes
def _to_starlette(resp: Response) -> StarletteResponse:
    headers = {"cache-control": "no-store", **resp.headers}
    return StarletteResponse(resp.body, resp.status, headers=headers, media_type=resp.content_type)


def _make_api(
    service: App, limiter: anyio.CapacityLimiter, flight: dict[str, int]
) -> Callable[..., Awaitable[Any]]:
    from gasrules.service.handlers import EngineInterpreter

    # Only the plain engine is inlined: the Runtime may write (and fsync) decision records.
    inline = isinstance(getattr(service.interpreter, "inner", service.interpreter), EngineInterpreter)

    async def api(request: StarletteRequest) -> StarletteResponse:
        scope = request.scope  # the guard has read the body already
        body = scope.get("extensions", {}).get("gasrules.body", b"")
        req = Request(
            scope["method"],
            scope["path"],
            parse_qs(scope["query_string"].decode("latin-1"), keep_blank_values=True),
            {k.decode("latin-1"): v.decode("latin-1") for k, v in scope["headers"]},
            body,
        )
        if inline and flight["n"] <= 1 and len(body) <= INLINE_BODY and req.path == "/interpret":
            resp = service.handle(req)  # alone, about a millisecond: cheaper than a thread
        else:
            resp = await anyio.to_thread.run_sync(service.handle, req, limiter=limiter)
        return _to_starlette(resp)

    return api


def _make_probes(service: App, metrics: Metrics, state: dict[str, bool]) -> list[Route]:
    async def health(request: StarletteRequest) -> StarletteResponse:
        return _to_starlette(service.handle(Request("GET", "/health", {}, {}, b"")))

    async def ready(request: StarletteRequest) -> StarletteResponse:
        rb = service.rulebook
        if not state["ready"]:
            body = error_body(503, "service.not_ready", "the service is starting or stopping")
            return StarletteResponse(
                body,
                503,
                media_type="application/json",
                headers={"retry-after": "1", "cache-control": "no-store"},
            )
        body = json.dumps(
            {"status": "ready", "rulebook": dict(rb.identity), "admitted": service.interpreter.describe()}
        ).encode()
        return StarletteResponse(
            body, 200, media_type="application/json", headers={"cache-control": "no-store"}
        )

    async def prometheus(request: StarletteRequest) -> StarletteResponse:
        return StarletteResponse(
            metrics.render(), 200, media_type=Metrics.CONTENT_TYPE, headers={"cache-control": "no-store"}
        )

    return [
        Route("/health", health, methods=["GET"]),
        Route("/ready", ready, methods=["GET"]),
        Route("/metrics", prometheus, methods=["GET"]),
    ]


def asgi_app(service: App, *, log: JsonLog | None = None) -> Any:
    """The ASGI application for ``service``: probes, the API, CORS when configured, the guard.
    ``service.config.cors_origins`` lists browser origins allowed to call (empty: none)."""
    config = service.config
    metrics = Metrics(service.rulebook)
    service.interpreter = metrics.counting(service.interpreter)
    log = log or JsonLog(config.access_log)
    state = {"ready": False}
    limiter = anyio.CapacityLimiter(max(1, config.max_concurrency))
    flight = {"n": 0}
    api = _make_api(service, limiter, flight)
    methods = ["GET", "POST", "PUT", "PATCH", "DELETE", "HEAD", "OPTIONS"]
    middleware = []
    if config.cors_origins:
        middleware.append(
            Middleware(
                CORSMiddleware,
                allow_origins=list(config.cors_origins),
                allow_methods=["GET", "POST", "OPTIONS"],
                allow_headers=["authorization", "content-type", "x-request-id"],
                expose_headers=["x-request-id"],
                max_age=600,
            )
        )

    async def lifespan(app: Any) -> Any:
        state["ready"] = True
        log.write(level="info", event="ready", rulebook=dict(service.rulebook.identity))
        try:
            yield
        finally:
            state["ready"] = False
            log.write(level="info", event="stopping")

    import contextlib

    api_app = Starlette(routes=[Route("/{path:path}", api, methods=methods)], middleware=middleware)
    probes = Starlette(
        routes=_make_probes(service, metrics, state), lifespan=contextlib.asynccontextmanager(lifespan)
    )
    return Guard(api_app, probes, service, metrics, log, flight)
