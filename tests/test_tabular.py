"""Readers and writers of tables: column mapping, units in headers, pass-through columns,
malformed rows kept as rejected results, Parquet types, and writers that rename at the end.

Case values here are invented demo numbers; the tests check the table machinery. Where a test
asserts a converted value, the conversion factor's source is named beside it.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.tables.readers import (
    Column,
    TableError,
    analytes_of,
    interpret_row,
    load_mapping,
    open_table,
    open_writer,
    read_back,
    temp_path_for,
)

HEADER = "case_id,ward,record_number,ph,pco2[kPa],hco3,Na,cl,note\n"


@pytest.fixture(scope="module")
def rb() -> Any:
    return gasrules.load_rulebook()


@pytest.fixture(scope="module")
def analytes(rb: Any) -> dict[str, tuple[str, ...]]:
    return analytes_of(rb)


def _rows(path: Path, analytes: Any, **kw: Any) -> list[Any]:
    with open_table(path, analytes, **kw) as t:
        return list(t)


# ----------------------------------------------------------------------------- headers


def test_units_in_header_both_spellings_and_case_insensitive_names(tmp_path: Path, analytes: Any) -> None:
    p = tmp_path / "g.csv"
    p.write_text("PH,pco2 (kPa),po2[mmHg],HCO3\n7.40,5.33,90,24\n", encoding="utf-8")
    [row] = _rows(p, analytes)
    assert row.case == {
        "case_id": None,
        "context": {},
        "ph": "7.40",
        "pco2": {"value": "5.33", "unit": "kPa"},
        "po2": "90",
        "hco3": "24",
    }
    assert row.errors == []


def test_header_unit_converted_by_the_engine(tmp_path: Path, rb: Any, analytes: Any) -> None:
    p = tmp_path / "g.csv"
    p.write_text("ph,pco2[kPa],hco3\n7.40,5.33,24\n", encoding="utf-8")
    [row] = _rows(p, analytes)
    result = interpret_row(rb, row)
    # 1 mmHg = 133.322 Pa (NIST SP 811, 2008), so 5.33 kPa = 39.98 mmHg
    assert result["inputs"]["pco2"] == pytest.approx(5.33 * 1000 / 133.322, abs=0.01)


@pytest.mark.parametrize(
    "header, where, expected",
    [
        ("ph,pco2[mg/dL]\n", "column 2 'pco2[mg/dL]'", "one of mm[Hg], kPa"),
        ("ph,pco2[furlongs]\n", "column 2 'pco2[furlongs]'", "one of mm[Hg], kPa"),
        ("ph[kPa],pco2\n", "column 1 'ph[kPa]'", "one of [pH]"),
        ("sample_type[kPa]\n", "column 1 'sample_type[kPa]'", "no unit"),
        ("ph,PH\n", "column 2 'PH'", "one column per input"),
    ],
)
def test_unusable_header_names_the_column(
    tmp_path: Path, analytes: Any, header: str, where: str, expected: str
) -> None:
    p = tmp_path / "bad.csv"
    p.write_text(header + "7.4,40\n", encoding="utf-8")
    with pytest.raises(TableError) as err:
        open_table(p, analytes)
    assert where in str(err.value) and expected in str(err.value)


# ----------------------------------------------------------------------------- mapping


def test_mapping_file_yaml(tmp_path: Path, rb: Any, analytes: Any) -> None:
    m = tmp_path / "map.yaml"
    m.write_text(
        "columns:\n  Lab no: case_id\n  Sodium: na\n  PaCO2 value: {input: pco2, unit: kPa}\n"
        "  Comment: pass\n",
        encoding="utf-8",
    )
    p = tmp_path / "g.csv"
    p.write_text("Lab no,ph,PaCO2 value,hco3,Sodium,Comment\nL1,7.40,5.33,24,140,ok\n", encoding="utf-8")
    with open_table(p, analytes, mapping=load_mapping(m)) as t:
        assert t.passthrough == ["Comment"]
        [row] = list(t)
    assert row.case == {
        "case_id": "L1",
        "context": {"Comment": "ok"},
        "ph": "7.40",
        "pco2": {"value": "5.33", "unit": "kPa"},
        "hco3": "24",
        "na": "140",
    }


def test_mapping_file_json_and_its_errors(tmp_path: Path, analytes: Any) -> None:
    m = tmp_path / "map.json"
    m.write_text(json.dumps({"columns": {"Bicarb": "bicarbonate"}}), encoding="utf-8")
    p = tmp_path / "g.csv"
    p.write_text("ph,Bicarb\n7.4,24\n", encoding="utf-8")
    with pytest.raises(TableError) as err:
        open_table(p, analytes, mapping=load_mapping(m))
    assert "map.json" in str(err.value) and "'bicarbonate' is not an input" in str(err.value)
    assert "column 2 'Bicarb'" in str(err.value)
    bad = tmp_path / "bad.yaml"
    bad.write_text("columns:\n  X: [1, 2]\n", encoding="utf-8")
    with pytest.raises(TableError, match=r"bad.yaml: columns.X: cannot read \[1, 2\]"):
        load_mapping(bad)
    other = tmp_path / "other.yaml"
    other.write_text("colums: {}\n", encoding="utf-8")
    with pytest.raises(TableError, match="'columns' and/or 'passthrough'"):
        load_mapping(other)


# ----------------------------------------------------------------------------- CSV rows


def test_csv_passthrough_untouched_and_case_id_kept(tmp_path: Path, analytes: Any) -> None:
    p = tmp_path / "g.csv"
    p.write_text(HEADER + 'A-1,ICU, 007 ,7.31,4.1,20,139,104,"a, quoted; note"\n', encoding="utf-8")
    with open_table(p, analytes) as t:
        assert t.passthrough == ["ward", "record_number", "note"]
        [row] = list(t)
    assert row.passthrough == {"ward": "ICU", "record_number": " 007 ", "note": "a, quoted; note"}
    assert row.case["case_id"] == "A-1" and row.case["na"] == "139" and row.where == "g.csv:2"


def test_malformed_csv_rows_are_rows_with_errors(tmp_path: Path, rb: Any, analytes: Any) -> None:
    p = tmp_path / "g.csv"
    p.write_text(
        HEADER
        + "A1,ICU,1,7.31,4.1,20,139,104,x\n"
        + "A2,ICU,2,7.31,4.1,20,139,104,x,surplus\n"
        + "\n"
        + "A3,ED,3,7.31\n"
        + "A4,ED,4,7.3O,4.1,20,139,104,y\n",
        encoding="utf-8",
    )
    rows = _rows(p, analytes)
    assert [r.case["case_id"] for r in rows] == ["A1", "A2", "A3", "A4"]  # blank line is no row
    assert [r.index for r in rows] == [0, 1, 2, 3]
    results = [interpret_row(rb, r) for r in rows]
    assert [r["status"] for r in results][1:] == ["rejected"] * 3
    long_, short, text = results[1]["errors"][0], results[2]["errors"][0], results[3]["errors"][0]
    assert long_["code"] == "input.unreadable" and long_["message"].startswith("g.csv:3: 10 fields")
    assert "'surplus'" in long_["message"] and long_["accepted"] == "exactly 9 fields, one per header column"
    assert short["message"] == "g.csv:5: 4 fields but the header has 9 (missing from column 5 'pco2[kPa]')"
    assert text["field"] == "ph" and text["code"] == "input.not_a_number"
    assert results[1]["case_id"] == "A2" and results[1]["context"]["ward"] == "ICU"


def test_bad_bytes_in_csv_are_a_rejected_row_not_a_crash(tmp_path: Path, rb: Any, analytes: Any) -> None:
    p = tmp_path / "g.csv"
    p.write_bytes(b"case_id,ph\nA1,7.4\nA2,7.\x004\nA3,7.35\n")
    rows = _rows(p, analytes)
    assert len(rows) == 3
    assert interpret_row(rb, rows[1])["status"] == "rejected"


# ----------------------------------------------------------------------------- JSON Lines


def test_jsonl_lines_bad_json_and_unknown_keys(tmp_path: Path, rb: Any, analytes: Any) -> None:
    p = tmp_path / "g.jsonl"
    p.write_text(
        '{"case_id": "J1", "ph": 7.4, "pco2[kPa]": 5.33, "hco3": 24, "context": {"ward": "ED"}}\n'
        '{"case_id": "J2", "ph": 7.4,\n'
        "\n"
        "[1, 2]\n"
        '{"case_id": "J4", "paco2": 41}\n',
        encoding="utf-8",
    )
    with open_table(p, analytes) as t:
        assert t.passthrough == ["context"]
        rows = list(t)
    assert len(rows) == 4
    assert rows[0].case["pco2"] == {"value": 5.33, "unit": "kPa"}
    assert rows[0].passthrough == {"context": {"ward": "ED"}}
    results = [interpret_row(rb, r) for r in rows]
    assert [r["status"] for r in results][1:] == ["rejected"] * 3
    assert results[1]["errors"][0]["message"].startswith("g.jsonl:2: not valid JSON")
    assert results[2]["errors"][0]["message"] == "g.jsonl:4: a line must hold a JSON object, not list"
    assert results[3]["errors"][0]["field"] == "paco2" and results[3]["case_id"] == "J4"


def test_jsonl_listed_passthrough_keys_go_to_context(tmp_path: Path, rb: Any, analytes: Any) -> None:
    m = tmp_path / "m.yaml"
    m.write_text("passthrough: [ward, bed]\n", encoding="utf-8")
    p = tmp_path / "g.jsonl"
    p.write_text(
        '{"case_id": "J1", "ward": "ICU", "bed": 7, "ph": 7.4, "pco2": 40, "hco3": 24}\n', encoding="utf-8"
    )
    with open_table(p, analytes, mapping=load_mapping(m)) as t:
        assert t.passthrough == ["ward", "bed", "context"]
        [row] = list(t)
    assert row.passthrough == {"ward": "ICU", "bed": 7, "context": None}
    result = interpret_row(rb, row)
    assert result["status"] != "rejected" and result["context"] == {"ward": "ICU", "bed": 7}


# ----------------------------------------------------------------------------- Parquet


def _parquet(path: Path, records: list[dict[str, Any]], **kw: Any) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pylist(records), path, **kw)


def test_parquet_types_kept_for_passthrough_and_json_safe_in_context(
    tmp_path: Path, rb: Any, analytes: Any
) -> None:
    when = datetime(2026, 3, 2, 7, 30, tzinfo=UTC)
    p = tmp_path / "g.parquet"
    _parquet(
        p,
        [
            {"case_id": 11, "bed": 4, "taken": when, "ph": 7.40, "pco2 (kPa)": 5.33, "hco3": 24.0},
            {"case_id": 12, "bed": None, "taken": when, "ph": None, "pco2 (kPa)": None, "hco3": float("nan")},
        ],
    )
    with open_table(p, analytes) as t:
        assert t.passthrough == ["bed", "taken"]
        assert str(t.passthrough_types["taken"]).startswith("timestamp")
        rows = list(t)
    assert rows[0].passthrough == {"bed": 4, "taken": when}
    assert rows[0].case["context"] == {"bed": 4, "taken": "2026-03-02T07:30:00+00:00"}
    assert rows[0].case["case_id"] == "11" and rows[0].case["pco2"] == {"value": 5.33, "unit": "kPa"}
    assert set(rows[1].case) == {"case_id", "context"}  # null and NaN: not measured
    assert interpret_row(rb, rows[0])["status"] in ("interpreted", "partial")


def test_parquet_directory_in_path_order_and_row_groups(tmp_path: Path, analytes: Any) -> None:
    d = tmp_path / "in"
    (d / "month=03").mkdir(parents=True)
    (d / "month=04").mkdir()
    _parquet(d / "month=04" / "part-0.parquet", [{"case_id": "C", "ph": 7.4}])
    _parquet(d / "month=03" / "part-1.parquet", [{"case_id": "B", "ph": 7.4}])
    _parquet(d / "month=03" / "part-0.parquet", [{"case_id": "A", "ph": 7.4}])
    (d / "_SUCCESS").write_text("")
    _parquet(d / ".hidden.parquet", [{"case_id": "X", "ph": 7.4}])
    assert [r.case["case_id"] for r in _rows(d, analytes)] == ["A", "B", "C"]
    single = tmp_path / "one.parquet"
    _parquet(single, [{"case_id": f"R{i}", "ph": 7.4} for i in range(10)], row_group_size=3)
    picked = _rows(single, analytes, row_groups=[1, 2])
    assert [r.case["case_id"] for r in picked] == [f"R{i}" for i in range(3, 9)]
    assert picked[0].where == "one.parquet:row 4"


def test_unknown_format_and_missing_file(tmp_path: Path, analytes: Any) -> None:
    with pytest.raises(TableError, match="cannot tell the format from the suffix '.xlsx'"):
        open_table(tmp_path / "g.xlsx", analytes)
    with pytest.raises(TableError, match="no such file"):
        open_table(tmp_path / "none.csv", analytes)


# ----------------------------------------------------------------------------- writers

COLUMNS = [
    Column("ward", "raw"),
    Column("case_id"),
    Column("anion_gap", "number"),
    Column("disorders", "texts"),
    Column("errors", "records", fields=("field", "code")),
    Column("result", "json"),
]
RECORDS = [
    {
        "ward": "ICU",
        "case_id": "A",
        "anion_gap": 12.5,
        "disorders": ["x", "y"],
        "errors": [],
        "result": {"k": [1, 2]},
    },
    {
        "ward": None,
        "case_id": "B",
        "anion_gap": None,
        "disorders": [],
        "errors": [{"field": "ph", "code": "input.not_a_number"}],
        "result": None,
    },
]


@pytest.mark.parametrize("fmt", ["csv", "jsonl", "parquet"])
def test_writer_renames_into_place_at_the_end(tmp_path: Path, fmt: str) -> None:
    target = tmp_path / f"out.{fmt}"
    with open_writer(target, COLUMNS) as w:
        w.write(RECORDS[:1])
        assert not target.exists() and temp_path_for(target).exists()
        assert temp_path_for(target).name.startswith(".out.") and ".partial-" in temp_path_for(target).name
        w.write(RECORDS[1:])
    assert target.exists() and not temp_path_for(target).exists()
    back = read_back(target)
    assert [r["case_id"] for r in back] == ["A", "B"]
    if fmt == "csv":
        assert back[0]["disorders"] == "x;y" and back[1]["anion_gap"] == ""
        assert json.loads(back[1]["errors"]) == RECORDS[1]["errors"] and back[0]["errors"] == ""
    else:
        assert back[0]["disorders"] == ["x", "y"] and back[1]["errors"] == RECORDS[1]["errors"]
        assert back[0]["result"] == ({"k": [1, 2]} if fmt == "jsonl" else '{"k":[1,2]}')


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_writer_exception_leaves_no_file(tmp_path: Path, fmt: str) -> None:
    target = tmp_path / f"out.{fmt}"
    with pytest.raises(RuntimeError):
        with open_writer(target, COLUMNS) as w:
            w.write(RECORDS)
            raise RuntimeError("killed half way")
    assert list(tmp_path.iterdir()) == []


def test_writer_keeps_an_older_complete_file_until_the_new_one_is_done(tmp_path: Path) -> None:
    target = tmp_path / "out.csv"
    target.write_text("old complete file\n")
    w = open_writer(target, COLUMNS)
    w.write(RECORDS)
    assert target.read_text() == "old complete file\n"
    w.commit()
    assert read_back(target)[0]["case_id"] == "A"
