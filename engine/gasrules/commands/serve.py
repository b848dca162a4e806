"""`gasrules serve`: run the HTTP service (JSON API, CDS Hooks) until interrupted."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer

from ..exitcodes import BROKEN_RULEBOOK, OK, REFUSED, USAGE

app = typer.Typer(add_completion=False, help="HTTP service with a JSON API and CDS Hooks.")

_CAUTION = ("Decision support only: it supports, and never replaces, clinical judgement; "
            "local laboratory ranges and protocols prevail.")


@app.command()
def serve(
    host: str = typer.Option("127.0.0.1", help="Address to listen on (loopback by default)."),
    port: int = typer.Option(8080, min=0, max=65535, help="TCP port; 0 picks a free one."),
    rulebook: Optional[Path] = typer.Option(None, help="Rulebook YAML (default: the shipped "
                                                       "adult rulebook)."),
    cds_keys: Optional[Path] = typer.Option(None, "--cds-keys", help="CDS Hooks client key "
                                            "configuration (JSON or YAML); without it the CDS "
                                            "endpoints take no bearer token."),
    max_body: int = typer.Option(1_048_576, "--max-body", min=1024, max=1 << 30,
                                 help="Largest accepted request body, in bytes."),
    timeout: float = typer.Option(10.0, min=0.1, max=3600, help="Seconds to receive a body "
                                  "and to finish a batch."),
    max_batch: int = typer.Option(10_000, "--max-batch", min=1, help="Most cases in one batch "
                                  "request."),
    feedback_log: Path = typer.Option(Path("cds-feedback.jsonl"), "--feedback-log",
                                      help="JSON Lines file for issued cards and CDS feedback."),
    cds_window: float = typer.Option(0.0, "--cds-window", min=0, max=1440,
                                     help="Minutes before the blood gas within which other "
                                          "prefetched results are used (0: same collection "
                                          "time only)."),
    max_connections: int = typer.Option(256, "--max-connections", min=1, max=10_000,
                                        help="Connections served at once; more get 503."),
    access_log: bool = typer.Option(True, "--access-log/--no-access-log",
                                    help="One line per request on stderr."),
    settings: Optional[Path] = typer.Option(None, "--settings", help="Site settings (strict "
                                            "mode, decision records, shadow candidate); "
                                            "GASRULES_* variables also apply."),
    strict: bool = typer.Option(False, "--strict", help="Refuse to start unless the rulebook "
                                "matches an approved release."),
) -> None:
    """Serve POST /interpret, POST /interpret/batch, GET /health, GET /openapi.json and the
    CDS Hooks endpoints under /cds-services."""
    from ..cdsauth import ConfigError
    from ..errors import RulebookError
    from ..runtime import RuntimeRefusal
    from ..httpserver import make_server
    from ..service import ServiceConfig, build_app
    from ..settings import SettingsError

    config = ServiceConfig(host=host, port=port, rulebook=str(rulebook) if rulebook else None,
                           cds_keys=str(cds_keys) if cds_keys else None, max_body=max_body,
                           timeout=timeout, max_batch=max_batch, feedback_log=str(feedback_log),
                           access_log=access_log, cds_window_minutes=cds_window,
                           settings=str(settings) if settings else None, strict=strict,
                           max_connections=max_connections)
    try:
        service = build_app(config)
    except RulebookError as exc:
        for problem in getattr(exc, "problems", ()):
            typer.echo(problem.render(), err=True)
        typer.echo(f"gasrules serve: the rulebook did not load: {exc}", err=True)
        raise typer.Exit(BROKEN_RULEBOOK) from None
    except RuntimeRefusal as exc:
        typer.echo(f"gasrules serve: {exc}", err=True)
        raise typer.Exit(REFUSED) from None
    except (ConfigError, SettingsError) as exc:
        typer.echo(f"gasrules serve: {exc}", err=True)
        raise typer.Exit(USAGE) from None
    try:
        server = make_server(service)
    except OSError as exc:
        service.close()
        typer.echo(f"gasrules serve: cannot listen on {host}:{port}: {exc.strerror}", err=True)
        raise typer.Exit(USAGE) from None
    bound_host, bound_port = server.server_address[:2]
    rb = service.rulebook
    if service.verifier is not None and service.verifier.config.audience is None:
        service.verifier.audience_base = f"http://{bound_host}:{bound_port}"
    if service.verifier is not None:
        auth = f"CDS bearer JWT required (aud base {service.verifier.audience_base})"
    else:
        auth = "CDS endpoints open (no --cds-keys)"
    typer.echo(f"gasrules serve: listening on http://{bound_host}:{bound_port} "
               f"(rulebook {rb.id} {rb.version} sha256:{rb.sha256[:12]}; {auth})")
    mode = service.interpreter.describe()
    if mode["mode"] == "runtime":
        typer.echo(f"settings: strict {'on' if mode['strict'] else 'off'}, decision records "
                   f"{'on' if mode['decision_records'] else 'off'}, shadow "
                   f"{'on' if mode['shadow'] else 'off'}")
    typer.echo(_CAUTION)
    sys.stdout.flush()
    try:
        _run(server)
    finally:
        service.close()
    raise typer.Exit(OK)


def _run(server: object) -> None:
    import signal
    import threading

    def stop(*_: object) -> None:
        threading.Thread(target=server.shutdown, daemon=True).start()  # type: ignore[attr-defined]

    previous = signal.signal(signal.SIGTERM, stop)
    try:
        server.serve_forever()  # type: ignore[attr-defined]
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, previous)
        server.server_close()  # type: ignore[attr-defined]
        typer.echo("gasrules serve: stopped", err=True)
