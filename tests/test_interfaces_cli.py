"""`interpret` and `batch` with HL7 v2 and FHIR files on either side.

Expected interpretations come from the engine itself on the same cases, so these tests check
reading, case boundaries, N in / N out and the writers, never a clinical number. Files are the
invented demo messages under tools/demo and tests/data.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from typer.testing import CliRunner

import gasrules
from gasrules.integration.hl7v2 import cases_from_hl7, iter_messages, parse_message

ROOT = Path(__file__).parents[1]
DEMO = ROOT / "tools" / "demo"
DATA = ROOT / "tests" / "data"


def run(command: str, *args: str) -> Any:
    import importlib

    app = importlib.import_module(f"gasrules.cli.commands.{command}").app
    return CliRunner().invoke(app, list(args))


@pytest.fixture(scope="module")
def rulebook() -> Any:
    return gasrules.load_rulebook()


def bad_batch(tmp_path: Path) -> Path:
    """Three demo messages and, second, one whose pH is not a number."""
    text = (DEMO / "hl7" / "batch.hl7").read_text(encoding="utf-8")
    messages = list(iter_messages(text))
    broken = messages[0].replace("MSH|", "MSH|", 1).replace("|DEMO0011|", "|BROKEN1|")
    broken = broken.replace("|7.", "|x7.", 1)
    path = tmp_path / "mixed.hl7"
    path.write_text("\r".join([messages[0], broken, *messages[1:]]) + "\r", encoding="utf-8")
    return path


def test_interpret_reads_an_hl7_file_one_case_per_message(rulebook: Any) -> None:
    out = run("interpret", str(DEMO / "hl7" / "batch.hl7"), "--format", "json")
    assert out.exit_code == 0, out.output
    got = [json.loads(line) for line in out.stdout.splitlines() if line.startswith("{")]
    text = (DEMO / "hl7" / "batch.hl7").read_text(encoding="utf-8")
    want = [gasrules.interpret(rulebook, r.case) for r in cases_from_hl7(text, rulebook.inputs)]
    assert [g["case_id"] for g in got] == [w["case_id"] for w in want] and len(got) == 3
    assert [g["headline"] for g in got] == [w["headline"] for w in want]


def test_interpret_reads_mllp_framed_files(rulebook: Any) -> None:
    out = run("interpret", str(DATA / "hl7" / "stream_mllp.hl7"), "-f", "json")
    assert out.exit_code == 0, out.output
    assert [json.loads(x)["case_id"] for x in out.stdout.splitlines() if x.startswith("{")] == [
        "MSG00011",
        "MSG00012",
        "MSG00013",
    ]


def test_interpret_hl7_in_fhir_out_is_valid_fhir() -> None:
    from fhir.resources.R4B.bundle import Bundle

    out = run("interpret", str(DEMO / "hl7" / "arterial_electrolytes.hl7"), "--format", "fhir")
    assert out.exit_code == 0, out.output
    bundle = json.loads(out.stdout)
    Bundle.model_validate(bundle)
    assert bundle["entry"][0]["resource"]["status"] == "preliminary"


def test_interpret_fhir_in_hl7_out_with_the_facility_from_settings(tmp_path: Path) -> None:
    settings = tmp_path / "site.yaml"
    settings.write_text("interfaces:\n  facility: WARD-LAB\n  application: GR-TEST\n")
    out = run("interpret", str(DEMO / "fhir" / "venous.json"), "--format", "hl7", "--settings", str(settings))
    assert out.exit_code == 0, out.output
    msg, issues = parse_message(out.stdout.strip("\n"))
    assert issues == [] and msg is not None
    msh = msg.first("MSH")
    assert (msg.get(msh, 3), msg.get(msh, 4), msg.get(msh, 9, 1)) == ("GR-TEST", "WARD-LAB", "ORU")
    assert msg.get(msh, 18) == "UNICODE UTF-8"


def test_interpret_detects_fhir_json_and_names_reading_errors(tmp_path: Path) -> None:
    out = run("interpret", str(DEMO / "fhir" / "kpa_units.json"), "--json")
    assert out.exit_code in (0, 3), out.output
    assert json.loads(out.stdout.splitlines()[0])["status"] != "rejected"
    bad = bad_batch(tmp_path)
    out = run("interpret", str(bad), "--json")
    rows = [json.loads(x) for x in out.stdout.splitlines() if x.startswith("{")]
    assert len(rows) == 4
    assert rows[1]["status"] == "rejected" and rows[1]["case_id"] == "BROKEN1"
    assert "OBX[1]-5" in rows[1]["errors"][0]["message"]


def test_batch_hl7_to_csv_keeps_every_message_with_errors_inline(tmp_path: Path) -> None:
    import csv

    out_path = tmp_path / "out.csv"
    out = run("batch", str(bad_batch(tmp_path)), str(out_path))
    assert out.exit_code == 4, out.output  # a message was rejected: exit 4 unless allowed
    out = run("batch", str(bad_batch(tmp_path)), str(out_path), "--allow-rejected")
    assert out.exit_code == 0, out.output
    rows = list(csv.DictReader(out_path.open(encoding="utf-8")))
    assert [r["case_id"] for r in rows] == ["DEMO0011", "BROKEN1", "DEMO0012", "DEMO0013"]
    assert rows[1]["status"] == "rejected" and "OBX[1]-5" in rows[1]["errors"]


def test_batch_table_to_hl7_and_fhir_gives_one_message_per_row(tmp_path: Path) -> None:
    from fhir.resources.R4B.bundle import Bundle

    source = DEMO / "cases.jsonl"
    n = sum(1 for line in source.read_text().splitlines() if line.strip())
    out = run("batch", str(source), str(tmp_path / "out.hl7"))
    assert out.exit_code == 0, out.output
    messages = list(iter_messages((tmp_path / "out.hl7").read_text(encoding="utf-8")))
    assert len(messages) == n
    assert all(parse_message(m)[1] == [] for m in messages)
    out = run("batch", str(source), str(tmp_path / "out.ndjson"), "--format", "fhir")
    assert out.exit_code == 0, out.output
    bundles = [json.loads(x) for x in (tmp_path / "out.ndjson").read_text().splitlines()]
    assert len(bundles) == n
    for bundle in bundles:
        Bundle.model_validate(bundle)


def test_batch_hl7_to_mllp_frames_and_fhir_list_of_bundles(tmp_path: Path) -> None:
    out = run("batch", str(DEMO / "hl7" / "batch.hl7"), str(tmp_path / "out.mllp"))
    assert out.exit_code == 0, out.output
    data = (tmp_path / "out.mllp").read_bytes()
    assert data.count(b"\x0b") == 3 and data.count(b"\x1c\r") == 3
    bundles = [
        json.loads((DEMO / "fhir" / f).read_text())
        for f in ("arterial_electrolytes.json", "kpa_units.json", "venous.json")
    ]
    (tmp_path / "three.json").write_text(json.dumps(bundles))
    out = run("batch", str(tmp_path / "three.json"), str(tmp_path / "three.jsonl"))
    assert out.exit_code == 0, out.output
    rows = [json.loads(x) for x in (tmp_path / "three.jsonl").read_text().splitlines()]
    assert len(rows) == 3 and all(r["status"] != "rejected" for r in rows)


def test_a_bad_input_format_names_the_accepted_ones(tmp_path: Path) -> None:
    out = run("interpret", str(DEMO / "case.json"), "--input-format", "xml")
    said = " ".join(out.output.replace("│", " ").split())
    assert out.exit_code == 2 and "accepted: json, jsonl, hl7, fhir" in said
    out = run("batch", str(DEMO / "cases.jsonl"), str(tmp_path / "x.out"), "--format", "pdf")
    assert out.exit_code == 2 and "hl7, fhir" in out.output
