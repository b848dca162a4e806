"""`gasrules serve`: run the HTTP service (JSON API, CDS Hooks) until interrupted."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import typer

from gasrules.cli.commands._common import missing_extra
from gasrules.cli.commands._governance import startup_errors
from gasrules.core.exitcodes import OK, USAGE

app = typer.Typer(add_completion=False, help="HTTP service with a JSON API and CDS Hooks.")

_CAUTION = (
    "Decision support only: it supports, and never replaces, clinical judgement; "
    "local laboratory ranges and protocols prevail."
)


@app.command()
def serve(
    host: str | None = typer.Option(None, help="Address to listen on (default 127.0.0.1)."),
    port: int | None = typer.Option(
        None, min=0, max=65535, help="TCP port; 0 picks a free one (default 8080)."
    ),
    rulebook: Path | None = typer.Option(None, help="Rulebook YAML (default: the shipped adult rulebook)."),
    cds_keys: Path | None = typer.Option(
        None,
        "--cds-keys",
        help="CDS Hooks client key "
        "configuration (JSON or YAML); without it the CDS "
        "endpoints take no bearer token.",
    ),
    max_body: int | None = typer.Option(
        None,
        "--max-body",
        min=1024,
        max=1 << 30,
        help="Largest accepted request body, in bytes (default 1048576).",
    ),
    timeout: float | None = typer.Option(
        None,
        min=0.1,
        max=3600,
        help="Seconds from a "
        "request's first byte to the end of its body, and to "
        "finish a batch (default 10).",
    ),
    max_batch: int | None = typer.Option(
        None, "--max-batch", min=1, help="Most cases in one batch request (default 10000)."
    ),
    feedback_log: Path | None = typer.Option(
        None,
        "--feedback-log",
        help="JSON Lines file for issued cards and CDS feedback (default cds-feedback.jsonl).",
    ),
    cds_window: float | None = typer.Option(
        None,
        "--cds-window",
        min=0,
        max=1440,
        help="Minutes before the blood gas within which "
        "other prefetched results are used (default "
        "0: same collection time only).",
    ),
    max_connections: int | None = typer.Option(
        None, "--max-connections", min=1, max=100_000, help="Open connections; more get 503 (default 1024)."
    ),
    max_concurrency: int | None = typer.Option(
        None,
        "--max-concurrency",
        min=1,
        max=10_000,
        help="API requests in progress; more get 503; /health, /ready, /metrics exempt (default 64).",
    ),
    cors_origin: list[str] | None = typer.Option(
        None, "--cors-origin", help="A browser origin allowed to call (repeatable; * for any)."
    ),
    access_log: bool | None = typer.Option(
        None, "--access-log/--no-access-log", help="One JSON log line per request on stderr (default on)."
    ),
    settings: Path | None = typer.Option(
        None,
        "--settings",
        help="Site settings file: its "
        "serve: section sets the options above; strict "
        "mode, decision records, shadow candidate. GASRULES_* "
        "variables also apply.",
    ),
    strict: bool = typer.Option(
        False, "--strict", help="Refuse to start unless the rulebook matches an approved release."
    ),
) -> None:
    """Serve POST /interpret, POST /interpret/batch, GET /health, /ready, /metrics,
    /openapi.json and the CDS Hooks endpoints under /cds-services (uvicorn, ASGI)."""
    from gasrules.service.cdsauth import ConfigError
    from gasrules.service.handlers import ServiceConfig, build_app
    from gasrules.service.settings import serve_section

    flags: dict[str, Any] = {
        "host": host,
        "port": port,
        "cds_keys": cds_keys and str(cds_keys),
        "max_body": max_body,
        "timeout": timeout,
        "max_batch": max_batch,
        "feedback_log": feedback_log and str(feedback_log),
        "cds_window_minutes": cds_window,
        "max_connections": max_connections,
        "max_concurrency": max_concurrency,
        "cors_origins": tuple(cors_origin) if cors_origin else None,
        "access_log": access_log,
    }
    with startup_errors("serve", usage=(ConfigError,)):
        from gasrules.integration.interfaces import interfaces_section

        values = {
            **serve_section(settings),
            **{k: v for k, v in flags.items() if v is not None},
            "codesystem_url": interfaces_section(settings).codesystem_url,
        }
        config = ServiceConfig(
            rulebook=str(rulebook) if rulebook else None,
            settings=str(settings) if settings else None,
            strict=strict,
            **values,
        )
        service = build_app(config)
    try:
        from gasrules.service.asgi import asgi_app
        from gasrules.service.server import make_server
    except ModuleNotFoundError as exc:
        service.close()
        message = missing_extra(exc)
        if message is None:
            raise
        typer.echo(f"gasrules serve: {message}", err=True)
        raise typer.Exit(USAGE) from None

    try:
        server = make_server(
            asgi_app(service),
            config.host,
            config.port,
            request_timeout=config.timeout,
            keep_alive=config.keep_alive,
            max_connections=config.max_connections,
            parser=config.http_parser,
            ssl_certfile=config.tls_certfile,
            ssl_keyfile=config.tls_keyfile,
        )
    except OSError as exc:
        service.close()
        typer.echo(f"gasrules serve: cannot listen on {config.host}:{config.port}: {exc.strerror}", err=True)
        raise typer.Exit(USAGE) from None
    bound_host, bound_port = server.server_address[:2]
    scheme = "https" if config.tls_certfile else "http"
    rb = service.rulebook
    if service.verifier is not None and service.verifier.config.audience is None:
        service.verifier.audience_base = f"{scheme}://{bound_host}:{bound_port}"
    if service.verifier is not None:
        auth = f"CDS bearer JWT required (aud base {service.verifier.audience_base})"
    else:
        auth = "CDS endpoints open (no --cds-keys)"
    typer.echo(
        f"gasrules serve: listening on {scheme}://{bound_host}:{bound_port} "
        f"(rulebook {rb.id} {rb.version} sha256:{rb.sha256[:12]}; {auth})"
    )
    mode = service.interpreter.describe()
    if mode["mode"] == "runtime":
        typer.echo(
            f"settings: strict {'on' if mode['strict'] else 'off'}, decision records "
            f"{'on' if mode['decision_records'] else 'off'}, shadow "
            f"{'on' if mode['shadow'] else 'off'}"
        )
    typer.echo(_CAUTION)
    sys.stdout.flush()
    restore = server.stop_on_signals()  # SIGINT, SIGTERM: finish what is in progress, exit 0
    try:
        server.serve_forever()
    finally:
        restore()
        server.server_close()
        service.close()
        typer.echo("gasrules serve: stopped", err=True)
    raise typer.Exit(OK)
