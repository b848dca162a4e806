"""Decision records: a clean log verifies; every kind of damage is named with its first line.

Cases and results are built by hand in the shape of the engine contract. The clinical numbers
come from one published teaching case so the records look like real ones; the tests check the
log machinery, not the clinical conclusions.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import multiprocessing
import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest

from gasrules.governance.audit import (
    Difference,
    compare_results,
    render_replay,
    render_verify,
    repair_log,
    replay_log,
    verify_log,
)
from gasrules.governance.decision_log import (
    ZERO_SHA,
    DecisionLog,
    RecordConfig,
    RecordError,
    _compose,
    anchor_path,
    apply_context_policy,
    entry_hash,
    mask_value,
    record_json,
)

SALT = "test-salt-0123456789abcdef"
RULEBOOK_V1 = {"id": "gasrules-default", "version": "1.0.0", "sha256": "a1" * 32}


class TickClock:
    """A pinned clock advancing one second per reading."""

    def __init__(self) -> None:
        self.t = datetime(2026, 1, 2, 3, 4, 5, tzinfo=UTC)

    def __call__(self) -> datetime:
        self.t += timedelta(seconds=1)
        return self.t


def make_case(i: int, pco2: float = 24) -> dict[str, Any]:
    # DuBose, "Acidosis and alkalosis", Harrison's, table of mixed disorders, example 1
    # (DuBose, Harrison's, table of mixed disorders: dubose_harrison): Na 140, K 4.0, Cl 106, HCO3 14, PaCO2 24, pH 7.39.
    return {
        "case_id": f"case-{i}",
        "ph": 7.39,
        "pco2": pco2,
        "hco3": 14,
        "na": 140,
        "k": 4.0,
        "cl": 106,
        "context": {
            "mrn": f"MRN{i:06d}",
            "name": "Demo Patient",
            "ward": "ICU",
            "visit": {"patient_id": i, "bed": 7},
        },
    }


def winter_interpret(rulebook: dict[str, Any], case: dict[str, Any]) -> dict[str, Any]:
    """A fake engine: anion gap plus Winter's formula with the rulebook's tolerance."""
    # Anion gap = Na - (Cl + HCO3): 140 - 120 = 20 for E1 (DuBose, Harrison's, E1: AG 20).
    ag = case["na"] - (case["cl"] + case["hco3"])
    # Winter's formula, expected PaCO2 = 1.5 x HCO3 + 8 +/- 2 (Albert, Dell & Winters,
    # Ann Intern Med 1967): 29 for HCO3 14, so PaCO2 24 means a respiratory alkalosis too.
    expected = 1.5 * case["hco3"] + 8
    tol = rulebook.get("winter_tolerance", 2)
    disorders = ["metabolic_acidosis_high_anion_gap"] if ag > 12 else ["metabolic_acidosis"]
    if case["pco2"] < expected - tol:
        disorders.append("respiratory_alkalosis")
    return {
        "schema_version": 1,
        "case_id": case.get("case_id"),
        "context": case.get("context"),
        "rulebook": {k: rulebook[k] for k in ("id", "version", "sha256")},
        "engine_version": "0.1.0",
        "status": "interpreted",
        "headline": "demo",
        "errors": [],
        "units": {"anion_gap": "mmol/L", "expected_pco2": "mm[Hg]"},
        # [H+] in mol/L = 10^-pH (definition of pH): 4.07e-08 exercises exponent floats.
        "values": {"anion_gap": ag, "expected_pco2": expected, "h_plus": 10 ** -case["ph"]},
        "findings": [
            {
                "code": "ag.high",
                "category": "acid_base",
                "severity": "warning",
                "text": "Anion gap is high.",
                "rule": "ag.high",
            }
        ],
        "disorders": disorders,
        "qualifiers": {},
        "not_assessed": [],
        "cautions": ["Supports, never replaces, clinical judgement."],
        "trace": [{"op": "fired", "rule": "ag.high", "inputs": {"na": 140}}, {"op": "timing", "ms": 0.12}],
    }


def write_log(path: Path, n: int, config: RecordConfig | None = None, start: int = 1) -> None:
    cfg = config or RecordConfig(fsync=False, clock=TickClock())
    with DecisionLog(path, cfg) as log:
        for i in range(start, start + n):
            case = make_case(i, pco2=24 if i % 2 else 29)
            log.append(case, winter_interpret(RULEBOOK_V1, case))


@pytest.fixture(scope="module")
def clean_200(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("clean") / "decisions.jsonl"
    write_log(path, 200)
    return path


@pytest.fixture
def log200(clean_200: Path, tmp_path: Path) -> Path:
    path = tmp_path / "decisions.jsonl"
    shutil.copy(clean_200, path)
    shutil.copy(anchor_path(clean_200), anchor_path(path))
    return path


def lines_of(path: Path) -> list[bytes]:
    return path.read_bytes().splitlines(keepends=True)


def set_lines(path: Path, lines: list[bytes]) -> None:
    path.write_bytes(b"".join(lines))


def first(path: Path) -> tuple[str, int | None, int | None]:
    report = verify_log(path)
    assert not report.ok
    issue = report.first_problem
    assert issue is not None
    return issue.code, issue.line, issue.seq


# ---------------------------------------------------------------- canonical form


def test_composed_entry_bytes_equal_the_standard_library_canonical_form() -> None:
    obj = {"z": [1, 2.5, 4.07e-08, 1e16], "a": {"é": "ü", "b": None}, "m": True}
    parts = {k: record_json(v) for k, v in obj.items()}
    assert (
        _compose(parts) == json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    )
    assert record_json(4.07e-08) == b"4.07e-08"  # the stdlib form, not orjson's 4.07e-8


def test_an_unencodable_result_names_the_field(tmp_path: Path) -> None:
    case = make_case(1)
    result = winter_interpret(RULEBOOK_V1, case)
    result["values"] = {1: 2.0}
    with (
        DecisionLog(tmp_path / "l.jsonl", RecordConfig(fsync=False)) as log,
        pytest.raises(RecordError) as err,
    ):
        log.append(case, result)
    assert err.value.code == "record.not_json" and err.value.field == "result.values"
    result["values"] = {"x": float("nan")}
    with (
        DecisionLog(tmp_path / "l.jsonl", RecordConfig(fsync=False)) as log,
        pytest.raises(RecordError, match="field result"),
    ):
        log.append(case, result)


# ---------------------------------------------------------------- a clean log


def test_a_clean_log_of_200_entries_verifies(log200: Path) -> None:
    report = verify_log(log200)
    assert report.ok and report.issues == ()
    assert report.entries == 200
    anchor = json.loads(anchor_path(log200).read_text())
    last = json.loads(lines_of(log200)[-1])
    assert anchor == {"count": 200, "last_sha256": last["entry_sha256"], "log_size": log200.stat().st_size}
    assert "ok, 200 entries" in render_verify(report)


def test_entries_carry_the_required_fields_and_chain(log200: Path) -> None:
    entries = [json.loads(line) for line in lines_of(log200)]
    assert entries[0]["prev"] == ZERO_SHA and entries[0]["seq"] == 1
    assert entries[1]["prev"] == entries[0]["entry_sha256"]
    e = entries[0]
    assert e["time"] == "2026-01-02T03:04:06.000000Z"
    assert e["rulebook"] == RULEBOOK_V1 and e["engine_version"] == "0.1.0"
    assert e["entry_sha256"] == entry_hash(e)
    assert e["input_sha256"] == hashlib.sha256(record_json(e["input"])).hexdigest()
    assert e["result"]["trace"][0]["op"] == "fired"  # the result is kept as given


def test_a_reopened_writer_resumes_the_chain(log200: Path) -> None:
    write_log(log200, 3, start=201)
    report = verify_log(log200)
    assert report.ok and report.entries == 203


# ---------------------------------------------------------------- damage, each named


def test_an_edited_value_is_an_entry_hash_mismatch_at_its_line(log200: Path) -> None:
    lines = lines_of(log200)
    entry = json.loads(lines[56])
    entry["result"]["values"]["anion_gap"] = 12  # someone "corrects" the anion gap
    lines[56] = record_json(entry) + b"\n"
    set_lines(log200, lines)
    assert first(log200) == ("entry_hash_mismatch", 57, 57)


def test_an_edited_and_rehashed_entry_breaks_the_chain_at_the_next_line(log200: Path) -> None:
    lines = lines_of(log200)
    entry = json.loads(lines[56])
    entry["result"]["disorders"] = ["metabolic_acidosis"]
    entry["entry_sha256"] = entry_hash(entry)
    # the output hash was not recomputed: caught before the chain
    lines[56] = record_json(entry) + b"\n"
    set_lines(log200, lines)
    assert first(log200) == ("output_hash_mismatch", 57, 57)
    entry["output_sha256"] = hashlib.sha256(record_json(entry["result"])).hexdigest()
    entry["entry_sha256"] = entry_hash(entry)
    lines[56] = record_json(entry) + b"\n"
    set_lines(log200, lines)
    assert first(log200) == ("chain_break", 58, 58)


def test_removing_the_last_lines_is_truncated(log200: Path) -> None:
    set_lines(log200, lines_of(log200)[:-3])
    report = verify_log(log200)
    assert [i.code for i in report.issues] == ["truncated"]
    assert first(log200) == ("truncated", 198, 198)


def test_a_swapped_pair_is_a_chain_break_at_the_first_of_them(log200: Path) -> None:
    lines = lines_of(log200)
    lines[99], lines[100] = lines[100], lines[99]
    set_lines(log200, lines)
    report = verify_log(log200)
    assert first(log200) == ("chain_break", 100, 101)
    assert "reordered" in report.issues[0].message
    assert {i.code for i in report.issues} == {"chain_break"}


def test_a_deleted_middle_entry_is_a_seq_gap(log200: Path) -> None:
    lines = lines_of(log200)
    del lines[119]
    set_lines(log200, lines)
    report = verify_log(log200)
    assert first(log200) == ("seq_gap", 120, 121)
    assert "entry 120 missing" in report.issues[0].message
    # the last entry still matches the anchor, but the file is shorter than it says
    assert [i.code for i in report.issues] == ["seq_gap", "anchor_mismatch"]


def test_a_half_written_last_line_is_a_torn_tail(log200: Path) -> None:
    last = lines_of(log200)[-1]
    with open(log200, "ab") as f:  # simulated crash: half a line, no newline
        f.write(last[: len(last) // 2])
    report = verify_log(log200)
    assert [i.code for i in report.issues] == ["torn_tail"]  # the anchor agrees: a crash
    assert first(log200) == ("torn_tail", 201, 201)


def test_a_log_edited_without_the_anchor_is_an_anchor_mismatch(log200: Path) -> None:
    lines = lines_of(log200)
    entry = json.loads(lines[-1])
    entry["result"]["status"] = "partial"
    entry["output_sha256"] = hashlib.sha256(record_json(entry["result"])).hexdigest()
    entry["entry_sha256"] = entry_hash(entry)
    lines[-1] = record_json(entry) + b"\n"
    set_lines(log200, lines)
    assert first(log200) == ("anchor_mismatch", 200, 200)


def test_a_missing_anchor_and_a_missing_log_are_named(log200: Path) -> None:
    anchor_path(log200).unlink()
    assert verify_log(log200).first_problem.code == "anchor_missing"  # type: ignore[union-attr]
    log200.unlink()
    assert verify_log(log200).first_problem.code == "log_missing"  # type: ignore[union-attr]


def test_a_witness_must_be_in_the_chain(log200: Path) -> None:
    kept = json.loads(lines_of(log200)[49])["entry_sha256"]
    assert verify_log(log200, witness=kept).ok
    assert verify_log(log200, witness="f" * 64).first_problem.code == "witness_missing"  # type: ignore[union-attr]


# ---------------------------------------------------------------- crash handling and repair


def test_a_crash_before_the_anchor_update_is_a_warning_healed_on_reopen(log200: Path) -> None:
    before = anchor_path(log200).read_bytes()
    write_log(log200, 1, start=201)
    anchor_path(log200).write_bytes(before)  # the anchor never got replaced
    report = verify_log(log200)
    assert report.ok and [i.code for i in report.warnings] == ["anchor_lag"]
    DecisionLog(log200, RecordConfig(fsync=False)).close()
    assert verify_log(log200).issues == ()


def test_the_writer_refuses_a_torn_tail_until_repaired(log200: Path) -> None:
    with open(log200, "ab") as f:
        f.write(b'{"seq":201,"kind":"deci')
    with pytest.raises(RecordError) as err:
        DecisionLog(log200, RecordConfig(fsync=False))
    assert err.value.code == "torn_tail"
    fixed = repair_log(log200, clock=TickClock(), fsync=False)
    assert fixed.actions == ("truncated_torn_tail",) and fixed.removed_bytes == 23
    assert (log200.parent / fixed.saved_to).read_bytes() == b'{"seq":201,"kind":"deci'
    report = verify_log(log200)
    assert report.ok and report.entries == 201 and report.repairs == ((201, "truncated_torn_tail"),)
    note = json.loads(lines_of(log200)[-1])
    assert note["kind"] == "repair" and note["repair"]["problems"] == ["torn_tail"]
    write_log(log200, 1, start=202)
    assert verify_log(log200).ok and verify_log(log200).entries == 202


def test_the_writer_refuses_a_truncated_log_and_repair_needs_acknowledgement(log200: Path) -> None:
    set_lines(log200, lines_of(log200)[:-2])
    with pytest.raises(RecordError) as err:
        DecisionLog(log200, RecordConfig(fsync=False))
    assert err.value.code == "truncated"
    with pytest.raises(RecordError, match="acknowledge_anchor"):
        repair_log(log200, fsync=False)
    fixed = repair_log(log200, acknowledge_anchor=True, fsync=False)
    assert fixed.actions == ("reanchored",) and fixed.note_seq == 199
    note = json.loads(lines_of(log200)[-1])
    assert note["repair"]["anchor_before"]["count"] == 200
    assert verify_log(log200).ok


def test_repair_refuses_a_damaged_chain(log200: Path) -> None:
    lines = lines_of(log200)
    del lines[10]
    set_lines(log200, lines)
    with pytest.raises(RecordError) as err:
        repair_log(log200, acknowledge_anchor=True, fsync=False)
    assert err.value.code == "seq_gap" and err.value.line == 11


def test_the_writer_refuses_a_log_without_anchor_or_with_a_bad_last_line(log200: Path) -> None:
    anchor_path(log200).unlink()
    with pytest.raises(RecordError) as err:
        DecisionLog(log200, RecordConfig(fsync=False))
    assert err.value.code == "anchor_missing"
    assert repair_log(log200, acknowledge_anchor=True, fsync=False).actions == ("reanchored",)
    assert verify_log(log200).ok
    lines = lines_of(log200)
    lines[4] = b"not json\n"  # damage after the fact, in the middle: not crash-shaped
    set_lines(log200, lines)
    assert first(log200) == ("malformed_line", 5, None)
    with pytest.raises(RecordError) as err:
        repair_log(log200, acknowledge_anchor=True, fsync=False)
    assert err.value.code == "malformed_line"


def test_an_unreadable_last_line_the_anchor_never_counted_is_a_torn_tail(log200: Path) -> None:
    last = lines_of(log200)[-1]
    with open(log200, "ab") as f:  # a crash that left half a line and then a newline
        f.write(last[: len(last) // 2] + b"\n")
    assert [i.code for i in verify_log(log200).issues] == ["torn_tail"]
    with pytest.raises(RecordError) as err:
        DecisionLog(log200, RecordConfig(fsync=False))
    assert err.value.code == "torn_tail"
    fixed = repair_log(log200, fsync=False)
    assert fixed.removed_bytes == len(last) // 2 + 1 and fixed.note_seq == 201
    assert verify_log(log200).ok
    # the same bytes at the end of a log whose anchor counts them are damage, not a crash
    lines = lines_of(log200)
    lines[-1] = lines[-1][:40] + b"\n"
    set_lines(log200, lines)
    anchor = json.loads(anchor_path(log200).read_text())
    anchor["log_size"] = log200.stat().st_size
    anchor_path(log200).write_text(json.dumps(anchor))
    assert first(log200) == ("malformed_line", 201, None)


def test_every_entry_is_written_with_rulebook_time_and_no_temp_files(tmp_path: Path) -> None:
    path = tmp_path / "x.jsonl"
    compiled = SimpleNamespace(id="gasrules-default", version="1.0.0", sha256="c4" * 32)
    case = make_case(1)
    result = winter_interpret(RULEBOOK_V1, case)
    with DecisionLog(path, RecordConfig(fsync=True, clock=TickClock())) as log:
        receipt = log.append(case, result, rulebook=compiled, engine_version="9.9")
        log.append([1, 2], {"status": "rejected", "rulebook": RULEBOOK_V1})  # kept, never lost
        with pytest.raises(RecordError) as err:
            log.append(case, {"status": "rejected"})
        assert err.value.field == "rulebook"
    entry = json.loads(lines_of(path)[0])
    assert entry["rulebook"]["sha256"] == "c4" * 32 and entry["engine_version"] == "9.9"
    assert receipt.seq == 1 and receipt.entry_sha256 == entry["entry_sha256"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.jsonl", "x.jsonl.anchor"]
    naive = RecordConfig(fsync=False, clock=lambda: datetime(2026, 1, 1))
    with DecisionLog(path, naive) as log, pytest.raises(RecordError, match="clock"):
        log.append(case, result)
    assert verify_log(path).ok and verify_log(path).entries == 2


# ---------------------------------------------------------------- identifiers in context


def test_mask_replaces_identifiers_by_a_salted_hash_prefix(tmp_path: Path) -> None:
    cfg = RecordConfig(context_policy="mask", salt=SALT, fsync=False, clock=TickClock())
    case = make_case(7)
    masked, touched = apply_context_policy(case, cfg)
    ctx = masked["context"]
    assert ctx["ward"] == "ICU" and ctx["visit"]["bed"] == 7
    assert ctx["mrn"] == mask_value("MRN000007", SALT) and ctx["mrn"].startswith("hmac-sha256:")
    assert len(ctx["mrn"]) == len("hmac-sha256:") + 16
    assert ctx["visit"]["patient_id"] == mask_value(7, SALT)
    assert mask_value("MRN000007", SALT + "x") != ctx["mrn"]
    assert touched == ["/context/mrn", "/context/name", "/context/visit/patient_id"]
    assert case["context"]["mrn"] == "MRN000007"  # the caller's case is untouched
    path = tmp_path / "m.jsonl"
    with DecisionLog(path, cfg) as log:
        log.append(case, winter_interpret(RULEBOOK_V1, case))
    text = path.read_text()
    assert "MRN000007" not in text and "Demo Patient" not in text  # nor in the result's context
    entry = json.loads(text)
    assert entry["result"]["context"]["mrn"] == ctx["mrn"] and entry["context_policy"] == "mask"
    assert verify_log(path).ok


def test_drop_removes_identifiers_and_keep_keeps_them(tmp_path: Path) -> None:
    dropped, touched = apply_context_policy(make_case(3), RecordConfig(context_policy="drop"))
    assert dropped["context"] == {"ward": "ICU", "visit": {"bed": 7}}
    assert len(touched) == 3
    kept, touched = apply_context_policy(make_case(3), RecordConfig(context_policy="keep"))
    assert kept == make_case(3) and touched == []
    odd = {"ph": 7.4, "context": "MRN 123 Jane Doe"}  # not an object: dropped whole
    assert apply_context_policy(odd, RecordConfig())[0] == {"ph": 7.4}


def test_bad_record_settings_name_the_field_and_the_accepted_form() -> None:
    with pytest.raises(RecordError) as err:
        RecordConfig(context_policy="hide")
    assert err.value.field == "context_policy" and err.value.accepted == "keep | mask | drop"
    with pytest.raises(RecordError) as err:
        RecordConfig(context_policy="mask")
    assert err.value.field == "salt"
    with pytest.raises(RecordError) as err:
        RecordConfig.from_mapping({"context_policy": "mask", "salty": "x"})
    assert err.value.field == "salty"
    assert RecordConfig.from_mapping({"identifier_keys": ["mrn"]}).identifier_keys == ("mrn",)


# ---------------------------------------------------------------- two processes, one log


def _append_many(path: str, start: int, n: int, go: Any) -> None:
    go.wait(30)  # both writers start together, so their appends overlap
    write_log(Path(path), n, start=start)


def test_two_processes_appending_produce_one_valid_chain(tmp_path: Path) -> None:
    path = tmp_path / "shared.jsonl"
    DecisionLog(path, RecordConfig(fsync=False)).close()  # both open an existing log
    ctx = multiprocessing.get_context("fork")
    go = ctx.Barrier(2)
    procs = [ctx.Process(target=_append_many, args=(str(path), s, 60, go)) for s in (1, 1001)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(60)
        assert p.exitcode == 0
    report = verify_log(path)
    assert report.ok and report.issues == () and report.entries == 120
    ids = [json.loads(line)["input"]["case_id"] for line in lines_of(path)]
    second = [int(i.split("-")[1]) > 1000 for i in ids]
    assert any(a != b for a, b in itertools.pairwise(second)), "the writers did not overlap"
    for start in (1, 1001):  # each writer's own entries stay in its order
        mine = [
            int(i.split("-")[1])
            for i in ids
            if int(i.split("-")[1]) >= start and int(i.split("-")[1]) < start + 60
        ]
        assert mine == list(range(start, start + 60))


# ---------------------------------------------------------------- replay


def test_compare_results_ignores_trace_and_timing_and_names_what_changed() -> None:
    a = winter_interpret(RULEBOOK_V1, make_case(1))
    b = json.loads(json.dumps(a))
    b["trace"] = []
    b["headline"] = "reworded"
    b["values"]["h_plus"] *= 1 + 1e-12  # last-digit float noise
    assert compare_results(a, b) == ()
    b["disorders"] = ["metabolic_acidosis_high_anion_gap"]
    b["values"]["anion_gap"] = 18
    b["findings"] = []
    assert compare_results(a, b) == (
        Difference("disorders", sorted(a["disorders"]), ["metabolic_acidosis_high_anion_gap"]),
        Difference("findings", ["ag.high"], []),
        Difference("values.anion_gap", 20, 18),
    )


def test_replay_reports_changed_results_and_missing_rulebooks(tmp_path: Path) -> None:
    path = tmp_path / "r.jsonl"
    write_log(path, 6)  # odd cases PaCO2 24, even cases PaCO2 29
    rulebook_v2 = {**RULEBOOK_V1, "version": "2.0.0", "sha256": "b2" * 32}
    case = make_case(7)
    with DecisionLog(path, RecordConfig(fsync=False)) as log:
        log.append(case, winter_interpret(rulebook_v2, case))
    # The archive holds v1 with a wider (wrong) Winter tolerance of 6: PaCO2 24 then falls
    # inside 29 +/- 6 and the respiratory alkalosis disappears. v2 is not archived.
    archive = {RULEBOOK_V1["sha256"]: {**RULEBOOK_V1, "winter_tolerance": 6}}
    report = replay_log(path, archive.get, winter_interpret)
    assert report.counts["same"] == 3 and report.counts["differs"] == 3
    assert report.counts["rulebook_missing"] == 1
    differs = [o for o in report.outcomes if o.outcome == "differs"]
    assert [o.seq for o in differs] == [1, 3, 5]
    assert differs[0].differences == (
        Difference(
            "disorders",
            ["metabolic_acidosis_high_anion_gap", "respiratory_alkalosis"],
            ["metabolic_acidosis_high_anion_gap"],
        ),
    )
    assert "line 7 (seq 7): rulebook_missing" in render_replay(report)
    faithful = {RULEBOOK_V1["sha256"]: RULEBOOK_V1, rulebook_v2["sha256"]: rulebook_v2}
    assert replay_log(path, faithful.__getitem__, winter_interpret).ok


def test_replay_reports_an_engine_error_per_entry(tmp_path: Path) -> None:
    path = tmp_path / "e.jsonl"
    write_log(path, 2)

    def broken(rulebook: Any, case: Any) -> dict[str, Any]:
        raise ZeroDivisionError("division by zero")

    report = replay_log(path, {RULEBOOK_V1["sha256"]: RULEBOOK_V1}.get, broken)
    assert report.counts["error"] == 2 and "ZeroDivisionError" in report.outcomes[0].message
