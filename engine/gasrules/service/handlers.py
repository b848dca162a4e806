"""`gasrules serve`: the HTTP service's handlers (the ASGI layer is :mod:`gasrules.service.asgi`).

Endpoints (all JSON; errors are ``{"error": {"code", "message", "field"?}}``):

* ``POST /interpret``: one case in, the result contract out. A FHIR body (a Bundle, an
  Observation or a list of resources) or ``?fhir=1`` gives a FHIR Bundle out (the interpretation
  Observation, DiagnosticReport, Device, Provenance, and an OperationOutcome with any reading
  issue). ``?trace=0`` leaves the trace out.
* ``POST /interpret/batch``: a JSON array, or JSON Lines (``application/x-ndjson``); N cases in,
  N results out in the same order and format; a row that is not JSON, or not reached before the
  timeout, comes back as a rejected result naming the line and the problem.
* ``GET /health``: rulebook id, version and sha256, engine version, settings in force.
* ``GET /openapi.json``: the OpenAPI 3.1 description (:mod:`gasrules.service.openapi`).
* ``GET /cds-services``, ``POST /cds-services/{id}``, ``POST /cds-services/{id}/feedback``:
  CDS Hooks (:mod:`gasrules.service.cdshooks`), guarded by the JWT check of :mod:`gasrules.service.cdsauth`
  when a key configuration is given.

Limits: bodies above ``max_body`` bytes get 413 (before they are read); a request not received
within ``timeout`` seconds of its first byte gets 408; a batch above ``max_batch`` cases gets
413; a batch still running at ``timeout`` fails whole with 503. A JSON body nested deeper than
``max_depth`` levels, or a case with more than ``max_case_fields`` fields, is a 400 naming the
place; a response larger than ``response_floor + response_ratio x request bytes`` is refused
with 413 (``response.too_large``) instead of being sent. Status codes: 400 bad JSON or request,
401/403 bearer check, 404 unknown path or CDS service, 405 method, 408 too slow, 411 no
Content-Length, 412 CDS prefetch missing, 413 too large, 415 content type, 500 internal, 503
busy.

Interpretation goes through an :class:`Interpreter`: the plain engine, or the change-control
``Runtime`` (strict mode, decision records, shadow mode) when site settings apply
(:func:`make_interpreter`). The ASGI layer (body limits, deadlines, probes, metrics) is
:mod:`gasrules.service.asgi` on :mod:`gasrules.service.server`; :class:`App` itself is a plain function of a
:class:`Request`.
"""

from __future__ import annotations

import sys
import threading
import time
import traceback
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any, Protocol

import orjson

from gasrules.core.errors import EngineError
from gasrules.core.version import __version__
from gasrules.evaluation.evaluator import UNREADABLE
from gasrules.service import cdshooks
from gasrules.service.bodyshape import nested_too_deep, read_line
from gasrules.service.cdsauth import AuthError, TokenVerifier

__all__ = [
    "App",
    "EngineInterpreter",
    "Interpreter",
    "Response",
    "RuntimeInterpreter",
    "ServiceConfig",
    "build_app",
    "make_interpreter",
]

JSON = "application/json"
FHIR_JSON = "application/fhir+json"
NDJSON = "application/x-ndjson"
LINES_TYPES = (NDJSON, "application/jsonl", "application/jsonlines", "application/json-lines")


@dataclass
class ServiceConfig:
    host: str = "127.0.0.1"
    port: int = 8080
    rulebook: str | None = None
    cds_keys: str | None = None
    max_body: int = 1_048_576
    timeout: float = 10.0
    max_batch: int = 10_000
    feedback_log: str = "cds-feedback.jsonl"
    access_log: bool = True
    cds_window_minutes: float = 0.0
    max_connections: int = 1024  # open connections; more get 503 and are closed
    max_concurrency: int = 64  # API requests in progress; more get 503 (probes exempt)
    keep_alive: float = 5.0  # seconds an idle keep-alive connection is kept
    max_depth: int = 32  # nesting levels of a JSON body
    max_case_fields: int = 256  # fields of one case (inputs, case_id, context, ...)
    response_floor: int = 8 * 1024 * 1024  # response bytes always allowed ...
    response_ratio: int = 64  # ... plus this many per request byte
    cors_origins: tuple[str, ...] = ()  # browser origins allowed to call ("*" for any)
    http_parser: str = "httptools"  # or "h11"
    codesystem_url: str | None = None  # project CodeSystem base (interfaces: settings)
    tls_certfile: str | None = None
    tls_keyfile: str | None = None
    settings: str | None = None  # site settings file (strict mode, decision records, shadow)
    strict: bool = False  # turn strict mode on whatever the settings say


@dataclass
class Response:
    status: int
    body: bytes
    content_type: str = JSON
    headers: dict[str, str] = field(default_factory=dict)


class HttpError(EngineError):
    def __init__(
        self, status: int, code: str, message: str, field: str = "", headers: Mapping[str, str] | None = None
    ) -> None:
        super().__init__(message)
        self.status, self.code, self.message, self.field = status, code, message, field
        self.headers = dict(headers or {})


# ============================================================================ interpretation
class Interpreter(Protocol):
    """What the service needs from the engine: the plain engine or the change-control Runtime."""

    rulebook: Any

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]: ...

    def record(self, case: Any, result: dict[str, Any]) -> None: ...

    def prepare(self, case: Any, trace: bool = True) -> tuple[dict[str, Any], Any]: ...

    def describe(self) -> dict[str, Any]: ...

    def close(self) -> None: ...


class EngineInterpreter:
    """The plain engine: no strict mode, no decision records, no shadow rulebook."""

    def __init__(self, rulebook: Any) -> None:
        self.rulebook = rulebook

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        from gasrules.evaluation.evaluator import interpret

        return interpret(self.rulebook, case, trace)

    def record(self, case: Any, result: dict[str, Any]) -> None:
        return None

    def prepare(self, case: Any, trace: bool = True) -> tuple[dict[str, Any], Any]:
        return self.interpret(case, trace), lambda: None

    def describe(self) -> dict[str, Any]:
        return {"mode": "engine", "strict": False, "decision_records": False, "shadow": None}

    def close(self) -> None:
        return None


class RuntimeInterpreter:
    """The change-control :class:`~gasrules.governance.runtime.Runtime`: strict mode (checked once, when
    it is opened), suspensions, decision records and the shadow candidate. Shadow comparison
    keeps counters, so calls are serialised while shadowing; decision logs lock themselves."""

    def __init__(self, runtime: Any) -> None:
        self.runtime = runtime
        self.rulebook = runtime.rulebook
        self._lock = threading.Lock() if runtime.shadowing else None

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        if self._lock is None:
            return self.runtime.interpret(case, trace)
        with self._lock:
            return self.runtime.interpret(case, trace)

    def record(self, case: Any, result: dict[str, Any]) -> None:
        self.runtime.record(case, result)

    def prepare(self, case: Any, trace: bool = True) -> tuple[dict[str, Any], Any]:
        """(result, deliver): the decision record is written by deliver(), once the response is built."""
        if self._lock is None:
            return self.runtime.prepare(case, trace)
        with self._lock:
            result, deliver = self.runtime.prepare(case, trace)

        def locked_deliver() -> None:
            with self._lock:  # type: ignore[union-attr]
                deliver()

        return result, locked_deliver

    def describe(self) -> dict[str, Any]:
        rt, settings = self.runtime, self.runtime.settings
        adm = rt.admission
        cand = rt.candidate
        return {
            "mode": "runtime",
            "strict": settings.strict,
            "decision_records": rt.records_decisions,
            "shadow": dict(cand.identity) if cand is not None else None,
            "approved_sha256": adm.approved_sha256,
            "release_manifest": adm.manifest.name if adm.manifest else None,
            "suspended_rules": [rule for rule, _ in adm.suspended_rules],
            "settings_from": list(settings.sources),
        }

    def close(self) -> None:
        self.runtime.close()


def make_interpreter(config: ServiceConfig, environ: Mapping[str, str] | None = None) -> Interpreter:
    """The governed :class:`gasrules.Runtime` under the site settings (``config.settings``,
    ``config.strict``, GASRULES_* variables; defaults when none apply: no strict mode, no
    decision log, suspensions honoured when a release directory is set).
    Raises RulebookError, RuntimeRefusal, SettingsError."""
    import os

    from gasrules.governance.runtime import Runtime
    from gasrules.governance.settings import load_settings

    environ = os.environ if environ is None else environ
    settings = load_settings(config.settings, env=environ, strict=True if config.strict else None)
    return RuntimeInterpreter(Runtime.from_settings(settings, config.rulebook))


# ============================================================================ helpers
def dumps(obj: Any) -> bytes:
    return orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY)


def error_body(status: int, code: str, message: str, field: str = "", cds: bool = False) -> bytes:
    err: dict[str, Any] = {"code": code, "message": message}
    if field:
        err["field"] = field
    body: dict[str, Any] = {"error": err}
    if cds:  # CDS Hooks 3.0: an OperationOutcome on non-2xx responses
        issue: dict[str, Any] = {
            "severity": "error",
            "code": _OUTCOME_CODES.get(status, "processing"),
            "details": {"text": message},
            "diagnostics": code,
        }
        if field:
            issue["expression"] = [field]
        body["operationOutcome"] = {"resourceType": "OperationOutcome", "issue": [issue]}
    return dumps(body)


_OUTCOME_CODES = {
    400: "invalid",
    401: "login",
    403: "forbidden",
    404: "not-found",
    405: "not-supported",
    408: "timeout",
    411: "structure",
    412: "incomplete",
    413: "too-long",
    415: "not-supported",
    500: "exception",
    503: "transient",
}


def _media_type(headers: Mapping[str, str]) -> tuple[str, str | None]:
    raw = headers.get("content-type") or ""
    kind, _, params = raw.partition(";")
    charset = None
    for p in params.split(";"):
        k, _, v = p.strip().partition("=")
        if k.lower() == "charset":
            charset = v.strip().strip('"').lower()
    return kind.strip().lower(), charset


def _require_type(headers: Mapping[str, str], accepted: tuple[str, ...]) -> str:
    kind, charset = _media_type(headers)
    if kind not in accepted:
        raise HttpError(
            415,
            "http.content_type",
            f"Content-Type {kind or '(none)'!r} is not accepted here; send one of: {', '.join(accepted)}",
            "Content-Type",
        )
    if charset not in (None, "utf-8", "utf8"):
        raise HttpError(
            415, "http.charset", f"charset {charset!r} is not accepted; use utf-8", "Content-Type"
        )
    return kind


def _parse_json(body: bytes, where: str = "body", max_depth: int | None = None) -> Any:
    try:
        data = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise HttpError(
            400,
            "json.invalid",
            f"{where} is not valid JSON: {exc.msg} at line {exc.lineno} column {exc.colno}",
            where,
        ) from None
    if max_depth is not None:
        deep = nested_too_deep(data, max_depth)
        if deep is not None:
            raise HttpError(
                400,
                "json.too_deep",
                f"{where} nests more than {max_depth} levels "
                f"deep at {deep}; at most {max_depth} levels are accepted",
                deep,
            )
    return data


def _check_fields(case: Any, limit: int, where: str = "body") -> None:
    if isinstance(case, dict) and len(case) > limit:
        raise HttpError(
            400,
            "request.too_many_fields",
            f"{where} has {len(case)} fields; a case has at most {limit} (its inputs, case_id and context)",
            where,
        )


def _grow(size: int, more: int, limit: int, request_bytes: int) -> int:
    """``size + more``, or 413 when that passes the response bound."""
    size += more
    if size > limit:
        raise HttpError(
            413,
            "response.too_large",
            f"the answer would exceed the {limit} "
            f"bytes allowed for a {request_bytes}-byte request; ask with trace=0 "
            "or send fewer cases per request",
            "body",
        )
    return size


def _flag(query: Mapping[str, list[str]], name: str, default: bool) -> bool:
    values = query.get(name)
    if not values:
        return default
    value = values[-1].lower()
    if value in ("1", "true", "yes", "on", ""):
        return True
    if value in ("0", "false", "no", "off"):
        return False
    raise HttpError(400, "http.query", f"query parameter {name}={values[-1]!r} must be 1 or 0", name)


def _is_fhir(body: Any) -> bool:
    if isinstance(body, dict):
        return "resourceType" in body
    return (
        isinstance(body, list)
        and bool(body)
        and all(isinstance(r, dict) and "resourceType" in r for r in body)
    )


# ============================================================================ the application
@dataclass
class Request:
    method: str
    path: str
    query: dict[str, list[str]]
    headers: dict[str, str]  # lower-case names
    body: bytes
    params: dict[str, str] = field(default_factory=dict)
    started: float = field(default_factory=time.monotonic)


class App:
    """Routing and handlers; independent of the socket layer (``handle`` is a plain call)."""

    def __init__(
        self, config: ServiceConfig, interpreter: Interpreter, *, verifier: TokenVerifier | None = None
    ) -> None:
        self.config = config
        self.interpreter = interpreter
        self.rulebook = interpreter.rulebook
        self.verifier = verifier
        self.started_at = time.time()
        self.cards = cdshooks.CardStore()
        self.feedback_log = cdshooks.FeedbackLog(config.feedback_log)
        for rec in self.feedback_log.cards(self.cards.limit):
            self.cards.put(rec)
        self._openapi: bytes | None = None
        self._lock = threading.Lock()

    def close(self) -> None:
        self.interpreter.close()

    # -- routing
    ROUTES: tuple[tuple[tuple[str, ...], dict[str, str]], ...] = (
        (("interpret",), {"POST": "interpret"}),
        (("interpret", "batch"), {"POST": "batch"}),
        (("health",), {"GET": "health"}),
        (("openapi.json",), {"GET": "openapi"}),
        (("cds-services",), {"GET": "cds_discovery"}),
        (("cds-services", "{id}"), {"POST": "cds_service"}),
        (("cds-services", "{id}", "feedback"), {"POST": "cds_feedback"}),
    )

    def route(self, path: str) -> tuple[dict[str, str], dict[str, str]] | None:
        parts = tuple(p for p in path.split("/") if p)
        for pattern, methods in self.ROUTES:
            if len(pattern) != len(parts):
                continue
            params = {}
            for want, got in zip(pattern, parts, strict=True):
                if want.startswith("{"):
                    params[want.strip("{}")] = got
                elif want != got:
                    break
            else:
                return methods, params
        return None

    def route_name(self, path: str) -> str:
        """The endpoint pattern of ``path`` (``/cds-services/{id}``), or ``unmatched``."""
        parts = tuple(p for p in path.split("/") if p)
        for pattern, _methods in self.ROUTES:
            if len(pattern) == len(parts) and all(
                w.startswith("{") or w == g for w, g in zip(pattern, parts, strict=True)
            ):
                return "/" + "/".join(pattern)
        return "unmatched"

    def response_limit(self, request_bytes: int) -> int:
        """The largest response body sent for a request body of ``request_bytes``."""
        return self.config.response_floor + self.config.response_ratio * request_bytes

    def _bounded(self, req: Request, resp: Response) -> Response:
        limit = self.response_limit(len(req.body))
        if req.method == "GET" or len(resp.body) <= limit:
            return resp
        raise HttpError(
            413,
            "response.too_large",
            f"the answer would be {len(resp.body)} bytes, "
            f"more than the {limit} allowed for a {len(req.body)}-byte request; ask "
            "with trace=0 or send fewer cases per request",
            "body",
        )

    def handle(self, req: Request) -> Response:
        cds = req.path.startswith("/cds-services")
        try:
            found = self.route(req.path)
            if found is None:
                raise HttpError(
                    404, "http.not_found", f"no endpoint at {req.path}; see /openapi.json", "path"
                )
            methods, req.params = found
            name = methods.get(req.method)
            if name is None:
                raise HttpError(
                    405,
                    "http.method",
                    f"{req.method} is not allowed on {req.path}; allowed: {', '.join(methods)}",
                    "method",
                    {"Allow": ", ".join(methods)},
                )
            return self._bounded(req, getattr(self, f"h_{name}")(req))
        except HttpError as exc:
            return Response(
                exc.status, error_body(exc.status, exc.code, exc.message, exc.field, cds), headers=exc.headers
            )
        except cdshooks.CdsError as exc:
            return Response(exc.status, error_body(exc.status, exc.code, exc.message, exc.field, True))
        except AuthError as exc:
            headers = (
                {"WWW-Authenticate": f'Bearer error="invalid_token", error_description="{exc.code}"'}
                if exc.status == 401
                else {}
            )
            if exc.status == 503:
                headers["Retry-After"] = "5"
            return Response(
                exc.status, error_body(exc.status, exc.code, exc.message, "", True), headers=headers
            )
        except Exception:
            traceback.print_exc(file=sys.stderr)
            return Response(
                500, error_body(500, "internal", "internal error; the service log has the details", "", cds)
            )

    # -- JSON API
    def h_interpret(self, req: Request) -> Response:
        _require_type(req.headers, (JSON, FHIR_JSON))
        body = _parse_json(req.body, max_depth=self.config.max_depth)
        trace = _flag(req.query, "trace", True)
        want_fhir = _flag(req.query, "fhir", False)
        if _is_fhir(body):
            return self._interpret_fhir(body, trace, _flag(req.query, "preliminary", False))
        if isinstance(body, list):
            raise HttpError(
                400,
                "request.not_a_case",
                "expected one case (a JSON object) or a FHIR Bundle; send lists of cases to /interpret/batch",
                "body",
            )
        _check_fields(body, self.config.max_case_fields)
        result, deliver = self.interpreter.prepare(body, trace)
        if want_fhir:
            response = Response(200, dumps(self._fhir_bundle(result, {}, None, None, ())), FHIR_JSON)
        else:
            response = Response(200, dumps(result))
        deliver()  # the decision record only for a result that is being returned
        return response

    def _interpret_fhir(self, body: Any, trace: bool, preliminary: bool) -> Response:
        from gasrules.integration.fhir import case_from_fhir

        read = case_from_fhir(body, self.rulebook.inputs, allow_preliminary=preliminary)
        result, deliver = self.interpreter.prepare(read.case, trace)
        refs = {k: v for k, v in read.sources.items() if "/" in v or v.startswith("urn:")}
        bundle = self._fhir_bundle(result, refs, read.subject, read.effective, read.issues)
        response = Response(200, dumps(bundle), FHIR_JSON)
        deliver()
        return response

    def _fhir_bundle(
        self,
        result: dict[str, Any],
        refs: Mapping[str, str],
        subject: str | None,
        effective: str | None,
        issues: Any,
    ) -> dict[str, Any]:
        from gasrules.integration.interfaces import Incoming, to_fhir

        incoming = Incoming(
            {}, issues=tuple(issues), kind="fhir", refs=refs, subject=subject, effective=effective
        )
        return to_fhir(result, incoming, self.rulebook, self.config.codesystem_url)

    def h_batch(self, req: Request) -> Response:
        kind = _require_type(req.headers, (JSON,) + LINES_TYPES)
        trace = _flag(req.query, "trace", True)
        deadline = req.started + self.config.timeout
        limit = self.response_limit(len(req.body))
        if kind == JSON:
            rows = _parse_json(req.body, max_depth=self.config.max_depth + 1)
            if not isinstance(rows, list):
                raise HttpError(
                    400,
                    "request.not_a_list",
                    f"expected a JSON array of cases (or JSON Lines with Content-Type {NDJSON})",
                    "body",
                )
            self._check_batch_size(len(rows))
            for i, row in enumerate(rows):
                _check_fields(row, self.config.max_case_fields, f"$[{i}]")
            parts: list[bytes] = []
            size = 2
            for row in rows:
                parts.append(dumps(self._batch_row(row, trace, deadline)))
                size = _grow(size, len(parts[-1]) + 1, limit, len(req.body))
            return Response(200, b"[" + b",".join(parts) + b"]")
        lines = [(n, line) for n, line in enumerate(req.body.split(b"\n"), 1) if line.strip()]
        self._check_batch_size(len(lines))
        out = bytearray()
        for n, line in lines:
            row: Any = read_line(n, line, self.config.max_depth, self.config.max_case_fields)
            out += dumps(self._batch_row(row, trace, deadline, n)) + b"\n"
            _grow(0, len(out), limit, len(req.body))
        return Response(200, bytes(out), NDJSON)

    def _check_batch_size(self, n: int) -> None:
        if n > self.config.max_batch:
            raise HttpError(
                413,
                "request.batch_too_large",
                f"batch of {n} cases exceeds the limit of {self.config.max_batch}; split it",
                "body",
            )

    def _batch_row(self, row: Any, trace: bool, deadline: float, line: int | None = None) -> dict[str, Any]:
        """One row's result; an engine failure on a row becomes that row's rejection, and so
        does a row not reached before the deadline (N in, N out; the decision log holds
        exactly the results returned)."""
        where = f"line {line}" if line else "row"
        late = time.monotonic() > deadline
        try:
            if late:
                raise TimeoutError
            return self.interpreter.interpret(row, trace)
        except Exception as exc:
            from gasrules.evaluation.evaluator import interpret as engine_interpret

            if late:
                why = (
                    f"{where}: not interpreted: the batch passed its deadline of {self.config.timeout:g} s "
                    "before reaching it; send it again, or the batch in smaller parts"
                )
            else:
                traceback.print_exc(file=sys.stderr)
                why = f"{where}: the engine failed on this row ({type(exc).__name__})"
            stand_in: dict[str, Any] = {UNREADABLE: why}
            if isinstance(row, dict) and isinstance(row.get("case_id"), str):
                stand_in["case_id"] = row["case_id"]
            result = engine_interpret(self.rulebook, stand_in, True)
            self.interpreter.record(stand_in, result)
            return result if trace else {**result, "trace": []}

    def h_health(self, req: Request) -> Response:
        return Response(
            200,
            dumps(
                {
                    "status": "ok",
                    "rulebook": dict(self.rulebook.identity),
                    "engine_version": __version__,
                    "uptime_seconds": round(time.time() - self.started_at, 1),
                    "runtime": self.interpreter.describe(),
                    "cds_auth": "jwt" if self.verifier else "off",
                    "limits": {
                        "max_body_bytes": self.config.max_body,
                        "max_connections": self.config.max_connections,
                        "max_concurrency": self.config.max_concurrency,
                        "max_depth": self.config.max_depth,
                        "max_case_fields": self.config.max_case_fields,
                        "timeout_seconds": self.config.timeout,
                        "max_batch_cases": self.config.max_batch,
                    },
                }
            ),
        )

    def h_openapi(self, req: Request) -> Response:
        with self._lock:
            if self._openapi is None:
                from gasrules.service.openapi import openapi_document

                self._openapi = dumps(openapi_document(self.rulebook))
        return Response(200, self._openapi)

    # -- CDS Hooks
    def _auth(self, req: Request, service: str | None) -> dict[str, Any] | None:
        if self.verifier is None:
            return None
        if service is None and not self.verifier.config.protect_discovery:
            return None
        return self.verifier.verify(req.headers.get("authorization"), req.path, service)

    def _service(self, req: Request) -> cdshooks.ServiceDef:
        sid = req.params["id"]
        service = cdshooks.SERVICES_BY_ID.get(sid)
        if service is None:
            raise HttpError(404, "cds.unknown_service", f"no CDS service {sid!r}; see /cds-services", "id")
        return service

    def h_cds_discovery(self, req: Request) -> Response:
        self._auth(req, None)
        return Response(200, dumps(cdshooks.discovery(self.rulebook)))

    def h_cds_service(self, req: Request) -> Response:
        self._auth(req, req.params["id"])
        service = self._service(req)
        _require_type(req.headers, (JSON, FHIR_JSON))
        body = _parse_json(req.body, max_depth=self.config.max_depth)
        context = cdshooks.read_request(body, service)
        window = timedelta(minutes=self.config.cds_window_minutes)
        selection = cdshooks.gather_prefetch(body, context["patientId"], self.rulebook, window)
        if selection is None:
            return Response(200, dumps({"cards": []}))
        read = cdshooks.case_for(selection, context, str(body["hookInstance"]), self.rulebook)
        result = self.interpreter.interpret(read.case, True)
        card = cdshooks.build_card(result, read, selection, self.rulebook, context["patientId"])
        record = cdshooks.card_record(card, result, service, str(body["hookInstance"]), datetime.now(UTC))
        self.feedback_log.append([record])
        self.cards.put(record)
        return Response(200, dumps({"cards": [card]}))

    def h_cds_feedback(self, req: Request) -> Response:
        claims = self._auth(req, req.params["id"])
        service = self._service(req)
        _require_type(req.headers, (JSON,))
        body = _parse_json(req.body, max_depth=self.config.max_depth)
        records = cdshooks.feedback_records(body, service, self.cards, claims, datetime.now(UTC))
        self.feedback_log.append(records)
        return Response(
            200,
            dumps({"recorded": len(records), "rules": sorted({r for rec in records for r in rec["rules"]})}),
        )


def build_app(
    config: ServiceConfig, interpreter: Interpreter | None = None, *, environ: Mapping[str, str] | None = None
) -> App:
    """The app for a configuration: the interpreter (engine or Runtime, see
    :func:`make_interpreter`; ``environ`` defaults to os.environ) and the CDS key check."""
    interpreter = interpreter or make_interpreter(config, environ)
    verifier = None
    if config.cds_keys:
        from gasrules.service.cdsauth import load_config

        default_aud = f"http://{config.host}:{config.port}"
        verifier = TokenVerifier(load_config(config.cds_keys), default_aud)
    return App(config, interpreter, verifier=verifier)
