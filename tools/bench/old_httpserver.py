"""FOR BENCHMARK COMPARISON ONLY: the former socket layer of `gasrules serve` (http.server with
threads), kept so that tools/bench_serve.py can measure it side by side with the ASGI service.
It is not part of the package and not a supported way to serve. Run as a script:

    python tools/bench/old_httpserver.py --port 0      # prints "listening on http://HOST:PORT"

Original description follows.

Reads each request body itself so that limits hold before the body is used: no Content-Length
or a chunked body gets 411, a body above ``max_body`` gets 413 (drained first when small enough
that the client can still read the answer), a body not received within ``timeout`` seconds gets
408. Idle keep-alive connections close after ``timeout``. Every answer, including http.server's
own protocol errors, is JSON; one access line per request goes to stderr when enabled.
"""

from __future__ import annotations

import sys
import threading
import time
from collections.abc import Mapping
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any
from urllib.parse import parse_qs, urlsplit

from gasrules.core.version import __version__
from gasrules.service.handlers import App, Request, Response, error_body

__all__ = ["GasrulesServer", "make_server"]

DRAIN_LIMIT = 16 * 1024 * 1024   # an oversized body up to this size is read and dropped


class _Handler(BaseHTTPRequestHandler):
    protocol_version = "HTTP/1.1"
    server_version = f"gasrules/{__version__}"
    disable_nagle_algorithm = True   # headers and body leave at once (no 40 ms delayed-ACK stall)
    app: App                      # set on the subclass made by make_server
    access_log: bool = True

    def _dispatch(self) -> None:
        split = urlsplit(self.path)
        headers = {k.lower(): v for k, v in self.headers.items()}
        body = b""
        if self.command in ("POST", "PUT", "PATCH"):
            body_or_response = self._read_body(headers)
            if isinstance(body_or_response, Response):
                self._send(body_or_response, split.path)
                return
            body = body_or_response
        req = Request(self.command, split.path, parse_qs(split.query, keep_blank_values=True),
                      headers, body)
        self._send(self.app.handle(req), split.path)

    def _read_body(self, headers: Mapping[str, str]) -> bytes | Response:
        cds = self.path.startswith("/cds-services")
        if "chunked" in headers.get("transfer-encoding", "").lower():
            self.close_connection = True
            return Response(411, error_body(411, "http.length_required", "chunked bodies are "
                                             "not accepted; send Content-Length",
                                             "Content-Length", cds))
        raw = headers.get("content-length")
        try:
            length = int(raw) if raw is not None else -1
        except ValueError:
            length = -1
        if length < 0:
            self.close_connection = True
            return Response(411, error_body(411, "http.length_required", "Content-Length is "
                                             "required (a whole number of bytes)",
                                             "Content-Length", cds))
        limit = self.app.config.max_body
        if length > limit:
            self.close_connection = True
            if length <= DRAIN_LIMIT:
                self._drain(length)
            return Response(413, error_body(413, "http.too_large", f"body of {length} bytes "
                                             f"exceeds the limit of {limit} bytes",
                                             "Content-Length", cds))
        try:
            body = self.rfile.read(length)
        except TimeoutError:
            self.close_connection = True
            return Response(408, error_body(408, "http.timeout", f"the {length}-byte body was "
                                             f"not received within {self.app.config.timeout:g} "
                                             "s", "body", cds))
        if len(body) < length:   # the client closed early; nobody may be left to read this
            self.close_connection = True
            return Response(400, error_body(400, "http.short_body", f"the connection closed "
                                             f"after {len(body)} of {length} bytes", "body", cds))
        return body

    def _drain(self, length: int) -> None:
        try:
            while length > 0:
                chunk = self.rfile.read(min(length, 65536))
                if not chunk:
                    return
                length -= len(chunk)
        except (TimeoutError, OSError):
            return

    def _send(self, resp: Response, path: str) -> None:
        started = getattr(self, "_t0", None)
        self.send_response(resp.status)
        self.send_header("Content-Type", resp.content_type)
        self.send_header("Content-Length", str(len(resp.body)))
        self.send_header("Cache-Control", "no-store")
        for k, v in resp.headers.items():
            self.send_header(k, v)
        if self.close_connection:
            self.send_header("Connection", "close")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(resp.body)
        if self.access_log and started is not None:
            ms = (time.perf_counter() - started) * 1000
            sys.stderr.write(f"{self.address_string()} {self.command} {path} {resp.status} "
                             f"{len(resp.body)}B {ms:.1f}ms\n")

    def handle_one_request(self) -> None:
        self._t0 = time.perf_counter()
        super().handle_one_request()

    def send_error(self, code: int, message: str | None = None, explain: str | None = None) -> None:
        """http.server's own errors (bad request line, headers too long) as JSON too."""
        self.close_connection = True
        text = message or self.responses.get(code, ("error",))[0]
        try:
            self._send(Response(code, error_body(code, "http.protocol", text)), "-")
        except OSError:
            pass

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - http.server's name
        pass  # access lines are written by _send

    do_GET = do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _dispatch


class GasrulesServer(ThreadingHTTPServer):
    """One thread per connection, at most ``max_connections`` at once: a connection beyond
    that gets an immediate 503 (Retry-After) instead of a thread."""

    daemon_threads = True
    allow_reuse_address = True
    request_queue_size = 128

    def __init__(self, address: tuple[str, int], handler: Any, max_connections: int) -> None:
        super().__init__(address, handler)
        self.max_connections = max_connections
        self._slots = threading.BoundedSemaphore(max_connections)

    def process_request(self, request: Any, client_address: Any) -> None:
        if not self._slots.acquire(blocking=False):
            body = error_body(503, "http.busy", f"the service already serves "
                              f"{self.max_connections} connections; retry shortly")
            try:
                request.sendall(b"HTTP/1.1 503 Service Unavailable\r\nContent-Type: "
                                b"application/json\r\nRetry-After: 1\r\nConnection: close\r\n"
                                b"Content-Length: " + str(len(body)).encode() + b"\r\n\r\n" + body)
            except OSError:
                pass
            self.shutdown_request(request)
            return
        try:
            super().process_request(request, client_address)
        except BaseException:
            self._slots.release()
            raise

    def process_request_thread(self, request: Any, client_address: Any) -> None:
        try:
            super().process_request_thread(request, client_address)
        finally:
            self._slots.release()


def make_server(app: App, host: str | None = None, port: int | None = None) -> GasrulesServer:
    """A bound server (port 0 picks a free port: read ``server.server_address``)."""
    handler = type("GasrulesHandler", (_Handler,), {
        "app": app, "timeout": app.config.timeout, "access_log": app.config.access_log})
    return GasrulesServer((host or app.config.host,
                           app.config.port if port is None else port), handler,
                          app.config.max_connections)


def main(argv: list[str] | None = None) -> int:
    import argparse

    from gasrules.service.handlers import ServiceConfig, build_app

    ap = argparse.ArgumentParser(description="the former http.server service, for benchmarks")
    ap.add_argument("--port", type=int, default=0)
    ap.add_argument("--feedback-log", default="/tmp/old-httpserver-feedback.jsonl")
    args = ap.parse_args(argv)
    config = ServiceConfig(host="127.0.0.1", port=args.port, feedback_log=args.feedback_log,
                           access_log=False, max_connections=256)
    server = make_server(build_app(config, environ={}))
    host, port = server.server_address[:2]
    print(f"old http.server: listening on http://{host}:{port}", flush=True)
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        pass
    return 0


if __name__ == "__main__":
    sys.exit(main())
