"""The HTTP service over a real socket: JSON API, FHIR in and out, batch, limits, errors, OpenAPI.

The server (uvicorn with the ASGI application) runs in a thread on 127.0.0.1 on a free port;
requests go through http.client or raw sockets. Each
expected interpretation is computed by the engine itself (``gasrules.interpret`` on the same
case), so these tests check the service's transport, never a clinical number. Cases are the
invented demo data under tools/demo and tests/data (demo data, no published source).
"""

from __future__ import annotations

import copy
import http.client
import json
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.service.asgi import asgi_app
from gasrules.service.handlers import App, EngineInterpreter, Request, ServiceConfig, build_app
from gasrules.service.server import make_server

ROOT = Path(__file__).parents[1]
DEMO_CASE = json.loads((ROOT / "tools" / "demo" / "case.json").read_text())
DEMO_ROWS = [
    json.loads(line) for line in (ROOT / "tools" / "demo" / "cases.jsonl").read_text().splitlines()[:20]
]
FHIR_PANEL = json.loads((ROOT / "tests" / "data" / "fhir" / "arterial_panel.json").read_text())


class Server:
    def __init__(self, app: App, log: Any = None) -> None:
        self.app = app
        cfg = app.config
        self.httpd = make_server(
            asgi_app(app, log=log),
            "127.0.0.1",
            0,
            request_timeout=cfg.timeout,
            keep_alive=cfg.keep_alive,
            max_connections=cfg.max_connections,
            parser=cfg.http_parser,
        )
        self.port = self.httpd.server_address[1]
        self.thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)
        self.thread.start()
        for _ in range(200):  # uvicorn is up once it answers a probe
            if self.httpd.server.started:
                break
            time.sleep(0.02)

    def close(self) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()

    def call(
        self,
        method: str,
        path: str,
        body: Any = None,
        ctype: str | None = "application/json",
        headers: dict[str, str] | None = None,
    ) -> tuple[int, dict[str, str], bytes]:
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=30)
        data = body if body is None or isinstance(body, bytes) else json.dumps(body).encode()
        hdrs = dict(headers or {})
        if data is not None and ctype:
            hdrs["Content-Type"] = ctype
        conn.request(method, path, body=data, headers=hdrs)
        resp = conn.getresponse()
        out = resp.status, {k.lower(): v for k, v in resp.getheaders()}, resp.read()
        conn.close()
        return out

    def json(self, method: str, path: str, body: Any = None, **kw: Any) -> tuple[int, Any]:
        status, _, data = self.call(method, path, body, **kw)
        return status, json.loads(data)


def start(tmp: Path, environ: dict[str, str] | None = None, **config: Any) -> Server:
    """A server in a thread; site settings only from ``environ`` (never the developer's own)."""
    cfg = ServiceConfig(port=0, feedback_log=str(tmp / "feedback.jsonl"), access_log=False, **config)
    return Server(build_app(cfg, environ=environ or {}))


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    srv = start(tmp_path_factory.mktemp("svc"))
    yield srv
    srv.close()


@pytest.fixture(scope="module")
def rulebook(server: Server) -> Any:
    """The rulebook the server loaded (the expected results must use the very same one)."""
    return server.app.rulebook


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """Tight limits: 4 KiB bodies, 3 cases per batch, 1 s to send a body."""
    srv = start(tmp_path_factory.mktemp("small"), max_body=4096, max_batch=3, timeout=1.0)
    yield srv
    srv.close()


def result_validator() -> Any:
    from jsonschema import Draft202012Validator

    return Draft202012Validator(json.loads((ROOT / "schemas" / "result.schema.json").read_text()))


def validate_bundle(bundle: dict[str, Any]) -> None:
    """fhir.resources R4B models (same as R4 for Observation, DiagnosticReport, Provenance)."""
    from fhir.resources.R4B.bundle import Bundle

    Bundle.model_validate(bundle)


# ============================================================================ JSON API
def test_health_names_the_rulebook_and_engine(server: Server, rulebook: Any) -> None:
    status, body = server.json("GET", "/health")
    assert status == 200
    assert body["status"] == "ok"
    assert body["rulebook"] == rulebook.identity
    assert body["engine_version"] == gasrules.__version__
    assert body["cds_auth"] == "off"
    assert body["runtime"]["strict"] is False


def test_interpret_returns_exactly_the_engine_result(server: Server, rulebook: Any) -> None:
    status, headers, data = server.call("POST", "/interpret", DEMO_CASE)
    assert status == 200 and headers["content-type"] == "application/json"
    got = json.loads(data)
    assert got == json.loads(json.dumps(gasrules.interpret(rulebook, DEMO_CASE)))
    result_validator().validate(got)
    assert got["trace"], "the trace is included by default"


def test_trace_can_be_left_out(server: Server) -> None:
    status, body = server.json("POST", "/interpret?trace=0", DEMO_CASE)
    assert status == 200 and body["trace"] == []


def test_a_bad_field_is_a_rejected_result_naming_the_field(server: Server) -> None:
    status, body = server.json("POST", "/interpret", {"case_id": "x1", "ph": "abc"})
    assert status == 200
    assert body["status"] == "rejected" and body["case_id"] == "x1"
    assert [e["field"] for e in body["errors"]] == ["ph"]


def test_fhir_bundle_in_gives_a_valid_fhir_bundle_out(server: Server, rulebook: Any) -> None:
    status, headers, data = server.call("POST", "/interpret", FHIR_PANEL, ctype="application/fhir+json")
    assert status == 200 and headers["content-type"] == "application/fhir+json"
    bundle = json.loads(data)
    validate_bundle(bundle)
    kinds = [e["resource"]["resourceType"] for e in bundle["entry"]]
    assert kinds == ["Observation", "DiagnosticReport", "Device", "Provenance"]
    obs, prov = bundle["entry"][0]["resource"], bundle["entry"][3]["resource"]
    inputs = {e["fullUrl"] for e in FHIR_PANEL["entry"]}  # Observations, and the Patient (age)
    derived = {r["reference"] for r in obs["derivedFrom"]}
    assert derived <= inputs and len(derived) >= 3
    assert prov["policy"][0].endswith(f"?sha256={rulebook.sha256}")
    from gasrules.integration.fhir import case_from_fhir

    expected = gasrules.interpret(rulebook, case_from_fhir(FHIR_PANEL, rulebook.inputs).case)
    assert obs["valueString"] == expected["headline"]


def test_fhir_reading_issues_come_back_as_an_operation_outcome(server: Server) -> None:
    panel = copy.deepcopy(FHIR_PANEL)
    lactate = next(e for e in panel["entry"] if e["resource"].get("id") == "lac-0001")
    lactate["resource"]["code"]["coding"][0]["code"] = "99999-9"  # a code no input reads
    status, bundle = server.json("POST", "/interpret", panel)
    assert status == 200
    validate_bundle(bundle)
    [outcome] = [
        e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == "OperationOutcome"
    ]
    [issue] = outcome["issue"]
    assert issue["diagnostics"] == "code.unknown" and issue["severity"] == "warning"
    index = panel["entry"].index(lactate)
    assert issue["expression"] == [f"Bundle.entry[{index}].resource.code"]


def test_fhir_output_on_request_for_a_plain_case(server: Server) -> None:
    status, headers, data = server.call("POST", "/interpret?fhir=1", DEMO_CASE)
    assert status == 200 and headers["content-type"] == "application/fhir+json"
    validate_bundle(json.loads(data))


# ============================================================================ batch
def test_batch_array_n_in_n_out_in_order_with_errors_inline(server: Server, rulebook: Any) -> None:
    rows: list[Any] = DEMO_ROWS[:4] + [42] + DEMO_ROWS[4:6]
    status, body = server.json("POST", "/interpret/batch?trace=0", rows)
    assert status == 200 and len(body) == len(rows)
    for row, got in zip(rows, body, strict=True):
        assert got == json.loads(json.dumps(gasrules.interpret(rulebook, row, trace=False)))
    assert body[4]["status"] == "rejected"


def test_batch_json_lines_keeps_a_broken_line_as_a_rejected_row(server: Server) -> None:
    lines = [json.dumps(DEMO_ROWS[0]), '{"case_id": "bad", "ph": ', "", json.dumps(DEMO_ROWS[1])]
    status, headers, data = server.call(
        "POST", "/interpret/batch?trace=0", "\n".join(lines).encode(), ctype="application/x-ndjson"
    )
    assert status == 200 and headers["content-type"] == "application/x-ndjson"
    out = [json.loads(x) for x in data.decode().splitlines()]
    assert [r["case_id"] for r in out] == [DEMO_ROWS[0]["case_id"], None, DEMO_ROWS[1]["case_id"]]
    bad = out[1]
    assert bad["status"] == "rejected"
    assert bad["errors"][0]["code"] == "input.unreadable"
    assert bad["errors"][0]["message"].startswith("line 2: not valid JSON")
    result_validator().validate(bad)


def test_batch_past_its_deadline_returns_every_row_and_logs_exactly_those(
    rulebook: Any, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """N in, N out: the rows not reached before the deadline come back rejected, and the
    decision log holds exactly the results returned."""
    import time as real_time
    import types

    from gasrules.governance.audit import verify_log
    from gasrules.governance.runtime import Runtime
    from gasrules.governance.settings import Settings
    from gasrules.service import handlers as service_module
    from gasrules.service.handlers import RuntimeInterpreter

    log = tmp_path / "d.jsonl"
    runtime = Runtime(rulebook, Settings(decision_log=log, log_fsync=False))

    class Slow(RuntimeInterpreter):
        """Each interpreted row takes 3 s of the service's clock: the third row is past 5 s."""

        def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
            clock.now += 3.0
            return super().interpret(case, trace)

    clock = types.SimpleNamespace(now=100.0)
    fake_time = types.SimpleNamespace(
        **{n: getattr(real_time, n) for n in dir(real_time) if not n.startswith("_")}
    )
    fake_time.monotonic = lambda: clock.now
    monkeypatch.setattr(service_module, "time", fake_time)  # the service's clock only
    app = App(ServiceConfig(timeout=5.0, feedback_log=str(tmp_path / "f.jsonl")), Slow(runtime))
    body = json.dumps(DEMO_ROWS[:3]).encode()
    req = Request("POST", "/interpret/batch", {}, {"content-type": "application/json"}, body, started=100.0)
    resp = app.handle(req)
    app.close()
    out = json.loads(resp.body)
    assert resp.status == 200 and len(out) == 3
    assert [r["status"] == "rejected" for r in out] == [False, False, True]
    assert "passed its deadline of 5 s" in out[2]["errors"][0]["message"]
    assert out[2]["case_id"] == DEMO_ROWS[2].get("case_id")
    result_validator().validate(out[2])
    assert verify_log(log).entries == 3


def test_an_engine_failure_on_one_row_rejects_that_row_only(rulebook: Any, tmp_path: Path) -> None:
    class FailsOnX(EngineInterpreter):
        def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
            if isinstance(case, dict) and case.get("case_id") == "X":
                raise RuntimeError("engine bug")
            return super().interpret(case, trace)

    app = App(ServiceConfig(feedback_log=str(tmp_path / "f.jsonl")), FailsOnX(rulebook))
    rows = [DEMO_ROWS[0], {"case_id": "X", "ph": 7.4}, DEMO_ROWS[1]]
    resp = app.handle(
        Request(
            "POST",
            "/interpret/batch",
            {"trace": ["0"]},
            {"content-type": "application/json"},
            json.dumps(rows).encode(),
        )
    )
    out = json.loads(resp.body)
    assert [r["case_id"] for r in out] == [DEMO_ROWS[0]["case_id"], "X", DEMO_ROWS[1]["case_id"]]
    assert out[1]["status"] == "rejected" and out[1]["errors"][0]["code"] == "input.unreadable"
    assert out[0]["status"] != "rejected"


def test_batch_with_too_many_cases_is_413(small: Server) -> None:
    status, body = small.json("POST", "/interpret/batch", [{}] * 4)
    assert status == 413 and body["error"]["code"] == "request.batch_too_large"


# ============================================================================ limits and errors
def test_body_over_the_limit_is_413_before_it_is_used(small: Server) -> None:
    big = json.dumps({"case_id": "x" * 5000}).encode()
    status, _, data = small.call("POST", "/interpret", big)
    assert status == 413
    assert json.loads(data)["error"]["code"] == "http.too_large"


def test_a_body_that_never_arrives_is_408(small: Server) -> None:
    with socket.create_connection(("127.0.0.1", small.port), timeout=10) as sock:
        sock.sendall(
            b"POST /interpret HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
            b'Content-Length: 100\r\n\r\n{"ph":'
        )
        data = b""
        while chunk := sock.recv(65536):
            data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    assert head.startswith(b"HTTP/1.1 408")
    assert json.loads(body)["error"]["code"] == "http.timeout"


def test_missing_content_length_is_411(server: Server) -> None:
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as sock:
        sock.sendall(
            b"POST /interpret HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
            b"Transfer-Encoding: chunked\r\n\r\n2\r\n{}\r\n0\r\n\r\n"
        )
        data = sock.recv(65536)
    assert data.startswith(b"HTTP/1.1 411")


@pytest.mark.parametrize(
    ("method", "path", "body", "ctype", "status", "code"),
    [
        ("GET", "/nowhere", None, None, 404, "http.not_found"),
        ("DELETE", "/interpret", None, None, 405, "http.method"),
        ("GET", "/interpret", None, None, 405, "http.method"),
        ("POST", "/interpret", b"{}", "text/plain", 415, "http.content_type"),
        ("POST", "/interpret", b"{}", "application/json; charset=latin-1", 415, "http.charset"),
        ("POST", "/interpret", b'{"ph": 7.4,', "application/json", 400, "json.invalid"),
        ("POST", "/interpret", b"[{}]", "application/json", 400, "request.not_a_case"),
        ("POST", "/interpret?trace=maybe", b"{}", "application/json", 400, "http.query"),
        ("POST", "/interpret/batch", b"{}", "application/json", 400, "request.not_a_list"),
        ("POST", "/cds-services/no-such-service", b"{}", "application/json", 404, "cds.unknown_service"),
    ],
)
def test_errors_are_json_with_the_right_status(
    server: Server, method: str, path: str, body: bytes | None, ctype: str | None, status: int, code: str
) -> None:
    got, headers, data = server.call(method, path, body, ctype=ctype)
    assert got == status
    assert headers["content-type"] == "application/json"
    assert json.loads(data)["error"]["code"] == code
    if status == 405:
        assert headers["allow"] == "POST"


def test_invalid_json_error_gives_line_and_column(server: Server) -> None:
    _, body = server.json("POST", "/interpret", b'{\n  "ph": 7.4,\n  }')
    assert "line 2 column 12" in body["error"]["message"]  # the trailing comma


def test_an_internal_failure_is_a_json_500(tmp_path: Path, rulebook: Any) -> None:
    class Broken(EngineInterpreter):
        def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
            raise RuntimeError("boom")

    srv = Server(
        App(ServiceConfig(feedback_log=str(tmp_path / "f.jsonl"), access_log=False), Broken(rulebook))
    )
    try:
        status, body = srv.json("POST", "/interpret", {})
        assert status == 500 and body["error"]["code"] == "internal"
        assert "boom" not in json.dumps(body)  # no internals leak to the client
        assert srv.json("GET", "/health")[0] == 200  # and the server keeps serving
    finally:
        srv.close()


def test_keep_alive_serves_several_requests_on_one_connection(server: Server) -> None:
    conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=10)
    try:
        for _ in range(3):
            conn.request(
                "POST",
                "/interpret?trace=0",
                body=json.dumps(DEMO_CASE),
                headers={"Content-Type": "application/json"},
            )
            resp = conn.getresponse()
            assert resp.status == 200 and json.loads(resp.read())["case_id"] == "D000002"
    finally:
        conn.close()


def test_concurrent_clients_get_their_own_results(server: Server) -> None:
    failures: list[str] = []

    def client(rows: list[dict[str, Any]]) -> None:
        for row in rows:
            status, body = server.json("POST", "/interpret?trace=0", row)
            if status != 200 or body["case_id"] != row["case_id"]:
                failures.append(f"{row['case_id']}: {status}")

    threads = [threading.Thread(target=client, args=(DEMO_ROWS[i::8],)) for i in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert failures == []


def test_connections_beyond_the_limit_get_503(tmp_path: Path) -> None:
    srv = start(tmp_path, max_connections=1)
    held = http.client.HTTPConnection("127.0.0.1", srv.port, timeout=10)
    try:
        held.request("GET", "/health")
        assert held.getresponse().read() and True  # the one slot stays taken (keep-alive)
        status, headers, data = srv.call("GET", "/health")
        assert status == 503 and headers["retry-after"] == "1"
        assert json.loads(data)["error"]["code"] == "http.busy"
    finally:
        held.close()
    for _ in range(50):  # the slot frees when the client leaves
        if srv.call("GET", "/health")[0] == 200:
            break
        time.sleep(0.05)
    else:
        pytest.fail("the connection slot was never released")
    srv.close()


# ============================================================================ OpenAPI
def _openapi_validator(doc: dict[str, Any], name: str) -> Any:
    from jsonschema import Draft202012Validator
    from referencing import Registry, Resource
    from referencing.jsonschema import DRAFT202012

    registry = Registry().with_resource("urn:openapi", Resource(doc, DRAFT202012))
    return Draft202012Validator({"$ref": f"urn:openapi#/components/schemas/{name}"}, registry=registry)


def test_openapi_describes_every_route_and_method(server: Server) -> None:
    status, doc = server.json("GET", "/openapi.json")
    assert status == 200 and doc["openapi"] == "3.1.0"
    for pattern, methods in App.ROUTES:
        path = "/" + "/".join(pattern)
        assert path in doc["paths"], path
        assert set(doc["paths"][path]) == {m.lower() for m in methods}
    assert {"/ready", "/metrics"} <= set(doc["paths"])  # served by the ASGI layer
    from jsonschema import Draft202012Validator

    for name, schema in doc["components"]["schemas"].items():
        Draft202012Validator.check_schema(schema), name


def test_real_responses_match_the_openapi_schemas(server: Server) -> None:
    _, doc = server.json("GET", "/openapi.json")
    _openapi_validator(doc, "Health").validate(server.json("GET", "/health")[1])
    _openapi_validator(doc, "Ready").validate(server.json("GET", "/ready")[1])
    _openapi_validator(doc, "Result").validate(server.json("POST", "/interpret", DEMO_CASE)[1])
    _openapi_validator(doc, "Error").validate(server.json("GET", "/nowhere")[1])
    _openapi_validator(doc, "CdsDiscovery").validate(server.json("GET", "/cds-services")[1])
    _openapi_validator(doc, "FhirBundle").validate(server.json("POST", "/interpret", FHIR_PANEL)[1])


def test_every_status_the_service_answers_is_documented(server: Server) -> None:
    _, doc = server.json("GET", "/openapi.json")
    documented = set(doc["paths"]["/interpret"]["post"]["responses"])
    assert {"200", "400", "405", "408", "411", "413", "415", "500"} <= documented
    cds = set(doc["paths"]["/cds-services/{id}"]["post"]["responses"])
    assert {"401", "403", "404", "412"} <= cds


# ============================================================================ site settings
def _approve(release_dir: Path, rb: Any) -> None:
    """A minimal intact release manifest (the release gate is tested in test_release.py)."""
    from gasrules.governance import registry

    registry.write_manifest(
        release_dir,
        {"format": registry.MANIFEST_FORMAT, "rulebook": rb.identity, "date": "2026-01-05T10:00:00Z"},
    )


def test_strict_mode_and_decision_records_go_through_the_runtime(tmp_path: Path, rulebook: Any) -> None:
    from gasrules.governance.audit import verify_log

    releases, log = tmp_path / "releases", tmp_path / "decisions.jsonl"
    _approve(releases, rulebook)
    env = {
        "GASRULES_RELEASE_DIR": str(releases),
        "GASRULES_DECISION_LOG": str(log),
        "GASRULES_LOG_FSYNC": "0",
    }
    srv = start(tmp_path, env, strict=True)
    try:
        health = srv.json("GET", "/health")[1]
        assert health["runtime"]["mode"] == "runtime" and health["runtime"]["strict"] is True
        assert health["runtime"]["decision_records"] is True
        assert health["runtime"]["release_manifest"]
        status, body = srv.json("POST", "/interpret?trace=0", DEMO_CASE)
        assert status == 200 and body["trace"] == []
        assert body == json.loads(json.dumps(gasrules.interpret(rulebook, DEMO_CASE, trace=False)))
        lines = (json.dumps(DEMO_ROWS[0]) + "\n{broken\n" + json.dumps(DEMO_ROWS[1])).encode()
        status, _, data = srv.call("POST", "/interpret/batch", lines, ctype="application/x-ndjson")
        assert status == 200 and len(data.splitlines()) == 3
    finally:
        srv.close()
        srv.app.close()
    report = verify_log(log)
    assert report.errors == () and report.entries == 4  # 1 + 3 rows, the broken one too


def test_shadow_mode_answers_with_the_active_rulebook_only(tmp_path: Path, rulebook: Any) -> None:
    from gasrules.core.resources import default_rulebook_path

    settings = tmp_path / "site.yaml"
    settings.write_text(
        f"shadow:\n  rulebook: {default_rulebook_path()}\n  log: {tmp_path / 'disagreements.jsonl'}\n",
        encoding="utf-8",
    )
    srv = start(tmp_path, settings=str(settings))
    try:
        health = srv.json("GET", "/health")[1]
        assert health["runtime"]["shadow"]["id"] == rulebook.id
        assert health["runtime"]["decision_records"] is False
        status, body = srv.json("POST", "/interpret/batch?trace=0", DEMO_ROWS[:5])
        assert status == 200
        assert body == [
            json.loads(json.dumps(gasrules.interpret(rulebook, r, trace=False))) for r in DEMO_ROWS[:5]
        ]
        runtime = srv.app.interpreter.runtime
        assert runtime.shadowing and runtime.disagreements == 0  # same rulebook both sides
    finally:
        srv.close()
        srv.app.close()


def test_strict_mode_refuses_to_serve_an_unapproved_rulebook(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from gasrules.cli.commands.serve import app

    (tmp_path / "releases").mkdir()
    result = CliRunner().invoke(
        app,
        ["--strict", "--port", "0", "--feedback-log", str(tmp_path / "f.jsonl")],
        env={"GASRULES_RELEASE_DIR": str(tmp_path / "releases")},
    )
    assert result.exit_code == 6
    assert "strict.not_approved" in result.output


# ============================================================================ the command
@pytest.mark.slow
def test_gasrules_serve_starts_answers_and_stops_on_sigterm(tmp_path: Path) -> None:
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys; from gasrules.cli import main; sys.exit(main())",
            "serve",
            "--port",
            "0",
            "--no-access-log",
            "--feedback-log",
            str(tmp_path / "fb.jsonl"),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        line = proc.stdout.readline() if proc.stdout else ""
        assert "listening on http://127.0.0.1:" in line, line
        port = int(line.split("127.0.0.1:")[1].split()[0])
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
        conn.request("GET", "/health")
        assert json.loads(conn.getresponse().read())["status"] == "ok"
        conn.close()
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    assert proc.returncode == 0


def test_gasrules_serve_with_a_broken_rulebook_exits_5(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from gasrules.cli.commands.serve import app

    bad = tmp_path / "rb.yaml"
    bad.write_text("id: [unclosed\n")
    result = CliRunner().invoke(app, ["--rulebook", str(bad), "--port", "0"])
    assert result.exit_code == 5
    assert "rb.yaml" in result.output


def test_gasrules_serve_with_a_bad_key_file_exits_2(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from gasrules.cli.commands.serve import app

    keys = tmp_path / "keys.json"
    keys.write_text(json.dumps({"algorithms": ["HS256"], "issuers": {}}))
    result = CliRunner().invoke(app, ["--cds-keys", str(keys), "--port", "0"])
    assert result.exit_code == 2
    assert "$.algorithms" in result.output


def test_a_request_that_ends_in_an_error_writes_no_decision_record(
    rulebook: Any, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from gasrules.governance.audit import verify_log
    from gasrules.governance.runtime import Runtime
    from gasrules.governance.settings import Settings
    from gasrules.service.handlers import RuntimeInterpreter

    log = tmp_path / "d.jsonl"
    app = App(
        ServiceConfig(feedback_log=str(tmp_path / "f.jsonl")),
        RuntimeInterpreter(Runtime(rulebook, Settings(decision_log=log, log_fsync=False))),
    )

    def broken(*args: Any, **kwargs: Any) -> Any:
        raise RuntimeError("building the response failed")

    monkeypatch.setattr(App, "_fhir_bundle", broken)
    body = json.dumps(DEMO_CASE).encode()
    resp = app.handle(
        Request("POST", "/interpret", {"fhir": ["1"]}, {"content-type": "application/json"}, body)
    )
    assert resp.status == 500
    resp = app.handle(Request("POST", "/interpret", {}, {"content-type": "application/json"}, body))
    assert resp.status == 200
    app.close()
    assert verify_log(log).entries == 1  # only the delivered result
