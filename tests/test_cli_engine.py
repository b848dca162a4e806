"""`gasrules interpret` and the dispatcher, end to end in-process, and the compiled-rulebook cache.

Runs the real command through gasrules.cli.main (the console script's function) and, for stdin,
typer's CliRunner on the command's app. Clinical values asserted name their source.
"""

from __future__ import annotations

import io
import json
import math
import pickle
import sys
from pathlib import Path
from typing import Any

import pytest
from typer.testing import CliRunner

import gasrules
import gasrules.rulebook.build as cache_module
from conftest import EXAMPLE_SITE, MINI, MINI_OVERLAYS, portable
from gasrules.cli import COMMANDS, main
from gasrules.cli.commands import interpret as interpret_command

# README example: Na 140, Cl 104, HCO3 11 -> anion gap 140 - (104 + 11) = 25 (arithmetic of the
# definition); Winter 1.5 x 11 + 8 = 24.5 +/- 2 (Albert, Dell & Winters, Ann Intern Med 1967),
# so PCO2 25 is the expected response.
README = ["--ph", "7.26", "--pco2", "25", "--hco3", "11", "--na", "140", "--cl", "104"]
# pH 7.40, PCO2 40, HCO3 30: HH HCO3 24.5, inconsistent (NCCLS form, S 0.0307).
C28 = {"ph": 7.40, "pco2": 40, "hco3": 30}
MMHG_PER_KPA = 1000 / 133.322387415  # BIPM SI Brochure / ISO 80000-4


def run(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


def json_lines(out: str) -> list[dict[str, Any]]:
    return [json.loads(line) for line in out.splitlines() if line.strip()]


# ----------------------------------------------------------------------------- dispatcher


def test_help_lists_the_commands(capsys: pytest.CaptureFixture[str]) -> None:
    for flag in ("--help", "-h", "help"):
        code, out, _ = run(capsys, flag)
        assert code == 0
        for name in COMMANDS:
            assert f"  {name} " in out, name
        assert "interpret" in out and "check" in out
        assert "Exit codes: 0 ok" in out and "5 broken rulebook" in out
        assert "never replaces" in out  # the usual caution
    code, out, _ = run(capsys)
    assert code == 0 and "Commands:" in out


def test_version_and_unknown_command(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, "--version")
    assert (code, out) == (0, f"gasrules {gasrules.__version__}\n")
    code, _, err = run(capsys, "interprete")
    assert code == 2 and "unknown command 'interprete'" in err and "interpret" in err


def test_command_help(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, "interpret", "--help")
    assert code == 0
    for option in ("--rulebook", "--format", "--trace", "--ph", "--pco2", "--set"):
        assert option in out
    assert "--json" not in out  # the older spelling of --format json: still accepted, not shown


# ----------------------------------------------------------------------------- interpret: inputs


def test_flags_text_output(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, "interpret", *README)
    assert code == 0
    lines = out.splitlines()
    assert lines[0].startswith("INTERPRETED: ") and "High anion gap metabolic acidosis" in lines[0]
    sections = [line for line in lines if line.endswith(":") and not line.startswith(" ")]
    assert sections[:2] == ["Values:", "Findings:"] and "Cautions:" in sections
    assert lines.index("Values:") < lines.index("Findings:") < lines.index("Cautions:")
    assert any(
        line.strip().startswith("Anion gap (Na - Cl - HCO3)") and line.endswith("25.0 mmol/L")
        for line in lines
    )
    assert any(
        line.strip().startswith("Expected PaCO2 for the metabolic disorder") and line.endswith("24.5 mmHg")
        for line in lines
    )
    assert any("never replaces" in line for line in lines)
    assert "Trace (every rule" not in out


def test_flags_with_kpa(capsys: pytest.CaptureFixture[str], result_validator: Any) -> None:
    # 8.7 kPa x 7.50062 = 65.26 mmHg (BIPM SI Brochure / ISO 80000-4); pH 7.21 with HCO3 26 fits
    # Henderson-Hasselbalch (6.1 + log10(26 / (0.0307 x 65.26)) = 7.213, NCCLS form).
    code, out, _ = run(capsys, "interpret", "--ph", "7.21", "--pco2", "8.7kPa", "--hco3", "26", "--json")
    assert code == 0
    [result] = json_lines(out)
    assert result_validator(result) == []
    assert math.isclose(result["inputs"]["pco2"], 8.7 * MMHG_PER_KPA, rel_tol=1e-5)
    assert result["status"] in ("interpreted", "partial")
    assert "respiratory_acidosis" in result["disorders"]
    code, out, _ = run(capsys, "interpret", "--ph", "7.21", "--pco2", "8.7 kPa", "--hco3", "26", "--json")
    assert math.isclose(json_lines(out)[0]["inputs"]["pco2"], 8.7 * MMHG_PER_KPA, rel_tol=1e-5)


def test_set_any_input_with_units(capsys: pytest.CaptureFixture[str]) -> None:
    # 3.1 g/dL albumin = 31 g/L (1 dL = 0.1 L); 38.5 Cel as typed
    code, out, _ = run(
        capsys,
        "interpret",
        *README,
        "--set",
        "albumin=3.1g/dL",
        "--set",
        "temperature=38.5Cel",
        "--set",
        "sample_type=arterial",
        "--json",
    )
    assert code == 0
    inputs = json_lines(out)[0]["inputs"]
    assert math.isclose(inputs["albumin"], 31.0, rel_tol=1e-9)
    assert (inputs["temperature"], inputs["sample_type"]) == (38.5, "arterial")


def test_parse_value() -> None:
    parse = interpret_command.parse_value
    assert parse("7.26") == 7.26
    assert parse("8.7kPa") == {"value": 8.7, "unit": "kPa"}
    assert parse("8.7 kPa") == {"value": 8.7, "unit": "kPa"}
    assert parse("-3.5") == -3.5
    assert parse("1e2") == 100.0
    assert parse("40%") == {"value": 40.0, "unit": "%"}
    assert parse("arterial") == "arterial"


def test_case_file_object_and_list(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], result_validator: Any
) -> None:
    one = tmp_path / "case.json"
    one.write_text(json.dumps({"case_id": "A", "ph": 7.26, "pco2": 25, "hco3": 11, "na": 140, "cl": 104}))
    code, out, _ = run(capsys, "interpret", str(one), "--json")
    assert code == 0 and [r["case_id"] for r in json_lines(out)] == ["A"]
    many = tmp_path / "cases.json"
    many.write_text(
        json.dumps([{"case_id": "A", "ph": 7.26, "pco2": 25, "hco3": 11}, dict(C28, case_id="B")])
    )
    code, out, err = run(capsys, "interpret", str(many), "--json")
    results = json_lines(out)
    assert [(r["case_id"], r["status"]) for r in results] == [("A", "partial"), ("B", "inconsistent")]
    # several cases: each status is in the output, the run succeeded, a summary goes to stderr
    assert code == 0 and err == "2 cases: 1 inconsistent, 1 partial\n"
    assert all(result_validator(r) == [] for r in results)


def test_json_lines_never_lose_a_row(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], result_validator: Any
) -> None:
    path = tmp_path / "cases.jsonl"
    path.write_text(
        "\n".join(
            [
                json.dumps({"case_id": "ok", "ph": 7.26, "pco2": 25, "hco3": 11, "na": 140, "cl": 104}),
                '{"case_id": "broken", "ph": 7.4,',  # not JSON
                "",
                json.dumps({"case_id": "bad", "ph": "seven"}),
                json.dumps(dict(C28, case_id="c28")),
            ]
        )
        + "\n"
    )
    code, out, err = run(capsys, "interpret", str(path), "--json")
    results = json_lines(out)
    assert len(results) == 4
    assert [r["status"] for r in results] == ["interpreted", "rejected", "rejected", "inconsistent"]
    assert results[1]["errors"][0]["code"] == "input.unreadable"
    assert results[1]["errors"][0]["message"].startswith(f"{path}:2:")
    assert all(result_validator(r) == [] for r in results)
    assert code == 4 and err == "4 cases: 1 inconsistent, 1 interpreted, 2 rejected\n"  # some rejected


def test_stdin(result_validator: Any) -> None:
    runner = CliRunner()
    case = json.dumps({"case_id": "stdin", "ph": 7.26, "pco2": 25, "hco3": 11, "na": 140, "cl": 104})
    res = runner.invoke(interpret_command.app, ["-", "--json"], input=case)
    assert res.exit_code == 0, res.output
    [result] = json_lines(res.output)
    assert result["case_id"] == "stdin" and result_validator(result) == []
    res = runner.invoke(interpret_command.app, ["-"], input=json.dumps(C28))
    assert res.exit_code == 3 and res.output.startswith("INCONSISTENT: ")
    res = runner.invoke(interpret_command.app, ["-"], input=json.dumps(C28) + "\n" + json.dumps(C28) + "\n")
    assert res.exit_code == 0 and res.output.count("INCONSISTENT: ") == 2


def test_stdin_through_main(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setattr(sys, "stdin", io.StringIO(json.dumps(C28)))
    code, out, _ = run(capsys, "interpret", "-")
    assert code == 3 and out.startswith("INCONSISTENT: ")


def test_trace_text(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, "interpret", *README, "--trace")
    assert code == 0
    trace = out[out.index("Trace (every rule, in evaluation order):") :]
    assert "FIRED" in trace and "NOT_FIRED" in trace
    # pH 7.26 against 7.35 (common practice)
    lines = [ln.strip() for ln in trace.splitlines() if "compare ph 7.26 < ph_low" in ln]
    assert lines and all(
        ln.startswith("compare ph 7.26 < ph_low 7.35:") and ln.endswith("margin -0.09") for ln in lines
    )
    assert "(set at " in trace and "rulebook.yaml:" in trace
    code, out, _ = run(capsys, "interpret", *README, "--trace", "--json")
    [result] = json_lines(out)
    assert result["trace"] and result["trace"][0]["outcome"] in (
        "fired",
        "not_fired",
        "skipped_missing_input",
    )


def test_json_without_trace_flag_still_has_the_trace_field(
    capsys: pytest.CaptureFixture[str], result_validator: Any
) -> None:
    _, out, _ = run(capsys, "interpret", *README, "--json")
    [result] = json_lines(out)
    assert result_validator(result) == [] and isinstance(result["trace"], list)


# ----------------------------------------------------------------------------- exit codes


def test_exit_codes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert run(capsys, "interpret", *README)[0] == 0  # interpreted
    assert run(capsys, "interpret", "--ph", "7.26")[0] == 0  # partial
    assert (
        run(capsys, "interpret", "--ph", "7.40", "--pco2", "40", "--hco3", "30")[0] == 3
    )  # C28 inconsistent
    code, out, _ = run(capsys, "interpret", "--ph", "abc")
    assert code == 4 and "ph = 'abc' is not a number (accepted: a number in [pH])" in out
    assert run(capsys, "interpret", "--ph", "7.4", "--pco2", "40kg")[0] == 4  # unit mismatch
    case = tmp_path / "one.json"
    case.write_text(json.dumps([C28]))
    assert run(capsys, "interpret", str(case))[0] == 3  # one case from a file
    broken = tmp_path / "broken.yaml"
    broken.write_text("format: gasrules/1\nmetadata: {id: x}\n")
    code, out, err = run(capsys, "interpret", "--rulebook", str(broken), *README)
    assert code == 5 and "RB-E010" in err and out == ""


@pytest.mark.parametrize(
    "args",
    [
        [],  # nothing to interpret
        ["case.json", "--ph", "7.4"],  # both a file and flags
        ["--set", "urea"],  # NAME=VALUE expected
        ["missing-file.json"],  # unreadable file
    ],
)
def test_usage_errors_exit_2(
    args: list[str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "case.json").write_text(json.dumps(C28))
    code, out, err = run(capsys, "interpret", *args)
    assert code == 2 and out == "" and "Invalid value" in err


def test_other_rulebook(capsys: pytest.CaptureFixture[str]) -> None:
    # The example site shows pressures in kPa: Winter 24.5 mmHg / 7.50062 = 3.27 kPa (ISO 80000-4)
    code, out, _ = run(capsys, "interpret", "--rulebook", str(EXAMPLE_SITE), *README)
    assert code == 0 and "3.27 kPa" in out and "example-site-halden-cross" in out
    code, out, _ = run(capsys, "interpret", "--rulebook", str(MINI), *README, "--json")
    assert json_lines(out)[0]["rulebook"]["id"] == "mini-acid-base"


# ----------------------------------------------------------------------------- compiled-rulebook cache


@pytest.fixture
def counted_compiles(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    calls: list[str] = []
    real = cache_module.compile_path

    def counting(path: Any) -> Any:
        calls.append(str(path))
        return real(path)

    monkeypatch.setattr(cache_module, "compile_path", counting)
    return calls


def test_second_load_is_a_cache_hit(tmp_path: Path, cache_dir: Path, counted_compiles: list[str]) -> None:
    path = tmp_path / "rb.yaml"
    path.write_text(portable(MINI.read_text(encoding="utf-8"), MINI), encoding="utf-8")
    first = gasrules.load_rulebook(path)
    assert len(counted_compiles) == 1
    assert len(list(cache_dir.glob("*.pickle"))) == 1
    second = gasrules.load_rulebook(path)
    assert len(counted_compiles) == 1  # no recompile
    assert second is not first and second.sha256 == first.sha256 and second.source == first.source
    case = {"ph": 7.39, "pco2": 24, "hco3": 14, "na": 140, "cl": 106}
    assert gasrules.interpret(second, case) == gasrules.interpret(first, case)


def test_edited_rulebook_is_a_miss(tmp_path: Path, cache_dir: Path, counted_compiles: list[str]) -> None:
    path = tmp_path / "rb.yaml"
    text = portable(MINI.read_text(encoding="utf-8"), MINI)
    path.write_text(text, encoding="utf-8")
    before = gasrules.load_rulebook(path)
    path.write_text(text.replace("    value: 12\n", "    value: 13\n"), encoding="utf-8")
    after = gasrules.load_rulebook(path)
    assert len(counted_compiles) == 2
    assert after.parameters["ag_high"].value == 13.0 and before.parameters["ag_high"].value == 12.0
    assert after.sha256 != before.sha256
    assert len(list(cache_dir.glob("*.pickle"))) == 2
    # even an edit that does not change the content (a comment) is a miss: the key is the bytes
    path.write_text("# a comment\n" + text.replace("    value: 12\n", "    value: 13\n"), encoding="utf-8")
    again = gasrules.load_rulebook(path)
    assert len(counted_compiles) == 3 and again.sha256 == after.sha256


def test_edited_base_of_an_overlay_is_a_miss(
    tmp_path: Path, cache_dir: Path, counted_compiles: list[str]
) -> None:
    (tmp_path / "overlays").mkdir()
    base = tmp_path / "rulebook.yaml"
    base.write_text(portable(MINI.read_text(encoding="utf-8"), MINI), encoding="utf-8")
    site = tmp_path / "overlays" / "site.yaml"
    site.write_text((MINI_OVERLAYS / "site.yaml").read_text(encoding="utf-8"), encoding="utf-8")
    gasrules.load_rulebook(site)
    gasrules.load_rulebook(site)
    assert len(counted_compiles) == 1
    base.write_text(
        base.read_text(encoding="utf-8").replace("    value: 1.5\n", "    value: 1.4\n"), encoding="utf-8"
    )
    assert gasrules.load_rulebook(site).parameters["winter_slope"].value == 1.4
    assert len(counted_compiles) == 2


def test_no_cache_when_disabled(tmp_path: Path, cache_dir: Path, counted_compiles: list[str]) -> None:
    gasrules.load_rulebook(MINI, cache=False)
    gasrules.load_rulebook(MINI, cache=False)
    assert len(counted_compiles) == 2 and not cache_dir.exists()


def test_damaged_cache_entry_is_a_miss(tmp_path: Path, cache_dir: Path, counted_compiles: list[str]) -> None:
    path = tmp_path / "rb.yaml"
    path.write_text(portable(MINI.read_text(encoding="utf-8"), MINI), encoding="utf-8")
    gasrules.load_rulebook(path)
    [entry] = cache_dir.glob("*.pickle")
    entry.write_bytes(b"not a pickle")
    rb = gasrules.load_rulebook(path)
    assert len(counted_compiles) == 2 and rb.id == "mini-acid-base"
    entry.write_bytes(pickle.dumps({"not": "a rulebook"}))
    assert gasrules.load_rulebook(path).id == "mini-acid-base" and len(counted_compiles) == 3


def test_broken_rulebook_is_never_cached(tmp_path: Path, cache_dir: Path) -> None:
    path = tmp_path / "rb.yaml"
    path.write_text(
        portable(MINI.read_text(encoding="utf-8"), MINI).replace("    value: 12\n", "    value: 99\n"),
        encoding="utf-8",
    )
    for _ in range(2):
        with pytest.raises(gasrules.RulebookError):
            gasrules.load_rulebook(path)
    assert not list(cache_dir.glob("*.pickle"))


def test_unwritable_cache_still_loads(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    blocker = tmp_path / "file-not-dir"
    blocker.write_text("x")
    monkeypatch.setenv("GASRULES_CACHE_DIR", str(blocker / "cache"))
    assert gasrules.load_rulebook(MINI).id == "mini-acid-base"


def test_cached_rulebook_pickles_for_worker_pools(mini_rb: Any) -> None:
    clone = pickle.loads(pickle.dumps(mini_rb))
    case = {"ph": 7.39, "pco2": 24, "hco3": 14, "na": 140, "cl": 106}
    assert gasrules.interpret(clone, case) == gasrules.interpret(mini_rb, case)


def test_cached_locations_do_not_depend_on_the_compiling_directory(
    tmp_path: Path, cache_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    (tmp_path / "a" / "rb.yaml").write_text(
        portable(MINI.read_text(encoding="utf-8"), MINI), encoding="utf-8"
    )
    monkeypatch.chdir(tmp_path / "b")
    fresh = str(gasrules.load_rulebook("../a/rb.yaml", cache=False).parameters["ag_high"].set_by)
    monkeypatch.chdir(tmp_path / "a")
    gasrules.load_rulebook("rb.yaml")  # compiled and cached from a/
    monkeypatch.chdir(tmp_path / "b")
    cached = str(gasrules.load_rulebook("../a/rb.yaml").parameters["ag_high"].set_by)
    assert cached == fresh


def test_edited_base_behind_a_json_overlay_is_a_miss(
    tmp_path: Path, cache_dir: Path, counted_compiles: list[str]
) -> None:
    base = tmp_path / "base" / "rulebook.yaml"
    base.parent.mkdir()
    base.write_text(portable(MINI.read_text(encoding="utf-8"), MINI), encoding="utf-8")
    site = tmp_path / "site.json"
    site.write_text(
        json.dumps(
            {
                "format": "gasrules/1",
                "extends": "base/rulebook.yaml",
                "metadata": {
                    "id": "json-site",
                    "version": "0.1.0",
                    "title": "JSON overlay",
                    "effective_date": "2026-12-01",
                    "status": "draft",
                },
            }
        ),
        encoding="utf-8",
    )
    before = gasrules.load_rulebook(site)
    base.write_text(
        base.read_text(encoding="utf-8").replace("    value: 1.5\n", "    value: 1.4\n"), encoding="utf-8"
    )
    after = gasrules.load_rulebook(site)
    assert len(counted_compiles) == 2
    assert after.parameters["winter_slope"].value == 1.4 and after.sha256 != before.sha256


def test_cache_key_covers_the_whole_package_source(tmp_path: Path) -> None:
    """An edit to any engine module (here the loader, a comment) is a new key: a copy of the
    package is edited and asked for its key in a fresh interpreter."""
    import shutil
    import subprocess
    import sys

    src = Path(gasrules.__file__).resolve().parent
    copy = tmp_path / "engine" / "gasrules"
    shutil.copytree(src, copy, ignore=shutil.ignore_patterns("__pycache__"))

    def key() -> str:
        code = "import sys; from gasrules.rulebook import build; print(build.cache_key(sys.argv[1]))"
        out = subprocess.run(
            [sys.executable, "-c", code, str(MINI)],
            capture_output=True,
            text=True,
            check=True,
            env={"PYTHONPATH": str(copy.parent), "PATH": "/usr/bin:/bin"},
            cwd=tmp_path,
        )
        return out.stdout.strip()

    first = key()
    assert first == key() and len(first) == 64
    loader = copy / "rulebook" / "loader.py"
    loader.write_text(loader.read_text(encoding="utf-8") + "\n# an edit\n", encoding="utf-8")
    assert key() != first


def _planted(target: Path, marker: Path) -> None:
    class Plant:
        def __reduce__(self) -> Any:
            import os

            return (os.mkdir, (str(marker),))

    target.write_bytes(pickle.dumps(Plant()))


@pytest.mark.parametrize("unsafe", ["world_writable", "group_writable", "other_owner"])
def test_pickles_only_from_a_private_cache_directory(
    unsafe: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, counted_compiles: list[str]
) -> None:
    import os
    import warnings

    shared = tmp_path / "shared-cache"
    shared.mkdir(mode=0o700)
    monkeypatch.setenv("GASRULES_CACHE_DIR", str(shared))
    path = tmp_path / "rb.yaml"
    path.write_text(portable(MINI.read_text(encoding="utf-8"), MINI), encoding="utf-8")
    marker = tmp_path / "pickle-ran"
    _planted(shared / f"{cache_module.cache_key(path)}.pickle", marker)
    if unsafe == "world_writable":
        os.chmod(shared, 0o777)
    elif unsafe == "group_writable":
        os.chmod(shared, 0o770)
    else:
        owner = os.stat(shared).st_uid
        monkeypatch.setattr(cache_module.os, "getuid", lambda: owner + 1)
    monkeypatch.setattr(cache_module, "_WARNED", set())
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for _ in range(3):
            assert gasrules.load_rulebook(path).id == "mini-acid-base"
    assert not marker.exists()  # the planted pickle never ran
    assert len(counted_compiles) == 3  # compiled every time
    msgs = [str(w.message) for w in caught if issubclass(w.category, cache_module.CacheWarning)]
    assert len(msgs) == 1 and str(shared) in msgs[0]
    assert sorted(p.name for p in shared.glob("*.pickle")) == [
        f"{cache_module.cache_key(path)}.pickle"
    ]  # none written


def test_private_cache_directory_is_created_owner_only(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import os
    import stat

    target = tmp_path / "new" / "cache"
    monkeypatch.setenv("GASRULES_CACHE_DIR", str(target))
    gasrules.load_rulebook(MINI)
    assert stat.S_IMODE(os.stat(target).st_mode) & 0o077 == 0
    assert len(list(target.glob("*.pickle"))) == 1
