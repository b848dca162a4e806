"""What the commands share: the report formats, the ending that writes a report to a file or
prints it, and the one-line message for a module of an optional extra that is not installed."""

from __future__ import annotations

import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from enum import StrEnum
from pathlib import Path
from typing import Any

import typer

# top-level module -> the extra of pyproject.toml that installs it
EXTRAS: dict[str, str] = {
    "pyarrow": "parquet",
    "dask": "dask",
    "distributed": "dask",
    "starlette": "serve",
    "uvicorn": "serve",
    "httptools": "serve",
    "h11": "serve",
    "jwt": "serve",
    "cryptography": "serve",
}


class Format(StrEnum):
    """The report formats of every command; each command renders the subset it names in its
    ``--format`` option (format_option) and refuses the others (report_format)."""

    text = "text"
    json = "json"
    markdown = "markdown"
    html = "html"


def format_option(*accepted: Format, default: Format = Format.text) -> Any:
    """The ``--format/-f`` option of a command that renders ``accepted``."""
    names = "|".join(f.value for f in accepted)
    return typer.Option(default, "--format", "-f", metavar=names, help=f"Report format: {names}.")


def json_alias() -> Any:
    """``--json``: the older spelling of ``--format json``, kept working but hidden."""
    return typer.Option(False, "--json", hidden=True, help="Same as --format json.")


def report_format(fmt: Format, as_json: bool, accepted: tuple[Format, ...], command: str) -> Format:
    """The format asked for (``--json`` means json), or exit 2 naming the accepted ones."""
    if as_json:
        fmt = Format.json
    if fmt not in accepted:
        raise typer.BadParameter(
            f"'{fmt.value}' is not a format of {command}; accepted: {', '.join(f.value for f in accepted)}",
            param_hint="'--format'",
        )
    return fmt


def output_option(help: str = "Write the report to this file (- for standard output).") -> Any:
    return typer.Option(None, "--output", "-o", help=help)


@contextmanager
def readable(source: Path, fmt: str | None) -> Iterator[Path]:
    """``source``, or for ``-`` standard input copied to a temporary file named for its format
    (``fmt``; else Parquet by its magic bytes, JSON Lines when it starts with '{', CSV), removed
    afterwards: the table readers take a file, and a format by its suffix."""
    if str(source) != "-":
        yield source
        return
    data = sys.stdin.buffer.read()
    if fmt is None:
        head = data.lstrip()[:1]
        fmt = "parquet" if data[:4] == b"PAR1" else ("jsonl" if head == b"{" else "csv")
    with tempfile.TemporaryDirectory(prefix="gasrules-stdin-") as tmp:
        path = Path(tmp) / f"stdin.{fmt}"
        path.write_bytes(data)
        yield path


def write_report(text: str, output: Path | None) -> None:
    """The report to ``output`` (with a final newline), or to standard output when there is no
    ``output`` or it is ``-``."""
    if output is None or str(output) == "-":
        typer.echo(text)
    else:
        output.write_text(text + "\n", encoding="utf-8")


def missing_extra(exc: ModuleNotFoundError) -> str | None:
    """One line for a missing module of an optional extra, or None when it is not one."""
    top = (exc.name or "").partition(".")[0]
    extra = EXTRAS.get(top)
    if extra is None:
        return None
    return f"{top} is not installed; it comes with the {extra} extra: pip install 'gasrules[{extra}]'"
