"""`gasrules listen`: the MLLP listener (gasrules.integration.mllp) until interrupted."""

from __future__ import annotations

import asyncio
import signal
import sys
from pathlib import Path
from typing import Any

import typer

from gasrules.cli.commands._governance import startup_errors
from gasrules.core.exitcodes import OK, USAGE

app = typer.Typer(add_completion=False, help="MLLP listener for HL7 v2 ORU^R01.")


@app.command()
def listen(
    settings: Path | None = typer.Option(
        None,
        "--settings",
        help="Site settings file: "
        "interfaces.listen (and facility) set the options "
        "below; strict mode, decision records also apply.",
    ),
    host: str | None = typer.Option(None, help="Address to listen on (default 127.0.0.1)."),
    port: int | None = typer.Option(
        None, min=0, max=65535, help="TCP port; 0 picks a free one (default 2575)."
    ),
    outbox: Path | None = typer.Option(
        None, "--outbox", help="Folder where each result ORU^R01 is filed (required here or in settings)."
    ),
    forward: str | None = typer.Option(
        None, "--forward", help="HOST:PORT of an MLLP destination for the result messages."
    ),
    rulebook: Path | None = typer.Option(
        None, "--rulebook", help="Rulebook YAML (default: the shipped adult rulebook)."
    ),
    strict: bool = typer.Option(
        False, "--strict", help="Refuse to start unless the rulebook matches an approved release."
    ),
) -> None:
    """Receive ORU^R01 over MLLP, interpret, file (and forward) the result, then acknowledge."""
    from dataclasses import replace

    from gasrules.integration.interfaces import interfaces_section
    from gasrules.integration.mllp import ListenConfig, Listener, parse_hostport
    from gasrules.service.handlers import ServiceConfig, make_interpreter

    with startup_errors("listen", usage=(ValueError,)):
        interfaces = interfaces_section(settings)
        config = ListenConfig(**dict(interfaces.listen))
        flags: dict[str, Any] = {
            "host": host,
            "port": port,
            "outbox": outbox,
            "forward": parse_hostport(forward) if forward else None,
        }
        config = replace(config, **{k: v for k, v in flags.items() if v is not None})
        if config.outbox is None:
            raise ValueError("give --outbox DIR or interfaces.listen.outbox in the settings")
        interpreter = make_interpreter(
            ServiceConfig(
                rulebook=str(rulebook) if rulebook else None,
                settings=str(settings) if settings else None,
                strict=strict,
            )
        )
    try:
        asyncio.run(_serve(Listener(interpreter, config, interfaces)))
    except OSError as exc:
        typer.echo(f"gasrules listen: cannot listen on {config.host}:{config.port}: {exc.strerror}", err=True)
        raise typer.Exit(USAGE) from None
    finally:
        interpreter.close()
    raise typer.Exit(OK)


async def _serve(listener: Any) -> None:
    await listener.start()
    rb = listener.interpreter.rulebook
    cfg = listener.config
    target = f"{cfg.forward[0]}:{cfg.forward[1]}" if cfg.forward else "none"
    typer.echo(
        f"gasrules listen: MLLP on {cfg.host}:{listener.port} (rulebook {rb.id} "
        f"{rb.version} sha256:{rb.sha256[:12]}; outbox {cfg.outbox}; forward {target})"
    )
    sys.stdout.flush()
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    try:
        await stop.wait()
    finally:
        await listener.stop()
        typer.echo("gasrules listen: stopped", err=True)
