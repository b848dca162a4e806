"""The `gasrules` command group: lazy loading, help, version, unknown commands, shell completion
and the one-line message for a missing optional extra. No clinical values are asserted here."""

from __future__ import annotations

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
