"""The `gasrules` command group: lazy loading, help, version, unknown commands, shell completion
and the one-line message for a missing optional extra. No clinical values are asserted here."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

import gasrules
from gasrules.cli import COMMANDS, main

ROOT = Path(__file__).resolve().parents[1]

_IMPORTED = (
    "import io, json, sys, contextlib\n"
    "from gasrules.cli import main\n"
    "out = io.StringIO()\n"
    "with contextlib.redirect_stdout(out):\n"
    "    code = main(sys.argv[1:])\n"
    "print(json.dumps({'code': code, 'out': out.getvalue(), 'modules': sorted(sys.modules)}))\n"
)


def fresh(*args: str) -> dict[str, object]:
    """Run gasrules.cli.main(args) in a new interpreter; its exit code, output and modules."""
    done = subprocess.run(
        [sys.executable, "-c", _IMPORTED, *args], capture_output=True, text=True, check=True, cwd=ROOT
    )
    return dict(json.loads(done.stdout.splitlines()[-1]))


def commands_imported(modules: object) -> list[str]:
    """The command modules imported (the shared helpers _common and _governance are not commands)."""
    assert isinstance(modules, list)
    return [m for m in modules if m.startswith("gasrules.cli.commands.") and m.rpartition(".")[2][0] != "_"]


# ----------------------------------------------------------------------------- lazy loading


def test_help_imports_no_command_module() -> None:
    seen = fresh("--help")
    assert seen["code"] == 0
    assert commands_imported(seen["modules"]) == []
    out = str(seen["out"])
    for name, (_module, text) in COMMANDS.items():
        assert f"  {name}  " in out and text.split()[0] in out


def test_a_command_imports_only_its_own_module() -> None:
    seen = fresh("cutpoints", "--help")
    assert seen["code"] == 0 and "--format" in str(seen["out"])
    assert commands_imported(seen["modules"]) == ["gasrules.cli.commands.cutpoints"]
    seen = fresh("--version")
    assert seen["out"] == f"gasrules {gasrules.__version__}\n"
    assert commands_imported(seen["modules"]) == []


def test_help_keeps_exit_codes_and_caution(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    assert "Exit codes: 0 ok, 1 check failed, 2 usage, 3 inconsistent sample, 4 input rejected, " in out
    assert (
        "Decision support only: it supports, and never replaces, clinical judgement; "
        "local laboratory ranges and protocols prevail." in out
    )


def test_help_command_and_short_flags(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["help", "check"]) == 0
    assert "--warnings-as-errors" in capsys.readouterr().out
    assert main(["-V"]) == 0
    assert capsys.readouterr().out == f"gasrules {gasrules.__version__}\n"
    assert main(["check", "-h"]) == 0
    assert "Usage: gasrules check" in capsys.readouterr().out


def test_unknown_command_and_option(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["interprte"]) == 2
    err = capsys.readouterr().err
    assert "unknown command 'interprte' (did you mean interpret?)" in err and "cutpoints" in err
    assert main(["--colour"]) == 2
    assert "--colour" in capsys.readouterr().err


# ----------------------------------------------------------------------------- shell completion


def complete(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], line: str) -> list[str]:
    words = line.split(" ")
    monkeypatch.setenv("_GASRULES_COMPLETE", "bash_complete")
    monkeypatch.setenv("COMP_WORDS", line)
    monkeypatch.setenv("COMP_CWORD", str(len(words) - 1))
    assert main([]) == 0
    return capsys.readouterr().out.split()


def test_completion_script_in_clicks_spelling(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    for value in ("bash_source", "source_bash"):
        monkeypatch.setenv("_GASRULES_COMPLETE", value)
        assert main([]) == 0
        script = capsys.readouterr().out
        assert "complete -o default -F _gasrules_completion gasrules" in script
        assert "_GASRULES_COMPLETE=complete_bash" in script


def test_completion_of_command_names(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    assert complete(monkeypatch, capsys, "gasrules i") == ["interpret", "impact"]
    assert complete(monkeypatch, capsys, "gasrules ") == list(COMMANDS)


def test_completion_of_options_and_subcommands(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    assert complete(monkeypatch, capsys, "gasrules interpret --pc") == ["--pco2"]
    got = complete(monkeypatch, capsys, "gasrules impact --chunk")
    assert got == ["--chunk-size"]  # the old spelling is hidden
    assert complete(monkeypatch, capsys, "gasrules audit re") == ["replay", "repair"]
    assert "--warnings-as-errors" in complete(monkeypatch, capsys, "gasrules check --")


def test_zsh_completion_carries_the_help(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("_GASRULES_COMPLETE", "zsh_complete")
    monkeypatch.setenv("_TYPER_COMPLETE_ARGS", "gasrules cut")
    assert main([]) == 0
    out = capsys.readouterr().out
    assert '"cutpoints":"List every numeric threshold of every rule condition."' in out


# ----------------------------------------------------------------------------- missing extras

DEMO = ROOT / "tools" / "demo" / "cases.jsonl"  # invented demo cases
ADULT = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
SITE = ROOT / "rulebooks" / "example-site" / "rulebook.yaml"


def unimportable(monkeypatch: pytest.MonkeyPatch, *names: str, forget: tuple[str, ...] = ()) -> None:
    """Make modules fail to import, as when not installed; what is cached beneath them, and the
    modules ``forget`` (ours that import them at their top), are imported afresh."""
    for cached in list(sys.modules):
        if any(cached == n or cached.startswith(n + ".") for n in (*names, *forget)):
            monkeypatch.delitem(sys.modules, cached)
    for name in names:
        monkeypatch.setitem(sys.modules, name, None)


def one_line(err: str, extra: str) -> None:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert f"pip install 'gasrules[{extra}]'" in lines[0] and "Traceback" not in err


def test_parquet_without_pyarrow(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    pytest.importorskip("pyarrow")
    parquet = tmp_path / "cases.parquet"
    assert main(["batch", str(DEMO), str(parquet), "--allow-rejected"]) == 0
    capsys.readouterr()
    unimportable(monkeypatch, "pyarrow")
    assert main(["batch", str(DEMO), str(tmp_path / "out.parquet")]) == 2
    one_line(capsys.readouterr().err, "parquet")
    assert main(["batch", str(parquet), str(tmp_path / "out.csv")]) == 2
    one_line(capsys.readouterr().err, "parquet")
    assert main(["impact", str(ADULT), str(SITE), str(parquet), "--no-cohorts"]) == 2
    one_line(capsys.readouterr().err, "parquet")


def test_dask_without_dask(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    pytest.importorskip("pyarrow")
    parquet = tmp_path / "cases.parquet"  # a Dask run reads Parquet
    assert main(["batch", str(DEMO), str(parquet), "--allow-rejected"]) == 0
    capsys.readouterr()
    unimportable(monkeypatch, "dask", "distributed")
    assert main(["batch", str(parquet), str(tmp_path / "out"), "--dask-local", "1"]) == 2
    one_line(capsys.readouterr().err, "dask")


@pytest.mark.parametrize("missing", ["starlette", "uvicorn"])
def test_serve_without_its_extra(
    missing: str, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    unimportable(monkeypatch, missing, forget=("gasrules.service.asgi", "gasrules.service.server"))
    assert main(["serve", "--port", "0"]) == 2
    one_line(capsys.readouterr().err, "serve")


def test_other_missing_modules_are_not_hidden(monkeypatch: pytest.MonkeyPatch) -> None:
    from gasrules.cli.commands._common import missing_extra

    assert missing_extra(ModuleNotFoundError("x", name="yaml")) is None
    assert "gasrules[parquet]" in str(missing_extra(ModuleNotFoundError("x", name="pyarrow.parquet")))


# ----------------------------------------------------------------------------- option spellings


def run(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


def untimed(text: str) -> object:
    """A JSON report without its timing figures (seconds, rows per second)."""

    def drop(value: object) -> object:
        if isinstance(value, dict):
            return {k: drop(v) for k, v in value.items() if "second" not in k}
        if isinstance(value, list):
            return [drop(v) for v in value]
        return value

    return drop(json.loads(text))


def test_check_warnings_as_errors_and_its_old_spelling(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    from test_loader_errors import HEAD, rule

    monkeypatch.chdir(tmp_path)
    (tmp_path / "rb.yaml").write_text(HEAD + rule("literal", "ph < 7.2"), encoding="utf-8")  # one warning
    assert run(capsys, "check", "rb.yaml")[0] == 0
    new = run(capsys, "check", "rb.yaml", "--warnings-as-errors")
    old = run(capsys, "check", "rb.yaml", "--strict")
    assert new == old and new[0] == 5 and "RB-W102" in new[1]
    as_json = run(capsys, "check", "rb.yaml", "--format", "json")
    assert as_json == run(capsys, "check", "rb.yaml", "--json")
    assert json.loads(as_json[1])[0]["code"] == "RB-W102"
    _, shown, _ = run(capsys, "check", "--help")
    assert "--warnings-as-errors" in shown and "--strict" not in shown and "--json" not in shown


def test_json_is_a_hidden_alias_of_format_json(capsys: pytest.CaptureFixture[str]) -> None:
    for command in (["cutpoints"], ["verify", "--no-cohorts"]):
        new = run(capsys, *command, "--format", "json")
        assert new == run(capsys, *command, "--json")
        json.loads(new[1])
    code, _, err = run(capsys, "cutpoints", "--format", "html")
    assert code == 2 and "accepted: text, json" in err


def test_impact_chunk_and_chunk_size(capsys: pytest.CaptureFixture[str]) -> None:
    base = ["impact", str(ADULT), str(SITE), str(DEMO), "--no-cohorts", "--format", "json"]
    code, new, _ = run(capsys, *base, "--chunk-size", "3")
    assert code == 0 and untimed(run(capsys, *base, "--chunk", "3")[1]) == untimed(new)


def test_batch_input_format_and_in_format(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cases = tmp_path / "cases.txt"  # a suffix that does not tell the format
    cases.write_bytes(DEMO.read_bytes())
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    assert main(["batch", str(cases), str(a), "--input-format", "jsonl", "--allow-rejected"]) == 0
    assert main(["batch", str(cases), str(b), "--in-format", "jsonl", "--allow-rejected"]) == 0
    assert a.read_bytes() == b.read_bytes()
    capsys.readouterr()


def test_document_output_and_out(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for flag, folder in (("--output", "a"), ("-o", "b"), ("--out", "c")):
        assert main(["document", str(ADULT), flag, str(tmp_path / folder), "--no-cohorts"]) == 0
    names = {p.name for p in (tmp_path / "a").iterdir()}
    assert {p.suffix for p in (tmp_path / "a").iterdir()} == {".html", ".md"}
    for folder in ("b", "c"):
        assert {p.name for p in (tmp_path / folder).iterdir()} == names
        for name in names:
            assert (tmp_path / folder / name).read_bytes() == (tmp_path / "a" / name).read_bytes()
    capsys.readouterr()
    assert main(["document", str(ADULT), "-o", "-", "--format", "html", "--no-cohorts"]) == 0
    html = capsys.readouterr().out
    assert html.lstrip().lower().startswith("<!doctype html") and html == next(
        (tmp_path / "a").glob("*.html")
    ).read_text(encoding="utf-8")


# ----------------------------------------------------------------------------- '-': standard input/output


def stdin(monkeypatch: pytest.MonkeyPatch, data: bytes) -> None:
    monkeypatch.setattr(sys, "stdin", io.TextIOWrapper(io.BytesIO(data), encoding="utf-8"))


def test_reports_to_standard_output(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for command in (
        ["diff", str(ADULT), str(SITE), "--format", "json"],
        ["probes", str(ADULT), str(SITE), "--generated", "5"],
        ["impact", str(ADULT), str(SITE), str(DEMO), "--no-cohorts", "--format", "json"],
    ):
        same = untimed if command[0] == "impact" else str
        code, printed, _ = run(capsys, *command)
        again = run(capsys, *command, "-o", "-")
        assert again[0] == code and same(again[1]) == same(printed)
        assert run(capsys, *command, "-o", str(tmp_path / "r.txt"))[1] == ""
        assert same((tmp_path / "r.txt").read_text(encoding="utf-8")) == same(printed)


def test_corpus_and_cases_from_standard_input(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    impact = ["impact", str(ADULT), str(SITE)]
    code, from_file, _ = run(capsys, *impact, str(DEMO), "--no-cohorts", "--format", "json")
    stdin(monkeypatch, DEMO.read_bytes())
    piped = run(capsys, *impact, "-", "--no-cohorts", "--format", "json")
    assert piped[0] == code
    assert untimed(piped[1]) == untimed(from_file.replace(json.dumps(str(DEMO)), json.dumps("<stdin>")))
    stdin(monkeypatch, DEMO.read_bytes())
    assert main(["batch", "-", str(tmp_path / "a.csv"), "--allow-rejected", "--summary-json", "-"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["rows_in"] == len(DEMO.read_text(encoding="utf-8").splitlines())
    assert main(["batch", str(DEMO), str(tmp_path / "b.csv"), "--allow-rejected"]) == 0
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
    capsys.readouterr()
    code, _, err = run(capsys, "batch", "-", "-", "--summary-json", "-")
    assert code == 2 and "--summary-json - needs an OUT file" in err


def test_shadow_from_standard_input(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    log = tmp_path / "shadow.jsonl"
    stdin(monkeypatch, DEMO.read_bytes())
    code, out, err = run(capsys, "shadow", "run", "-", "--candidate", str(SITE), "--log", str(log))
    assert code == 0 and len(out.splitlines()) == len(DEMO.read_text(encoding="utf-8").splitlines())
    assert "disagreement" in err
    report = run(capsys, "shadow", "report", str(log), "--format", "json")
    stdin(monkeypatch, log.read_bytes())
    piped = run(capsys, "shadow", "report", "-", "--format", "json")
    assert piped[:2] == (0, report[1].replace(json.dumps(str(log)), json.dumps("<stdin>")))


def test_document_corpus_from_standard_input(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    base = ["document", str(SITE), "--since", str(ADULT), "--no-cohorts", "--corpus"]
    code, from_file, _ = run(capsys, *base, str(DEMO))
    stdin(monkeypatch, DEMO.read_bytes())
    piped = run(capsys, *base, "-")
    assert code == piped[0] == 0 and f"Impact on {DEMO}" in from_file
    assert piped[1] == from_file.replace(f"Impact on {DEMO}", "Impact on <stdin>")
