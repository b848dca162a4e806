"""The seeded demo-case generator: determinism, contract, physiology, malformed rows, the tool.

Generated data is invented. The clinical relations asserted below are the ones the generator
is built on; each names its source beside it.
"""

from __future__ import annotations

import csv
import hashlib
import importlib.util
import io
import json
import math
import subprocess
import sys
from collections import Counter
from itertools import islice
from pathlib import Path
from typing import Any

import pytest
import yaml

from gasrules.verification.casegen import (
    CODED_INPUTS,
    CONTEXT_KEYS,
    HAGMA,
    INPUT_KEYS,
    MALFORMED_KINDS,
    METABOLIC_SETS,
    MIXES,
    RESPIRATORY,
    generate_cases,
    generate_corpus,
    generate_labelled,
    malformed_cases,
    to_canonical,
)

ROOT = Path(__file__).resolve().parent.parent
RULEBOOK = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
N_MIX = 5000


def _load_tool() -> Any:
    spec = importlib.util.spec_from_file_location("make_demo_data", ROOT / "tools" / "make_demo_data.py")
    assert spec and spec.loader
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("make_demo_data", module)  # dataclasses look their module up
    spec.loader.exec_module(module)
    return module


TOOL = _load_tool()


@pytest.fixture(scope="module")
def inputs() -> dict[str, dict[str, Any]]:
    """Input declarations (unit, alternatives, plausible range) of the shipped rulebook."""
    return yaml.safe_load(RULEBOOK.read_text(encoding="utf-8"))["inputs"]


@pytest.fixture(scope="module")
def labelled() -> list[tuple[Any, dict[str, Any]]]:
    return list(generate_labelled(N_MIX, seed=11))


def _canonical(case: dict[str, Any]) -> dict[str, float]:
    return {
        k: to_canonical(k, v)
        for k, v in case.items()
        if k in INPUT_KEYS and k not in CODED_INPUTS and k != "pregnant"
    }


def _hh_ph(hco3: float, pco2: float) -> float:
    # Henderson-Hasselbalch, pK' 6.1 and CO2 solubility 0.0307 mmol/L/mmHg
    # (pK' common practice; 0.0307 NCCLS 1994, bibliography key nccls1994).
    return 6.1 + math.log10(hco3 / (0.0307 * pco2))


def _digest(cases: Any) -> str:
    return hashlib.sha256(json.dumps(list(cases), sort_keys=True).encode()).hexdigest()


# ----------------------------------------------------------------------------- determinism
def test_same_seed_gives_the_same_cases_and_another_seed_does_not() -> None:
    first = list(generate_cases(400, seed=5))
    assert first == list(generate_cases(400, seed=5))
    other = list(generate_cases(400, seed=6))
    assert first != other
    assert [c["case_id"] for c in first] == [f"D{i:06d}" for i in range(1, 401)]


def test_output_does_not_depend_on_the_process_or_its_hash_seed() -> None:
    code = (
        "import hashlib, json; from gasrules.verification.casegen import generate_cases; "
        "print(hashlib.sha256(json.dumps(list(generate_cases(300, seed=9)), "
        "sort_keys=True).encode()).hexdigest())"
    )
    env = {"PYTHONHASHSEED": "12345", "PATH": ""}
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True
    ).stdout.strip()
    assert out == _digest(generate_cases(300, seed=9))


def test_shipped_demo_file_is_what_the_tool_generates() -> None:
    # The committed file was written on another machine: regenerating it byte for byte is the
    # cross-machine determinism check.
    lines = (ROOT / "tools" / "demo" / "cases.jsonl").read_text(encoding="utf-8").splitlines()
    picked = TOOL.demo_cases()
    assert [json.loads(line) for line in lines] == [case for _, case in picked]
    single = json.loads((ROOT / "tools" / "demo" / "case.json").read_text(encoding="utf-8"))
    assert single == picked[1][1]


# ----------------------------------------------------------------------------- contract
def test_every_case_uses_only_contract_keys_codes_and_declared_units(
    labelled: list[tuple[Any, dict[str, Any]]], inputs: dict[str, dict[str, Any]]
) -> None:
    for _, case in labelled:
        cid = case["case_id"]
        assert set(case) - {"case_id", "context"} <= INPUT_KEYS, cid
        assert tuple(case["context"]) == CONTEXT_KEYS, cid
        assert case["context"]["ward"] in MIXES["hospital"], cid
        for name, value in case.items():
            if name in ("case_id", "context"):
                continue
            if name in CODED_INPUTS:
                assert value in CODED_INPUTS[name] and value in inputs[name]["codes"], cid
            elif name == "pregnant":
                assert isinstance(value, bool), cid
            elif isinstance(value, dict):
                assert set(value) == {"value", "unit"}, (cid, name)
                assert value["unit"] in inputs[name].get("alternatives", {}), (cid, name)
            else:
                assert isinstance(value, (int, float)) and not isinstance(value, bool), cid


def test_every_value_lies_inside_the_rulebook_plausible_range(
    labelled: list[tuple[Any, dict[str, Any]]], inputs: dict[str, dict[str, Any]]
) -> None:
    for _, case in labelled:
        for name, value in _canonical(case).items():
            bounds = inputs[name]["plausible"]
            assert bounds["min"] <= value <= bounds["max"], (case["case_id"], name, value)


def test_collection_times_are_iso_and_increasing(labelled: list[tuple[Any, dict[str, Any]]]) -> None:
    times = [case["context"]["collected_at"] for _, case in labelled]
    assert times == sorted(times)
    assert all(len(t) == 20 and t[10] == "T" and t.endswith("Z") for t in times)


# ----------------------------------------------------------------------------- scenario mix
def test_mix_covers_every_allowed_disorder_combination(labelled: list[tuple[Any, dict[str, Any]]]) -> None:
    # At most one respiratory disorder (two cannot coexist: CMDT "Acid-base disorders",
    # common teaching) with each metabolic set the generator declares.
    resp_labels = ["none"] + [f"{r}/{c}" for r in RESPIRATORY[1:] for c in ("acute", "chronic")]
    expected = {"+".join((r, *m)) if m else r for r in resp_labels for m in METABOLIC_SETS}
    seen = Counter(s.combination for s, _ in labelled)
    assert len(expected) == 30
    assert set(seen) == expected
    assert min(seen.values()) >= 20


def test_mix_has_wards_samples_units_and_gaps_in_the_declared_shares(
    labelled: list[tuple[Any, dict[str, Any]]],
) -> None:
    n = len(labelled)
    wards = Counter(case["context"]["ward"] for _, case in labelled)
    for ward, share in MIXES["hospital"].items():
        assert abs(wards[ward] / n - share) < 0.03, ward
    count = Counter()
    for s, case in labelled:
        count["venous"] += case["sample_type"] == "venous"
        count["kpa"] += isinstance(case["pco2"], dict)
        count["albumin_gdl"] += isinstance(case.get("albumin"), dict)
        count["fio2_percent"] += isinstance(case.get("fio2"), dict)
        count["no_electrolytes"] += "na" not in case
        count["no_albumin"] += "na" in case and "albumin" not in case
        count["ventilated"] += "peep" in case
        count["child"] += case["age"] < 18
        count["pregnant"] += case.get("pregnant") is True
        count["inconsistent"] += s.inconsistent is not None
    for key in count:
        assert count[key] > 0, key
    assert 0.003 < count["inconsistent"] / n < 0.02


# ----------------------------------------------------------------------------- physiology
def test_henderson_hasselbalch_holds_except_for_deliberate_errors(
    labelled: list[tuple[Any, dict[str, Any]]],
) -> None:
    for s, case in labelled:
        v = _canonical(case)
        gap = abs(v["ph"] - _hh_ph(v["hco3"], v["pco2"]))
        if s.inconsistent is None:
            assert gap <= 0.03, (case["case_id"], gap)  # 0.03 pH: the brief's tolerance
        else:
            assert gap >= 0.05, (case["case_id"], s.inconsistent, gap)


def test_anion_gap_follows_the_scenario(labelled: list[tuple[Any, dict[str, Any]]]) -> None:
    # AG = Na - (Cl + HCO3), corrected + 0.25 x (44 - albumin g/L) (Figge et al., Crit Care Med
    # 1998); upper limit 12 mmol/L without K (Kraut & Madias, Clin J Am Soc Nephrol 2007).
    checked = 0
    for s, case in labelled:
        if s.inconsistent or "albumin" not in case:
            continue
        v = _canonical(case)
        corrected = v["na"] - v["cl"] - v["hco3"] + 0.25 * (44 - v["albumin"])
        if HAGMA in s.metabolic:
            assert corrected > 12, (case["case_id"], corrected)
        else:
            assert corrected < 13, (case["case_id"], corrected)
        checked += 1
    assert checked > 2000


def _arterial(s: Any) -> bool:
    return s.inconsistent is None and s.out_of_scope is None and s.sample_type == "arterial"


def test_metabolic_acidosis_alone_has_winters_respiratory_response(
    labelled: list[tuple[Any, dict[str, Any]]],
) -> None:
    # Winter's formula: expected PCO2 = 1.5 x HCO3 + 8 +/- 2 (Albert, Dell & Winters,
    # Ann Intern Med 1967; +/-2 common practice).
    checked = 0
    for s, case in labelled:
        v = _canonical(case)
        if _arterial(s) and s.respiratory == "none" and v["hco3"] < 22.4:
            assert abs(v["pco2"] - (1.5 * v["hco3"] + 8)) <= 2, case["case_id"]
            checked += 1
    assert checked > 500


@pytest.mark.parametrize(
    "disorder, chronicity, slope",
    [
        # HCO3 change per mmHg PCO2 (Adrogue & Madias, J Am Soc Nephrol 2010: adrogue2010)
        ("respiratory_acidosis", "acute", 0.1),
        ("respiratory_acidosis", "chronic", 0.35),
        ("respiratory_alkalosis", "acute", 0.2),
        ("respiratory_alkalosis", "chronic", 0.4),
    ],
)
def test_simple_respiratory_disorders_follow_their_bicarbonate_slope(
    labelled: list[tuple[Any, dict[str, Any]]], disorder: str, chronicity: str, slope: float
) -> None:
    checked = 0
    for s, case in labelled:
        if _arterial(s) and s.combination == f"{disorder}/{chronicity}":
            v = _canonical(case)
            expected = 24 + slope * (v["pco2"] - 40)
            assert abs(v["hco3"] - expected) <= 3, case["case_id"]  # 3: synthesis noise bound
            checked += 1
    assert checked > 50


# ----------------------------------------------------------------------------- malformed rows
def test_malformed_cases_are_broken_in_the_declared_way(inputs: dict[str, dict[str, Any]]) -> None:
    rows = list(malformed_cases(60, seed=4))
    assert Counter(kind for kind, _, _ in rows) == {k: 12 for k in MALFORMED_KINDS}
    for kind, key, case in rows:
        bad = case[key]
        if kind == "unknown_key":
            assert key not in INPUT_KEYS
        elif kind == "text_value":
            assert isinstance(bad, str) and bad and key not in CODED_INPUTS
            with pytest.raises(ValueError):
                float(bad)
        elif kind == "bad_unit":
            spec = inputs[key]
            assert bad["unit"] != spec["unit"]
            assert bad["unit"] not in spec.get("alternatives", {})
        elif kind == "out_of_range":
            lo, hi = inputs[key]["plausible"]["min"], inputs[key]["plausible"]["max"]
            assert not lo <= bad <= hi
        else:
            assert kind == "missing_value"
            assert bad is None or bad == "" or (isinstance(bad, dict) and "value" not in bad)
        rest = {k: v for k, v in case.items() if k != key}  # everything else stays valid
        assert set(rest) - {"case_id", "context"} <= INPUT_KEYS
        assert case["case_id"].startswith("M")


def test_corpus_keeps_every_row_in_order_with_a_few_malformed() -> None:
    rows = list(generate_corpus(20000, seed=3))
    assert [c["case_id"] for _, _, c in rows] == [f"D{i:06d}" for i in range(1, 20001)]
    bad = [kind for kind, _, _ in rows if kind is not None]
    assert 5 <= len(bad) <= 60
    assert set(bad) <= set(MALFORMED_KINDS)


# ----------------------------------------------------------------------------- the tool
def test_csv_corpus_is_canonical_and_malformed_rows_show_their_defect() -> None:
    out = io.StringIO()
    written, malformed = TOOL.write_corpus(out, 3000, 8, "csv", "hospital", 0.01)
    table = list(csv.reader(io.StringIO(out.getvalue())))
    header, body = table[0], table[1:]
    assert tuple(header) == TOOL.CSV_HEADER and "pco2" in header and "albumin" in header
    assert written == len(body) == 3000 and malformed > 10
    broken = {
        case["case_id"]: (kind, key)
        for kind, key, case in generate_corpus(3000, 8, malformed_share=0.01)
        if kind
    }
    assert len(broken) == malformed
    col = {name: i for i, name in enumerate(header)}
    for row in body:
        if row[0] in broken:
            kind, key = broken[row[0]]
            if kind == "unknown_key":
                assert len(row) == len(header) + 1 and row[-1].startswith(f"{key}=")
            elif kind == "missing_value":
                assert len(row) == col[key]
            elif kind == "out_of_range":
                assert len(row) == len(header) and float(row[col[key]]) > 10
            else:  # text_value, bad_unit: not a number
                assert len(row) == len(header)
                with pytest.raises(ValueError):
                    float(row[col[key]])
            continue
        assert len(row) == len(header)
        ph, pco2, hco3 = (float(row[col[n]]) for n in ("ph", "pco2", "hco3"))
        assert 5 <= pco2 <= 250  # mmHg, never kPa, in the CSV
        if row[col["albumin"]]:
            assert 10 <= float(row[col["albumin"]]) <= 60  # g/L, never g/dL
        if row[col["fio2"]]:
            assert 0.18 <= float(row[col["fio2"]]) <= 1.0  # fraction, never %


def test_cli_writes_jsonl_and_rejects_bad_arguments(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "corpus.jsonl"
    assert TOOL.run(["corpus", "--n", "500", "--seed", "2", "--format", "jsonl", "--out", str(target)]) == 0
    lines = target.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 500
    expected = [c for _, _, c in generate_corpus(500, 2)]
    assert [json.loads(line) for line in lines] == expected
    assert TOOL.run(["corpus", "--n", "-1", "--out", str(target)]) == 2
    assert "--n must be 0 or more, got -1" in capsys.readouterr().err
    assert set(TOOL.SUBCOMMANDS) >= {"corpus", "demo"}


def test_bad_arguments_to_the_generator_name_the_field() -> None:
    with pytest.raises(ValueError, match="mix must be one of"):
        next(generate_cases(1, mix="clinic"))
    with pytest.raises(ValueError, match="n must be >= 0"):
        next(generate_cases(-1))
    assert list(islice(generate_cases(0), 1)) == []
