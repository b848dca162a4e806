"""HL7 v2 ORU^R01 adapter: parsing, reading blood gas OBX into a case, every error path.

Messages in tests/data/hl7 and tools/demo/hl7 are invented (demo data); their panels were made
consistent by Henderson-Hasselbalch, pH = 6.1 + log10(HCO3 / (0.0307 x PCO2)) (nccls1994),
to within 0.01. The reader checks no clinical number: it maps codes and units.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import example, given
from hypothesis import strategies as st

from gasrules.integration.hl7v2 import (
    Encoding,
    case_from_hl7,
    cases_from_hl7,
    escape,
    iter_messages,
    parse_message,
    result_to_oru,
    unescape,
)
from test_fhir import CATALOG, RESULT, _engine, shipped_catalog

DATA = Path(__file__).parent / "data" / "hl7"
DEMO = Path(__file__).parents[1] / "tools" / "demo" / "hl7"


def read_text(path: Path) -> str:
    with open(path, newline="") as f:  # keep CR: plain text mode would turn it into LF
        return f.read()


def arterial() -> list[str]:
    """The arterial test message as a list of segment lines, for tests to alter."""
    return read_text(DATA / "arterial_panel.hl7").split("\r")[:-1]


def with_segment(lines: list[str], prefix: str, new: str) -> str:
    """Replace the segment starting with prefix (e.g. 'OBX|4|') by new."""
    hits = [i for i, line in enumerate(lines) if line.startswith(prefix)]
    assert len(hits) == 1, prefix
    lines = list(lines)
    lines[hits[0]] = new
    return "\r".join(lines)


def obx(
    n: int, code: str, value: str, unit: str, status: str = "F", vtype: str = "NM", system: str = "UCUM"
) -> str:
    units = f"{unit}^{unit}^{system}" if unit else ""
    return f"OBX|{n}|{vtype}|{code}^name^LN||{value}|{units}|||||{status}|||203103140810"


def messages_of(read_issues: tuple) -> list[str]:  # type: ignore[type-arg]
    return [str(i) for i in read_issues]


# ----------------------------------------------------------------------------- good panels
def test_arterial_panel_with_electrolytes() -> None:
    read = case_from_hl7(read_text(DATA / "arterial_panel.hl7"), CATALOG)
    assert read.issues == ()
    assert read.case == {
        "case_id": "MSG00001",  # MSH-10
        "ph": {"value": 7.3, "unit": "[pH]"},
        "pco2": {"value": 31, "unit": "mm[Hg]"},
        "po2": {"value": 88, "unit": "mm[Hg]"},
        "hco3": {"value": 15.2, "unit": "mmol/L"},
        "base_excess": {"value": -10.1, "unit": "mmol/L"},
        "na": {"value": 139, "unit": "mmol/L"},
        "k": {"value": 4.1, "unit": "mmol/L"},
        "cl": {"value": 111, "unit": "mmol/L"},
        "lactate": {"value": 1.1, "unit": "mmol/L"},
        "fio2": {"value": 21, "unit": "%"},
        "temperature": {"value": 37.0, "unit": "Cel"},
        # PID-7 1961-07-01, OBR-7 2031-03-14: 69 completed years (arithmetic)
        "age": {"value": 69, "unit": "a"},
        "sample_type": "arterial",
    }
    assert read.sources["hco3"] == "OBX[4]"
    assert read.control_id == "MSG00001" and read.patient_id == "DEMO-000121"
    assert read.observed_at == "203103140810"
    ph = read.observations[0]
    assert (ph["reference_range"], ph["abnormal_flags"], ph["status"]) == ("7.35-7.45", ["L"], "F")


def test_venous_panel_with_lf_line_endings() -> None:
    read = case_from_hl7(read_text(DATA / "venous_panel_lf.hl7"), CATALOG)
    assert read.issues == ()
    assert read.case["sample_type"] == "venous"  # BldV codes, SPM-4 and OBR-4 agree


def test_kpa_panel_with_crlf_line_endings() -> None:
    read = case_from_hl7(read_text(DATA / "kpa_panel_crlf.hl7"), CATALOG)
    assert read.issues == ()
    assert read.case["pco2"] == {"value": 6.8, "unit": "kPa"}  # the engine converts
    assert read.case["po2"] == {"value": 9.2, "unit": "kPa"}


def test_mllp_framed_stream_gives_one_result_per_message() -> None:
    reads = list(cases_from_hl7(read_text(DATA / "stream_mllp.hl7"), CATALOG))
    assert [r.case["case_id"] for r in reads] == ["MSG00011", "MSG00012", "MSG00013"]
    assert all(r.ok for r in reads)


def test_a_bad_message_in_a_stream_does_not_lose_the_others() -> None:
    good = read_text(DATA / "arterial_panel.hl7")
    stream = "garbage line\r" + good + good.replace("MSG00001", "MSG00002").replace("ORU^R01", "ADT^A01")
    reads = list(cases_from_hl7(stream, CATALOG))
    assert [[i.code for i in r.issues] for r in reads] == [["hl7.no_msh"], [], ["hl7.message_type"]]
    assert reads[1].case["case_id"] == "MSG00001"


@pytest.mark.parametrize("path", sorted(DEMO.glob("*.hl7")), ids=lambda p: p.name)
def test_demo_messages_read_cleanly(path: Path) -> None:
    reads = list(cases_from_hl7(read_text(path), CATALOG))
    assert reads
    for read in reads:
        assert read.ok and read.issues == (), messages_of(read.issues)
        assert {"ph", "pco2", "hco3", "sample_type", "age"} <= set(read.case)


# ----------------------------------------------------------------------------- parsing
def test_separators_come_from_msh() -> None:
    text = "\r".join(arterial()).replace("|", "#").replace("^", "$")
    read = case_from_hl7(text, CATALOG)
    assert read.issues == ()
    assert read.case["pco2"] == {"value": 31, "unit": "mm[Hg]"}


def test_escape_sequences_are_undone() -> None:
    enc = Encoding()
    assert unescape(r"a\F\b\S\c\T\d\R\e\E\f", enc) == "a|b^c&d~e\\f"
    assert unescape(r"line\.br\next \X41\ \H\bold\N\ ", enc) == "line\nnext A bold "
    assert unescape(r"left \Z99\ and \unclosed", enc) == r"left \Z99\ and \unclosed"


def test_escaped_separator_inside_a_field_does_not_split_it() -> None:
    msg, issues = parse_message("MSH|^~\\&|A\\F\\B|X\rPID|1||ID\\S\\1^^^X^MR~OTHER")
    assert issues == [] and msg is not None
    msh, pid = msg.segments
    assert msg.get(msh, 3) == "A|B"
    assert msg.get(pid, 3) == "ID^1" and msg.get(pid, 3, 4) == "X"
    assert msg.get(pid, 3, rep=2) == "OTHER"


def test_iter_messages_drops_batch_envelopes_and_blank_lines() -> None:
    text = "FHS|^~\\&\n\nBHS|^~\\&\nMSH|^~\\&|A\nPID|1\n\nMSH|^~\\&|B\nBTS|2\nFTS|1\n"
    assert list(iter_messages(text)) == ["MSH|^~\\&|A\rPID|1", "MSH|^~\\&|B"]


# ----------------------------------------------------------------------------- error paths
@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("", "message: no HL7 segment found"),
        ("PID|1||X\rOBX|1", "line 1: the message starts with 'PID'; expected an MSH segment"),
        (
            "MSH|^~",
            "MSH[1]-2: separators '|^~' are malformed; expected five distinct characters such as |^~\\&",
        ),
        ("MSH|^~\\&|A|B|C|D|2031||ADT^A01|X|P|2.5.1", "MSH[1]-9: message type is ADT^A01; expected ORU^R01"),
    ],
)
def test_broken_messages_say_what_is_wrong(text: str, expected: str) -> None:
    read = case_from_hl7(text, CATALOG)
    assert read.case == {} and messages_of(read.issues) == [expected]


def test_line_that_is_not_a_segment() -> None:
    lines = arterial()
    lines.insert(5, "obx 1 NM 2744-1")
    read = case_from_hl7("\r".join(lines), CATALOG)
    assert messages_of(read.issues) == [
        "line 6: 'obx 1 NM 2744-1' is not a segment; expected a three-character name then '|'"
    ]
    assert read.case["ph"] == {"value": 7.3, "unit": "[pH]"}


def test_unit_that_does_not_fit_names_segment_and_field() -> None:
    text = with_segment(arterial(), "OBX|2|", obx(2, "2019-8", "31", "mmHgx"))
    read = case_from_hl7(text, CATALOG)
    assert "pco2" not in read.case
    assert messages_of(read.issues) == [
        "OBX[2]-6: unit 'mmHgx' is not accepted for pco2; accepted: mm[Hg], kPa"
    ]


def test_local_unit_text_is_read_when_it_is_a_known_spelling() -> None:
    text = with_segment(arterial(), "OBX|2|", obx(2, "2019-8", "31", "mmHg", system="L"))
    read = case_from_hl7(text, CATALOG)
    assert read.case["pco2"] == {"value": 31, "unit": "mm[Hg]"}
    assert [(i.path, i.code, i.severity) for i in read.issues] == [("OBX[2]-6", "unit.alias", "notice")]


def test_missing_unit_is_an_error() -> None:
    text = with_segment(arterial(), "OBX|10|", obx(10, "3150-0", "21", ""))
    read = case_from_hl7(text, CATALOG)
    assert "fio2" not in read.case
    assert messages_of(read.issues) == ["OBX[10]-6: no unit for fio2; accepted: 1, %"]


@pytest.mark.parametrize(
    ("value", "vtype", "expected"),
    [
        (
            "7,31",
            "NM",
            "OBX[1]-5: ph: '7,31' is not a number (expected digits with a '.' decimal point, e.g. 7.31)",
        ),
        (
            "<6.8",
            "NM",
            "OBX[1]-5: ph is reported as '<6.8', not an exact value; left out "
            "(use value type SN for comparators)",
        ),
        ("<^6.8", "SN", "OBX[1]-5: ph is reported as <6.8, not an exact value; left out"),
        ("^7^-^8", "SN", "OBX[1]-5: ph is sent as a range or ratio; expected one number"),
        ("7.30~7.31", "NM", "OBX[1]-5: ph has 2 repetitions; one value is expected"),
        ("7.30", "TX", "OBX[1]-2: value type 'TX' for ph; expected NM or SN (or ST holding a number)"),
        (
            "seven",
            "ST",
            "OBX[1]-5: ph: 'seven' sent as ST is not a number (expected digits with a "
            "'.' decimal point, e.g. 7.31)",
        ),
    ],
)
def test_values_that_cannot_be_used(value: str, vtype: str, expected: str) -> None:
    text = with_segment(arterial(), "OBX|1|", obx(1, "2744-1", value, "[pH]", vtype=vtype))
    read = case_from_hl7(text, CATALOG)
    assert "ph" not in read.case
    assert messages_of(read.issues) == [expected]


def test_structured_numeric_without_comparator_is_a_value() -> None:
    text = with_segment(arterial(), "OBX|1|", obx(1, "2744-1", "=^7.30", "[pH]", vtype="SN"))
    read = case_from_hl7(text, CATALOG)
    assert read.issues == () and read.case["ph"] == {"value": 7.3, "unit": "[pH]"}


def test_empty_value_is_reported_as_missing() -> None:
    text = with_segment(arterial(), "OBX|9|", obx(9, "2518-9", "", "mmol/L"))
    read = case_from_hl7(text, CATALOG)
    assert "lactate" not in read.case
    assert [(i.path, i.code, i.severity) for i in read.issues] == [("OBX[9]-5", "value.missing", "warning")]


def test_unknown_and_non_loinc_codes_are_ignored_with_a_warning() -> None:
    lines = arterial()
    lines.append("OBX|12|NM|8867-4^Heart rate^LN||88|/min^/min^UCUM|||||F")
    lines.append("OBX|13|NM|HR^Heart rate^L||88|/min^/min^UCUM|||||F")
    read = case_from_hl7("\r".join(lines), CATALOG)
    assert [(i.path, i.code, i.severity) for i in read.issues] == [
        ("OBX[12]-3", "code.unknown", "warning"),
        ("OBX[13]-3", "code.not_loinc", "warning"),
    ]
    assert read.ok


def test_loinc_in_the_alternate_identifier_is_used() -> None:
    text = with_segment(arterial(), "OBX|1|", "OBX|1|NM|PHA^pH art^L^2744-1^pH^LN||7.30|[pH]^^UCUM|||||F")
    read = case_from_hl7(text, CATALOG)
    assert read.issues == () and read.case["ph"] == {"value": 7.3, "unit": "[pH]"}


@pytest.mark.parametrize(
    ("status", "code", "severity", "message"),
    [
        ("D", "status.skipped", "notice", "hco3 is entered-in-error (D) and was skipped"),
        ("W", "status.skipped", "notice", "hco3 is entered-in-error (W) and was skipped"),
        ("X", "status.skipped", "notice", "hco3 is cancelled (X) and was skipped"),
        (
            "P",
            "status.not_final",
            "warning",
            "hco3 is preliminary (P) and was left out; final, amended or corrected results are used "
            "(allow preliminary results to include it)",
        ),
        (
            "Q",
            "status.missing",
            "error",
            "hco3: unknown result status 'Q'; accepted: F, C, U, A, P, R, S, D, W, X, I, O, N "
            "(HL7 table 0085)",
        ),
        (
            "",
            "status.missing",
            "error",
            "hco3: status 'missing' does not say the result is released; accepted: final, amended, corrected",
        ),
    ],
)
def test_result_status(status: str, code: str, severity: str, message: str) -> None:
    text = with_segment(arterial(), "OBX|4|", obx(4, "1960-4", "15.2", "mmol/L", status))
    read = case_from_hl7(text, CATALOG)
    assert "hco3" not in read.case
    assert [(i.path, i.code, i.severity, i.message) for i in read.issues] == [
        ("OBX[4]-11", code, severity, message)
    ]


def test_preliminary_used_when_allowed_and_corrected_used_silently() -> None:
    text = with_segment(arterial(), "OBX|4|", obx(4, "1960-4", "15.2", "mmol/L", "P"))
    read = case_from_hl7(text, CATALOG, allow_preliminary=True)
    assert read.case["hco3"] == {"value": 15.2, "unit": "mmol/L"}
    assert [i.code for i in read.issues] == ["status.preliminary_used"]
    text = with_segment(arterial(), "OBX|4|", obx(4, "1960-4", "15.2", "mmol/L", "C"))
    assert case_from_hl7(text, CATALOG).issues == ()


def test_conflicting_duplicate_is_left_out() -> None:
    lines = arterial()
    lines.append(obx(12, "2951-2", "134", "mmol/L"))  # serum sodium, another value
    read = case_from_hl7("\r".join(lines), CATALOG)
    assert "na" not in read.case
    assert messages_of(read.issues) == [
        "OBX[6]: na reported 2 times with different values (139 mmol/L; 134 mmol/L) at "
        "OBX[6], OBX[12]; left out"
    ]


def test_venous_spm_with_arterial_codes_is_a_specimen_conflict() -> None:
    lines = arterial()
    spm = next(line for line in lines if line.startswith("SPM"))
    text = with_segment(lines, "SPM|", spm.replace("122552005^Arterial", "122555007^Venous"))
    read = case_from_hl7(text, CATALOG)
    assert "sample_type" not in read.case
    [issue] = read.issues
    assert issue.code == "specimen.conflict" and "SPM[1]-4 says venous (specimen)" in issue.message


def test_obr15_specimen_before_v25_and_unspecified_blood_codes() -> None:
    text = "\r".join(
        [
            "MSH|^~\\&|OLDLAB|X|GASRULES|Y|20310314||ORU^R01|OLD1|P|2.3",
            "PID|1||P9^^^X^MR||Name^Given||19700101",
            "OBR|1|||GAS^Blood gas^L|||20310314||||||||BLDC&Capillary blood&HL70070",
            obx(1, "11558-4", "7.38", "[pH]"),
            obx(2, "11557-6", "41", "mm[Hg]"),
        ]
    )
    read = case_from_hl7(text, CATALOG)
    assert read.issues == ()
    assert read.case["sample_type"] == "capillary"
    assert read.case["age"] == {"value": 61, "unit": "a"}  # 1970-01-01 to 2031-03-14


def test_unknown_specimen_type_is_a_warning() -> None:
    lines = arterial()
    spm = next(line for line in lines if line.startswith("SPM"))
    text = with_segment(
        lines, "SPM|", spm.replace("122552005^Arterial blood specimen^SCT", "119364003^Serum specimen^SCT")
    )
    read = case_from_hl7(text, CATALOG)
    assert [(i.path, i.code) for i in read.issues] == [("SPM[1]-4", "specimen.unknown")]
    assert read.case["sample_type"] == "arterial"  # the BldA codes still say it


def test_bad_birth_date_is_reported_and_age_left_out() -> None:
    lines = arterial()
    pid = next(line for line in lines if line.startswith("PID"))
    read = case_from_hl7(with_segment(lines, "PID|", pid.replace("19610701", "1961-07-01")), CATALOG)
    assert "age" not in read.case
    assert [(i.path, i.code) for i in read.issues] == [("PID[1]-7", "hl7.bad_date")]
    read = case_from_hl7(with_segment(lines, "PID|", pid.replace("19610701", "1961")), CATALOG)
    assert [(i.path, i.code) for i in read.issues] == [("PID[1]-7", "age.not_computed")]


def test_message_without_obx() -> None:
    lines = [line for line in arterial() if not line.startswith("OBX")]
    read = case_from_hl7("\r".join(lines), CATALOG)
    assert [i.code for i in read.issues] == ["value.missing"]
    assert not read.ok


# ----------------------------------------------------------------------------- writing
def test_interpretation_as_oru_round_trips_through_the_reader() -> None:
    result = {**RESULT, "headline": "Acidosis | with ^ odd ~ characters & a \\ slash"}
    text = result_to_oru(result, control_id="OUT-1", message_time="203103140825", patient_id="DEMO-000121")
    msg, issues = parse_message(text)
    assert issues == [] and msg is not None
    assert [s.name for s in msg.segments] == (["MSH", "PID", "OBR"] + ["OBX"] * 7 + ["NTE"] * 3)
    first = msg.all("OBX")[0]
    assert msg.get(first, 5) == result["headline"]
    assert {msg.get(s, 11) for s in msg.all("OBX")} == {"P"}  # preliminary
    disorder = msg.all("OBX")[1]
    assert msg.get(disorder, 5) == "metabolic_acidosis_high_anion_gap"
    acid = msg.all("OBX")[2]
    assert (msg.get(acid, 3), msg.get(acid, 8)) == ("acidaemia", "A")
    gap = msg.all("OBX")[5]
    assert (msg.get(gap, 3), msg.get(gap, 3, 3), msg.get(gap, 3, 4), msg.get(gap, 5), msg.get(gap, 6)) == (
        "33037-3",
        "LN",
        "anion_gap",
        "12.8",
        "mmol/L",
    )  # docs/codes.md
    notes = [msg.get(s, 3) for s in msg.all("NTE")]
    assert notes[0].startswith("Rulebook adult-default 1.0.0 sha256:abab")
    assert notes[-1] == "Supports, never replaces, clinical judgement."
    read = case_from_hl7(text, CATALOG)  # our own output feeds no input: all ignored
    assert read.case == {"case_id": "OUT-1"}
    assert {i.code for i in read.issues} == {"code.not_loinc", "code.unknown"}  # 33037-3


def test_oru_needs_an_hl7_timestamp() -> None:
    with pytest.raises(ValueError, match="expected YYYYMMDD"):
        result_to_oru(RESULT, control_id="X", message_time="2031-03-14")


@given(st.text(alphabet=st.characters(blacklist_characters="\r\x00"), max_size=60))
@example("|^~\\&")  # every separator and the escape character itself
@example("\\F\\ is literal")  # text that looks like an escape sequence
def test_escape_then_unescape_gives_the_text_back(text: str) -> None:
    assert unescape(escape(text), Encoding()) == text


# ----------------------------------------------------------------------------- shipped rulebook
@pytest.mark.parametrize(
    "path",
    sorted(DATA.glob("*.hl7")) + sorted(DEMO.glob("*.hl7")),
    ids=lambda p: f"{p.parent.parent.name}/{p.name}",
)
def test_every_message_reads_cleanly_with_the_shipped_rulebook_inputs(path: Path) -> None:
    reads = list(cases_from_hl7(read_text(path), shipped_catalog()))
    assert reads
    for read in reads:
        assert read.issues == (), messages_of(read.issues)
        assert {"ph", "pco2", "hco3", "sample_type", "age"} <= set(read.case)


@pytest.mark.parametrize("name", ["arterial_panel.hl7", "venous_panel_lf.hl7", "kpa_panel_crlf.hl7"])
def test_shipped_rulebook_reads_interprets_and_writes_back(name: str) -> None:
    gasrules = _engine()
    rulebook = gasrules.load_rulebook()
    read = case_from_hl7(read_text(DATA / name), rulebook.inputs)
    assert read.issues == (), messages_of(read.issues)
    result = gasrules.interpret(rulebook, read.case)
    assert result["errors"] == [] and result["status"] != "rejected"
    text = result_to_oru(
        result, control_id=f"R-{read.control_id}", message_time="203103140825", patient_id=read.patient_id
    )
    msg, issues = parse_message(text)
    assert issues == [] and msg is not None
    assert msg.get(msg.all("OBX")[0], 5) == result["headline"]


def test_a_number_sent_as_st_is_read_with_a_notice() -> None:
    text = with_segment(arterial(), "OBX|1|", obx(1, "2744-1", "7.30", "[pH]", vtype="ST"))
    read = case_from_hl7(text, CATALOG)
    assert read.case["ph"] == {"value": 7.30, "unit": "[pH]"} or read.case["ph"] == 7.30
    assert [(i.path, i.code, i.severity) for i in read.issues] == [("OBX[1]-2", "hl7.numeric_st", "notice")]
