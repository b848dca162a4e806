"""The ASGI service under hostile or careless clients, and its operations endpoints.

Each test starts its own uvicorn server on 127.0.0.1 (a free port) in a thread, with limits small
enough that the attacks finish in about a second; every socket has a timeout and every loop a
bound. Cases are invented demo data; no test asserts a clinical number.
"""

from __future__ import annotations

import io
import json
import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from gasrules.service.asgi import JsonLog, asgi_app
from gasrules.service.handlers import App, EngineInterpreter, ServiceConfig, build_app
from gasrules.service.server import make_server
from test_service import DEMO_CASE, Server

HOST = "127.0.0.1"


class Live(Server):
    """The service on a real socket (test_service.Server), with its JSON log kept in ``log``
    (or switched off), and raw-socket helpers for the limit tests."""

    def __init__(self, app: App, log: io.StringIO | None = None) -> None:
        super().__init__(app, log=JsonLog(log is not None, log))

    def raw(self, data: bytes, wait: float = 10.0) -> bytes:
        """Send ``data`` on a new connection; everything the server sends until it closes or
        ``wait`` seconds pass."""
        with socket.create_connection((HOST, self.port), timeout=wait) as sock:
            sock.sendall(data)
            return _read_all(sock, wait)

    def request(
        self, method: str, path: str, body: Any = None, headers: dict[str, str] | None = None
    ) -> tuple[int, dict[str, str], bytes]:
        import http.client

        conn = http.client.HTTPConnection(HOST, self.port, timeout=10)
        data = None if body is None else body if isinstance(body, bytes) else json.dumps(body).encode()
        hdrs = {"Content-Type": "application/json", **(headers or {})}
        conn.request(method, path, body=data, headers=hdrs)
        resp = conn.getresponse()
        out = resp.status, {k.lower(): v for k, v in resp.getheaders()}, resp.read()
        conn.close()
        return out


def _read_all(sock: socket.socket, wait: float) -> bytes:
    data = b""
    end = time.monotonic() + wait
    while time.monotonic() < end:
        try:
            chunk = sock.recv(65536)
        except (TimeoutError, ConnectionResetError):
            break
        if not chunk:
            break
        data += chunk
    return data


def live(tmp: Path, log: io.StringIO | None = None, **config: Any) -> Live:
    cfg = ServiceConfig(port=0, feedback_log=str(tmp / "feedback.jsonl"), access_log=False, **config)
    return Live(build_app(cfg, environ={}), log)


@pytest.fixture(scope="module", params=["httptools", "h11"])
def tight(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Live]:
    """A 1 s request deadline, 8 API requests in progress, 64 connections; on each parser."""
    srv = live(
        tmp_path_factory.mktemp("tight"),
        timeout=1.0,
        max_concurrency=8,
        max_connections=64,
        max_depth=16,
        max_case_fields=40,
        http_parser=request.param,
    )
    yield srv
    srv.close()


def _post(body: bytes, *extra: str) -> bytes:
    head = ["POST /interpret HTTP/1.1", "Host: x", "Content-Type: application/json", *extra]
    return ("\r\n".join(head) + "\r\n\r\n").encode() + body


# ============================================================================ framing
@pytest.mark.parametrize("lengths", [("2", "3"), ("2, 3",), ("+2",), ("0x2",), ("2 2",)])
def test_differing_or_malformed_content_length_is_400(tight: Live, lengths: tuple[str, ...]) -> None:
    data = tight.raw(_post(b"{}", *(f"Content-Length: {n}" for n in lengths)))
    assert data.startswith(b"HTTP/1.1 400"), data[:80]
    error = json.loads(data.partition(b"\r\n\r\n")[2])["error"]
    assert error["code"] == "http.bad_request" and "Content-Length" in error["message"]


def test_identical_duplicate_content_length_is_merged_by_h11_refused_by_llhttp(tight: Live) -> None:
    """RFC 9110 section 8.6 lets a recipient merge identical duplicates; h11 does, llhttp
    refuses them. Neither ever reads a body of the wrong length."""
    data = tight.raw(
        _post(
            json.dumps(DEMO_CASE).encode(),
            *[f"Content-Length: {len(json.dumps(DEMO_CASE))}"] * 2,
            "Connection: close",
        )
    )
    want = b"HTTP/1.1 200" if tight.app.config.http_parser == "h11" else b"HTTP/1.1 400"
    assert data.startswith(want), data[:80]


# ============================================================================ deadlines
def test_headers_dribbled_past_the_deadline_get_408_and_are_dropped(tight: Live) -> None:
    with socket.create_connection((HOST, tight.port), timeout=10) as sock:
        t0 = time.monotonic()
        got = b""
        for piece in (
            b"POST /interpret HTTP/1.1\r\n",
            b"Host: x\r\n",
            b"X-A: 1\r\n",
            b"X-B: 2\r\n",
            b"X-C: 3\r\n",
            b"X-D: 4\r\n",
        ):
            try:
                sock.sendall(piece)
            except OSError:
                break
            time.sleep(0.4)  # each piece well inside any per-read timeout
        got = _read_all(sock, 5)
        elapsed = time.monotonic() - t0
    assert got.startswith(b"HTTP/1.1 408"), got[:80]
    assert json.loads(got.partition(b"\r\n\r\n")[2])["error"]["code"] == "http.timeout"
    assert elapsed < 5, "dropped at the 1 s deadline, not left open"


def test_a_body_dribbled_past_the_deadline_gets_408(tight: Live) -> None:
    body = json.dumps(DEMO_CASE).encode()
    with socket.create_connection((HOST, tight.port), timeout=10) as sock:
        sock.sendall(_post(b"", f"Content-Length: {len(body)}")[: -0 or None])
        for i in range(0, min(len(body), 12), 2):
            try:
                sock.sendall(body[i : i + 2])
            except OSError:
                break
            time.sleep(0.3)
        got = _read_all(sock, 5)
    assert got.startswith(b"HTTP/1.1 408"), got[:80]


def test_an_idle_connection_that_never_sends_is_closed(tight: Live) -> None:
    with socket.create_connection((HOST, tight.port), timeout=10) as sock:
        t0 = time.monotonic()
        got = _read_all(sock, 6)
    assert time.monotonic() - t0 < 5
    assert got == b"" or got.startswith(b"HTTP/1.1 408")


def test_probes_and_clients_are_answered_during_a_slow_client_attack(tight: Live) -> None:
    """48 connections sending their headers or bodies a byte at a time: the probes and a
    normal client are still answered at once."""
    slow: list[socket.socket] = []
    try:
        for k in range(48):
            sock = socket.create_connection((HOST, tight.port), timeout=5)
            sock.sendall(_post(b'{"p', "Content-Length: 200") if k % 2 else b"POST /inter")
            slow.append(sock)
        for path in ("/health", "/ready"):
            status, _, _ = tight.request("GET", path)
            assert status == 200, path
        status, _, data = tight.request("POST", "/interpret?trace=0", DEMO_CASE)
        assert status == 200 and json.loads(data)["case_id"] == DEMO_CASE["case_id"]
    finally:
        for sock in slow:
            sock.close()


def test_256_slow_connections_do_not_starve_the_probes(tmp_path: Path) -> None:
    """The attack measured against the former server (every probe got 503 for its whole
    length): 256 connections trickling headers and bodies. Default connection cap."""
    srv = live(tmp_path, timeout=2.0)
    slow: list[socket.socket] = []
    try:
        for k in range(256):
            sock = socket.create_connection((HOST, srv.port), timeout=5)
            sock.sendall(_post(b'{"p', "Content-Length: 500") if k % 2 else b"POST /inter")
            slow.append(sock)
        t0 = time.monotonic()
        for path in ("/health", "/ready", "/health"):
            assert srv.request("GET", path)[0] == 200, path
        status, _, _ = srv.request("POST", "/interpret?trace=0", DEMO_CASE)
        assert status == 200 and time.monotonic() - t0 < 5
        time.sleep(2.5)  # past the deadline: all dropped
        closed = sum(1 for sock in slow if _read_all(sock, 0.5).startswith(b"HTTP/1.1 408"))
        assert closed == 256
    finally:
        for sock in slow:
            sock.close()
        srv.close()


def test_tls_from_the_settings_serves_https(tmp_path: Path) -> None:
    import datetime
    import ssl

    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "localhost")])
    now = datetime.datetime.now(datetime.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(name)
        .issuer_name(name)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - datetime.timedelta(minutes=1))
        .not_valid_after(now + datetime.timedelta(hours=1))
        .add_extension(x509.SubjectAlternativeName([x509.DNSName("localhost")]), False)
        .sign(key, hashes.SHA256())
    )
    (tmp_path / "cert.pem").write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    (tmp_path / "key.pem").write_bytes(
        key.private_bytes(
            serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
        )
    )
    cfg = ServiceConfig(port=0, feedback_log=str(tmp_path / "f.jsonl"), access_log=False)
    app = build_app(cfg, environ={})
    httpd = make_server(
        asgi_app(app),
        HOST,
        0,
        request_timeout=5,
        keep_alive=5,
        max_connections=16,
        ssl_certfile=str(tmp_path / "cert.pem"),
        ssl_keyfile=str(tmp_path / "key.pem"),
    )
    threading.Thread(target=httpd.serve_forever, daemon=True).start()
    try:
        for _ in range(200):
            if httpd.server.started:
                break
            time.sleep(0.02)
        context = ssl.create_default_context(cafile=str(tmp_path / "cert.pem"))
        with socket.create_connection((HOST, httpd.server_address[1]), timeout=10) as raw:
            with context.wrap_socket(raw, server_hostname="localhost") as tls:
                tls.sendall(b"GET /ready HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n")
                data = _read_all(tls, 5)
        assert data.startswith(b"HTTP/1.1 200")
    finally:
        httpd.shutdown()
        httpd.server_close()


def test_requests_beyond_the_concurrency_limit_get_503_but_probes_do_not(
    tmp_path: Path, rulebook: Any
) -> None:
    release = threading.Event()
    entered = threading.Event()

    class Held(EngineInterpreter):
        def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
            entered.set()
            release.wait(10)
            return super().interpret(case, trace)

    cfg = ServiceConfig(feedback_log=str(tmp_path / "f.jsonl"), access_log=False, max_concurrency=1)
    srv = Live(App(cfg, Held(rulebook)))
    holder = threading.Thread(target=srv.request, args=("POST", "/interpret/batch", [DEMO_CASE]))
    try:
        holder.start()
        assert entered.wait(10)
        status, headers, data = srv.request("POST", "/interpret", DEMO_CASE)
        assert status == 503 and headers["retry-after"] == "1"
        assert json.loads(data)["error"]["code"] == "http.busy"
        assert srv.request("GET", "/health")[0] == 200
        assert srv.request("GET", "/ready")[0] == 200
        assert srv.request("GET", "/metrics")[0] == 200
    finally:
        release.set()
        holder.join(10)
        srv.close()


# ============================================================================ shapes and sizes
def test_a_deeply_nested_context_is_400_naming_where(tight: Live) -> None:
    context: dict[str, Any] = {}
    node = context
    for _ in range(300):
        node["a"] = {}
        node = node["a"]
    status, _, data = tight.request("POST", "/interpret", {"ph": 7.4, "context": context})
    error = json.loads(data)["error"]
    assert status == 400 and error["code"] == "json.too_deep"
    assert error["field"].startswith("$.context.a") and "16 levels" in error["message"]


def test_a_case_with_too_many_fields_is_400_not_a_huge_answer(tight: Live) -> None:
    case = {f"k{i}": 1 for i in range(80_000)}
    status, _, data = tight.request("POST", "/interpret", case)
    error = json.loads(data)["error"]
    assert status == 400 and error["code"] == "request.too_many_fields"
    assert "80000 fields" in error["message"] and "at most 40" in error["message"]
    assert len(data) < 1000


def test_a_response_beyond_its_bound_is_refused(tmp_path: Path) -> None:
    srv = live(tmp_path, response_floor=65536, response_ratio=8)
    try:
        body = json.dumps([{}] * 20).encode()  # 20 traced results: far beyond 64 KiB
        status, _, data = srv.request("POST", "/interpret/batch", body)
        assert status == 413 and json.loads(data)["error"]["code"] == "response.too_large"
        status, _, data = srv.request("POST", "/interpret/batch?trace=0", [{}] * 2)
        assert status == 200 and len(json.loads(data)) == 2
        lines = b"{}\n" * 20
        status, _, data = srv.request(
            "POST", "/interpret/batch", lines, {"Content-Type": "application/x-ndjson"}
        )
        assert status == 413
    finally:
        srv.close()


# ============================================================================ operations
def test_ready_names_the_admitted_rulebook(tight: Live) -> None:
    status, headers, data = tight.request("GET", "/ready")
    body = json.loads(data)
    assert status == 200 and body["status"] == "ready"
    assert body["rulebook"]["sha256"] == tight.app.rulebook.sha256
    assert "server" not in headers, "no version banner"


def test_metrics_count_requests_latency_cases_and_name_the_rulebook(tmp_path: Path) -> None:
    srv = live(tmp_path)
    try:
        srv.request("POST", "/interpret", DEMO_CASE)
        srv.request("POST", "/interpret", {"ph": "abc"})
        srv.request("GET", "/nowhere/at/all")
        status, headers, data = srv.request("GET", "/metrics")
    finally:
        srv.close()
    text = data.decode()
    assert status == 200 and headers["content-type"].startswith("text/plain; version=0.0.4")
    assert 'gasrules_requests_total{method="POST",route="/interpret",status="200"} 2' in text
    assert 'route="unmatched",status="404"} 1' in text
    assert 'gasrules_request_duration_seconds_count{route="/interpret"} 2' in text
    assert 'gasrules_request_duration_seconds_bucket{route="/interpret",le="+Inf"} 2' in text
    assert 'gasrules_cases_total{status="rejected"} 1' in text
    sha = srv.app.rulebook.sha256
    assert f'sha256="{sha}"' in text and "gasrules_rulebook_info{" in text


def test_request_ids_are_propagated_and_logged_as_json(tmp_path: Path) -> None:
    log = io.StringIO()
    srv = live(tmp_path, log)
    try:
        _, headers, _ = srv.request("POST", "/interpret", DEMO_CASE, {"X-Request-ID": "abc-123"})
        assert headers["x-request-id"] == "abc-123"
        _, headers, _ = srv.request("GET", "/health", None, {"X-Request-ID": "bad id\twith tab"})
        fresh = headers["x-request-id"]
        assert fresh != "bad id\twith tab" and len(fresh) == 32
    finally:
        srv.close()
    lines = [json.loads(line) for line in log.getvalue().splitlines()]
    requests = [x for x in lines if x.get("event") == "request"]
    assert [(x["request_id"], x["path"], x["status"]) for x in requests] == [
        ("abc-123", "/interpret", 200),
        (fresh, "/health", 200),
    ]
    assert all(isinstance(x["ms"], float) for x in requests)


def test_cors_is_off_by_default_and_allows_configured_origins(tight: Live, tmp_path: Path) -> None:
    preflight = {"Origin": "https://ehr.example.org", "Access-Control-Request-Method": "POST"}
    _, headers, _ = tight.request("OPTIONS", "/cds-services", None, preflight)
    assert "access-control-allow-origin" not in headers
    srv = live(tmp_path, cors_origins=("https://ehr.example.org",))
    try:
        status, headers, _ = srv.request("OPTIONS", "/cds-services", None, preflight)
        assert status == 200
        assert headers["access-control-allow-origin"] == "https://ehr.example.org"
        _, headers, _ = srv.request("GET", "/cds-services", None, {"Origin": "https://other.example.org"})
        assert "access-control-allow-origin" not in headers
    finally:
        srv.close()


# ============================================================================ settings
def test_the_serve_section_of_a_settings_file_is_checked(tmp_path: Path) -> None:
    from gasrules.governance.settings import SettingsError, load_settings
    from gasrules.service.settings import serve_section

    good = tmp_path / "site.yaml"
    good.write_text(
        "serve:\n  port: 0\n  max_body: 2048\n  cors_origins: [https://a.example]\n  feedback_log: fb.jsonl\n"
    )
    assert serve_section(good) == {
        "port": 0,
        "max_body": 2048,
        "cors_origins": ("https://a.example",),
        "feedback_log": str(tmp_path / "fb.jsonl"),
    }
    load_settings(good, env={})  # the runtime's own reader accepts the section
    bad = tmp_path / "bad.yaml"
    bad.write_text("serve:\n  port: 70000\n")
    with pytest.raises(SettingsError) as err:
        serve_section(bad)
    assert "serve.port" in str(err.value) and "0 to 65535" in str(err.value)
    assert "bad.yaml:2:" in str(err.value)
    bad.write_text("serve:\n  prot: 1\n")
    with pytest.raises(SettingsError, match="serve.prot: unknown setting"):
        serve_section(bad)


def test_the_shipped_example_settings_file_is_valid() -> None:
    from gasrules.governance.settings import load_settings
    from gasrules.service.settings import serve_section

    example = Path(__file__).parents[1] / "docs" / "settings.example.yaml"
    assert serve_section(example)["port"] == 8080
    load_settings(example, env={})


@pytest.fixture(scope="module")
def rulebook(tight: Live) -> Any:
    return tight.app.rulebook


@pytest.mark.slow
def test_gasrules_serve_takes_address_and_limits_from_the_settings_file(tmp_path: Path) -> None:
    import subprocess
    import sys

    settings = tmp_path / "site.yaml"
    settings.write_text(
        "serve:\n  host: 127.0.0.1\n  port: 0\n  max_body: 2048\n"
        "  max_concurrency: 3\n  access_log: false\n  feedback_log: fb.jsonl\n"
    )
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys; from gasrules.cli import main; sys.exit(main())",
            "serve",
            "--settings",
            str(settings),
            "--max-batch",
            "5",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        line = proc.stdout.readline() if proc.stdout else ""
        assert "listening on http://127.0.0.1:" in line, line
        port = int(line.split("127.0.0.1:")[1].split()[0])
        import http.client

        conn = http.client.HTTPConnection(HOST, port, timeout=10)
        conn.request("GET", "/health")
        limits = json.loads(conn.getresponse().read())["limits"]
        conn.close()
        assert (limits["max_body_bytes"], limits["max_concurrency"], limits["max_batch_cases"]) == (
            2048,
            3,
            5,
        )  # file, file, flag
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    assert proc.returncode == 0
