"""`gasrules interpret`: one case from a file, stdin or flags; or many from JSON Lines.

gasrules interpret case.json
gasrules interpret cases.jsonl --json
gasrules interpret --ph 7.26 --pco2 25 --hco3 11 --na 140 --cl 104
gasrules interpret --ph 7.21 --pco2 8.7kPa --hco3 26 --set sample_type=arterial
gasrules interpret results.hl7 --format fhir     # HL7 v2 ORU^R01 in, FHIR Bundles out
gasrules interpret bundle.json --format hl7      # FHIR in, ORU^R01 out
"""

from __future__ import annotations

import json
import re
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import typer

from gasrules.core import exitcodes

app = typer.Typer(add_completion=False)

_VALUE = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(\S.*)?$")


def parse_value(text: str) -> Any:
    """'8.7kPa' -> {'value': 8.7, 'unit': 'kPa'}; '7.26' -> 7.26; 'arterial' -> 'arterial'."""
    m = _VALUE.match(text)
    if not m:
        return text.strip()
    number = float(m.group(1))
    return {"value": number, "unit": m.group(2).strip()} if m.group(2) else number


def read_cases(source: str) -> Iterator[Any]:
    """Cases from a .json file (an object or a list), JSON Lines, or '-' for stdin."""
    if source == "-":
        text = sys.stdin.read()
        name = "<stdin>"
    else:
        path = Path(source)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise typer.BadParameter(f"cannot read {source}: {exc.strerror}") from None
        name = source
    stripped = text.lstrip()
    if not stripped:
        raise typer.BadParameter(f"{name} is empty; expected a JSON object, a JSON list or JSON Lines")
    if stripped[0] == "[" or (stripped[0] == "{" and not _looks_like_jsonl(stripped)):
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise typer.BadParameter(f"{name}:{exc.lineno}:{exc.colno}: invalid JSON: {exc.msg}") from None
        except RecursionError:
            raise typer.BadParameter(f"{name}: JSON nested too deeply to read") from None
        except ValueError as exc:
            raise typer.BadParameter(f"{name}: cannot be read: {str(exc).split(';')[0]}") from None
        yield from (data if isinstance(data, list) else [data])
        return
    for lineno, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        try:
            case = json.loads(line)
        except json.JSONDecodeError as exc:
            # a bad line is a rejected case, never a lost one
            case = {"__unreadable__": f"{name}:{lineno}:{exc.colno}: invalid JSON: {exc.msg}"}
        except RecursionError:
            case = {"__unreadable__": f"{name}:{lineno}: JSON nested too deeply to read"}
        except ValueError as exc:  # e.g. an integer of thousands of digits
            case = {"__unreadable__": f"{name}:{lineno}: cannot be read: {str(exc).split(';')[0]}"}
        yield case


def _looks_like_jsonl(text: str) -> bool:
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if len(lines) < 2:
        return False
    try:
        json.loads(lines[0])
        return True
    except json.JSONDecodeError:
        return False
    except (RecursionError, ValueError):  # one whole value too deep or too long on the first line
        return True


def _runtime(settings_file: Path | None, rulebook: Path | None) -> Any:
    """The governed Runtime under the site settings (a --settings file, GASRULES_* variables,
    else the defaults): every interpretation goes through it."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.governance.runtime import Runtime, RuntimeRefusal
    from gasrules.governance.settings import SettingsError, load_settings

    try:
        return Runtime.from_settings(load_settings(settings_file), rulebook)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook or "rulebook")), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    except RuntimeRefusal as exc:
        typer.echo(f"gasrules: {exc}", err=True)
        raise typer.Exit(exitcodes.REFUSED) from None
    except SettingsError as exc:
        typer.echo(f"gasrules: {exc}", err=True)
        raise typer.Exit(exitcodes.USAGE) from None


@app.command()
def interpret(
    case_file: str | None = typer.Argument(
        None, help="Case file (.json object or list, .jsonl), or '-' for stdin."
    ),
    rulebook: Path | None = typer.Option(
        None, "--rulebook", "-r", help="Rulebook YAML (default: the shipped adult rulebook)."
    ),
    as_json: bool = typer.Option(
        False, "--json", hidden=True, help="Same as --format json (JSON Lines for several cases)."
    ),
    trace: bool = typer.Option(False, "--trace", help="Add the readable trace of every rule."),
    ph: str | None = typer.Option(None, "--ph", help="pH."),
    pco2: str | None = typer.Option(None, "--pco2", help="PCO2 in mmHg, or with a unit: 8.7kPa."),
    po2: str | None = typer.Option(None, "--po2", help="PO2 in mmHg, or with a unit: 10.2kPa."),
    hco3: str | None = typer.Option(None, "--hco3", help="HCO3 in mmol/L."),
    na: str | None = typer.Option(None, "--na", help="Sodium in mmol/L."),
    k: str | None = typer.Option(None, "--k", help="Potassium in mmol/L."),
    cl: str | None = typer.Option(None, "--cl", help="Chloride in mmol/L."),
    albumin: str | None = typer.Option(None, "--albumin", help="Albumin in g/L, or 3.1g/dL."),
    lactate: str | None = typer.Option(None, "--lactate", help="Lactate in mmol/L."),
    fio2: str | None = typer.Option(None, "--fio2", help="FiO2 as a fraction (0.21) or 40%."),
    age: str | None = typer.Option(None, "--age", help="Age in years."),
    sample_type: str | None = typer.Option(
        None, "--sample-type", help="arterial, venous, capillary, mixed_venous or unknown."
    ),
    chronicity: str | None = typer.Option(None, "--chronicity", help="acute, chronic or unknown."),
    set_: list[str] = typer.Option(
        [], "--set", help="Any input: NAME=VALUE[UNIT], e.g. --set urea=7.1 --set temperature=38.5Cel."
    ),
    settings: Path | None = typer.Option(
        None,
        "--settings",
        help="Site settings (strict mode, decision log, shadow candidate); GASRULES_* variables also apply.",
    ),
    input_format: str | None = typer.Option(
        None,
        "--input-format",
        help="json, jsonl, hl7 or fhir (default: from the file: .hl7 is HL7 v2, JSON with a resourceType is FHIR).",
    ),
    out_format: str | None = typer.Option(
        None,
        "--format",
        "-f",
        help="text, json (the result contract; JSON Lines for several cases), fhir (a FHIR Bundle per case) or hl7 (a preliminary ORU^R01 per case) [default: text].",
    ),
    allow_rejected: bool = typer.Option(
        False,
        "--allow-rejected",
        help="With several cases, exit 0 even when some were rejected (never when every one was).",
    ),
) -> None:
    """Interpret blood gas cases. Exit 0 interpreted or partial, 3 inconsistent, 4 rejected, 5 broken rulebook."""
    from gasrules.evaluation.render import render_result

    flags = {
        "ph": ph,
        "pco2": pco2,
        "po2": po2,
        "hco3": hco3,
        "na": na,
        "k": k,
        "cl": cl,
        "albumin": albumin,
        "lactate": lactate,
        "fio2": fio2,
        "age": age,
        "sample_type": sample_type,
        "chronicity": chronicity,
    }
    given = {name: parse_value(v) for name, v in flags.items() if v is not None}
    for item in set_:
        name, sep, value = item.partition("=")
        if not sep or not name.strip():
            raise typer.BadParameter(f"--set {item!r}: expected NAME=VALUE, e.g. --set urea=7.1")
        given[name.strip()] = parse_value(value)
    if case_file is None and not given:
        raise typer.BadParameter(
            "give a case file, '-' for stdin, or analyte flags such as --ph 7.26 --pco2 25 --hco3 11"
        )
    if case_file is not None and given:
        raise typer.BadParameter("give either a case file or analyte flags, not both")
    if out_format is not None and out_format not in ("text", "json", "fhir", "hl7"):
        raise typer.BadParameter(f"--format {out_format!r}: accepted: text, json, fhir, hl7")
    if as_json:
        out_format = out_format or "json"
    out_format = out_format or "text"
    incoming: list[Any] = []
    fmt = "json"
    if case_file is not None:
        from gasrules.integration.interfaces import input_format as detect

        try:
            fmt = detect(case_file, input_format)
        except ValueError as exc:
            raise typer.BadParameter(f"--input-format: {exc}") from None
    if fmt in ("hl7", "fhir"):
        incoming = _read_messages(case_file, fmt, rulebook, settings)  # type: ignore[arg-type]
        cases: Any = [inc.case for inc in incoming]
    else:
        cases = [given] if case_file is None else read_cases(case_file)
    as_json = out_format != "text"
    runtime = _runtime(settings, rulebook)
    rb = runtime.rulebook
    results = runtime.interpret_many(cases, trace=as_json or trace)
    worst = exitcodes.OK
    first = True
    counts: dict[str, int] = {}
    messages = _MessageWriter(out_format, incoming, rb, settings)
    for n, result in enumerate(results):
        counts[result["status"]] = counts.get(result["status"], 0) + 1
        if incoming:
            for issue in incoming[n].issues:
                if issue.severity != "error":  # errors are in the rejected result itself
                    typer.echo(
                        f"{incoming[n].case.get('case_id') or f'case {n + 1}'}: {issue.severity}: {issue}",
                        err=True,
                    )
        if out_format in ("fhir", "hl7"):
            typer.echo(messages.write(n, result))
        elif as_json:  # the full result contract, trace included
            typer.echo(json.dumps(result, ensure_ascii=False))
        else:
            if not first:
                typer.echo("\n" + "-" * 72 + "\n")
            typer.echo(render_result(rb, result, trace=trace))
        first = False
        worst = max(
            worst,
            {"inconsistent": exitcodes.INCONSISTENT, "rejected": exitcodes.REJECTED}.get(result["status"], 0),
        )
    if runtime is not None:
        runtime.close()
    total = sum(counts.values())
    if total == 1:
        raise typer.Exit(worst)  # one case: the exit code tells its status
    # several cases: each status is in the output; exit 4 when any was rejected (unless allowed)
    summary = ", ".join(f"{n} {s}" for s, n in sorted(counts.items()))
    typer.echo(f"{total} cases: {summary}", err=True)
    rejected = counts.get("rejected", 0)
    if rejected and (not allow_rejected or rejected == total):
        raise typer.Exit(exitcodes.REJECTED)


def _read_messages(source: str, fmt: str, rulebook: Path | None, settings: Path | None) -> list[Any]:
    """Cases of an HL7 v2 or FHIR file, one per message or Bundle (gasrules.integration.interfaces)."""
    from gasrules.core.errors import RulebookError
    from gasrules.evaluation.render import render_problems
    from gasrules.integration.interfaces import read_incoming
    from gasrules.rulebook.build import load_rulebook

    try:
        rb = load_rulebook(rulebook)
    except RulebookError as exc:
        typer.echo(render_problems(exc.problems, str(rulebook or "default rulebook")), err=True)
        raise typer.Exit(exitcodes.BROKEN_RULEBOOK) from None
    try:
        return list(read_incoming(source, fmt, rb.inputs))
    except OSError as exc:
        raise typer.BadParameter(f"cannot read {source}: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise typer.BadParameter(f"{source} is not UTF-8 text: {exc.reason}") from None


class _MessageWriter:
    """Results as FHIR Bundles (indented for one case, one per line for several) or ORU^R01."""

    def __init__(self, fmt: str, incoming: list[Any], rb: Any, settings: Path | None) -> None:
        self.fmt, self.incoming, self.rb = fmt, incoming, rb
        self.settings: Any = None
        if fmt in ("fhir", "hl7"):
            from gasrules.governance.settings import SettingsError
            from gasrules.integration.interfaces import interfaces_section

            try:
                self.settings = interfaces_section(settings)
            except SettingsError as exc:
                typer.echo(f"gasrules: {exc}", err=True)
                raise typer.Exit(exitcodes.USAGE) from None

    def write(self, n: int, result: dict[str, Any]) -> str:
        from gasrules.integration.interfaces import to_fhir, to_hl7

        inc = self.incoming[n] if n < len(self.incoming) else None
        if self.fmt == "fhir":
            bundle = to_fhir(result, inc, self.rb, self.settings.codesystem_url)
            return json.dumps(bundle, ensure_ascii=False, indent=1 if len(self.incoming) <= 1 else None)
        control = f"GR-{(inc.control_id if inc and inc.control_id else result.get('case_id')) or n + 1}"
        return to_hl7(result, inc, self.settings, control)
