"""Write invented demo data from the seeded case generator (engine/gasrules/verification/casegen.py).

    python tools/make_demo_data.py corpus --n 100000 --seed 7 --format csv --out /tmp/corpus.csv
    python tools/make_demo_data.py corpus --n 1000 --format jsonl --out -        # to stdout
    python tools/make_demo_data.py demo --out tools/demo     # the shipped quick-start files
    python tools/make_demo_data.py messages                   # the same cases as FHIR and HL7 v2

Everything written here is invented: no real patient, record number or hospital. The corpus is
streamed (memory stays flat at any --n) and about 0.1 % of its rows are deliberately malformed
(see casegen.MALFORMED_KINDS); a consumer must report those rows, never drop them.

CSV layout: ``case_id, ward, collected_at, record_number`` then one column per analyte in
CSV_ANALYTES. Every number is in the canonical unit, so the headers carry no unit suffix; an
empty cell means "not measured". Malformed rows in CSV:

    unknown_key    the row has one extra trailing field ("paco2=41.2"), longer than the header
    text_value     text in a numeric cell ("7.3O", "pending")
    bad_unit       a number with a unit that does not fit the column ("41.2 mg/dL")
    out_of_range   a decimal slip far outside any plausible range (pH 73.4)
    missing_value  the row stops just before that field's column: it and all later cells are missing

Subcommands live in the SUBCOMMANDS table: a new output form (FHIR bundles, HL7 v2 messages)
is one ``Subcommand(help, add_arguments, run)`` row plus its two functions.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "engine"))

from gasrules.verification.casegen import (
    HAGMA,
    MALK,
    NAGMA,
    Scenario,
    generate_corpus,
    generate_labelled,
    to_canonical,
)

CONTEXT_COLUMNS = ("case_id", "ward", "collected_at", "record_number")
CSV_ANALYTES: tuple[str, ...] = (
    "sample_type",
    "chronicity",
    "age",
    "pregnant",
    "ph",
    "pco2",
    "po2",
    "hco3",
    "tco2",
    "base_excess",
    "so2",
    "hb",
    "na",
    "k",
    "cl",
    "albumin",
    "lactate",
    "glucose",
    "urea",
    "creatinine",
    "osmolality",
    "ethanol",
    "phosphate",
    "ionized_calcium",
    "magnesium",
    "fio2",
    "peep",
    "etco2",
    "minute_ventilation",
    "predicted_body_weight",
    "barometric_pressure",
    "temperature",
    "urine_na",
    "urine_k",
    "urine_cl",
)
CSV_HEADER = CONTEXT_COLUMNS + CSV_ANALYTES
# Decimals for values converted to the canonical unit (analyser precision).
_DECIMALS = {"pco2": 1, "po2": 1, "etco2": 1, "albumin": 0, "fio2": 2, "so2": 2, "glucose": 1}

DEMO_SEED = 2026


# ----------------------------------------------------------------------------- CSV rows
def _cell(name: str, value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        number = round(to_canonical(name, value), _DECIMALS.get(name, 2))
        return str(int(number)) if _DECIMALS.get(name) == 0 else str(number)
    return str(value)


def csv_row(case: dict[str, Any]) -> list[str]:
    """A valid generated case as a CSV row in canonical units."""
    ctx = case["context"]
    return [case["case_id"], ctx["ward"], ctx["collected_at"], ctx["record_number"]] + [
        _cell(name, case.get(name)) for name in CSV_ANALYTES
    ]


def malformed_csv_row(kind: str, key: str, case: dict[str, Any]) -> list[str]:
    """A malformed case as a CSV row broken in the declared way (see module docstring)."""
    clean = {k: v for k, v in case.items() if k != key}
    row = csv_row(clean)
    bad = case[key]
    if kind == "unknown_key":
        return row + [f"{key}={bad}"]
    col = CSV_HEADER.index(key)
    if kind == "missing_value":
        return row[:col]
    if kind == "bad_unit":
        row[col] = f"{bad['value']} {bad['unit']}"
    else:  # text_value, out_of_range
        row[col] = str(bad)
    return row


# ----------------------------------------------------------------------------- corpus
@contextmanager
def _open_out(out: str) -> Iterator[TextIO]:
    if out == "-":
        yield sys.stdout
        return
    path = Path(out)
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", encoding="utf-8", newline="") as f:
        yield f


def write_corpus(
    out: TextIO, n: int, seed: int, fmt: str, mix: str, malformed_share: float
) -> tuple[int, int]:
    """Stream ``n`` rows to ``out``; return (rows written, malformed rows)."""
    written = malformed = 0
    rows = generate_corpus(n, seed, mix=mix, malformed_share=malformed_share)
    if fmt == "csv":
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(CSV_HEADER)
        for kind, key, case in rows:
            if kind is None:
                writer.writerow(csv_row(case))
            else:
                assert key is not None
                writer.writerow(malformed_csv_row(kind, key, case))
                malformed += 1
            written += 1
    else:
        dumps = json.JSONEncoder(separators=(",", ":"), ensure_ascii=False).encode
        for kind, _, case in rows:
            out.write(dumps(case))
            out.write("\n")
            malformed += kind is not None
            written += 1
    return written, malformed


def _corpus_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--n", type=int, default=100_000, help="number of rows (default 100000)")
    p.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    p.add_argument(
        "--format",
        choices=("csv", "jsonl"),
        default=None,
        help="csv or jsonl (default: from the --out suffix, .csv -> csv, else jsonl)",
    )
    p.add_argument("--mix", choices=("hospital", "icu", "ed", "ward"), default="hospital")
    p.add_argument(
        "--malformed-share",
        type=float,
        default=0.001,
        help="share of deliberately malformed rows (default 0.001)",
    )
    p.add_argument("--out", required=True, help="output file, or - for stdout")


def _corpus_run(args: argparse.Namespace) -> int:
    if args.n < 0:
        print(f"--n must be 0 or more, got {args.n}", file=sys.stderr)
        return 2
    if not 0.0 <= args.malformed_share <= 1.0:
        print(f"--malformed-share must be between 0 and 1, got {args.malformed_share}", file=sys.stderr)
        return 2
    if args.format is None:  # the file name says the format: never JSON Lines in a .csv
        args.format = "csv" if str(args.out).lower().endswith(".csv") else "jsonl"
    t0 = time.perf_counter()
    with _open_out(args.out) as f:
        written, malformed = write_corpus(f, args.n, args.seed, args.format, args.mix, args.malformed_share)
    dt = time.perf_counter() - t0
    print(
        f"wrote {written} invented cases ({malformed} deliberately malformed) to {args.out} in {dt:.1f} s",
        file=sys.stderr,
    )
    return 0


# ----------------------------------------------------------------------------- demo files
_Want = tuple[str, Callable[[Scenario, dict[str, Any]], bool]]


def _clean(s: Scenario) -> bool:
    return s.inconsistent is None and s.out_of_scope is None


def _plain(s: Scenario) -> bool:
    """Clean, arterial, mmHg, not ventilated: so each wanted picture shows one thing."""
    return _clean(s) and s.sample_type == "arterial" and not s.kpa and not s.ventilated


DEMO_WANTS: tuple[_Want, ...] = (
    ("normal values", lambda s, c: _plain(s) and s.combination == "none" and s.albumin),
    (
        "high-gap acidosis with respiratory compensation",
        lambda s, c: _plain(s) and s.combination == f"none+{HAGMA}" and s.albumin and "lactate" in c,
    ),
    (
        "acute respiratory acidosis",
        lambda s, c: _plain(s) and s.electrolytes and s.combination == "respiratory_acidosis/acute",
    ),
    (
        "chronic respiratory acidosis in kPa",
        lambda s, c: (
            _clean(s)
            and s.kpa
            and s.sample_type == "arterial"
            and s.combination == "respiratory_acidosis/chronic"
            and c.get("chronicity") == "chronic"
        ),
    ),
    (
        "acute respiratory alkalosis",
        lambda s, c: _plain(s) and s.combination == "respiratory_alkalosis/acute",
    ),
    (
        "mixed: high-gap acidosis with respiratory acidosis",
        lambda s, c: _plain(s) and s.albumin and s.combination == f"respiratory_acidosis/acute+{HAGMA}",
    ),
    (
        "triple: high-gap acidosis, metabolic alkalosis, respiratory alkalosis",
        lambda s, c: (
            _plain(s)
            and s.albumin
            and s.respiratory == "respiratory_alkalosis"
            and s.metabolic == (HAGMA, MALK)
        ),
    ),
    ("normal-gap acidosis", lambda s, c: _plain(s) and s.albumin and s.combination == f"none+{NAGMA}"),
    ("metabolic alkalosis", lambda s, c: _plain(s) and s.combination == f"none+{MALK}" and "urine_cl" in c),
    ("venous sample", lambda s, c: _clean(s) and s.sample_type == "venous" and s.electrolytes),
    (
        "high-gap acidosis, albumin missing",
        lambda s, c: _plain(s) and s.electrolytes and not s.albumin and s.combination == f"none+{HAGMA}",
    ),
    (
        "ventilated ICU patient",
        lambda s, c: _clean(s) and s.ventilated and s.electrolytes and s.sample_type == "arterial",
    ),
    (
        "inconsistent values (transcription-like error)",
        lambda s, c: s.inconsistent is not None and s.out_of_scope is None,
    ),
)


def demo_cases(seed: int = DEMO_SEED, limit: int = 200_000) -> list[tuple[str, dict[str, Any]]]:
    """The first generated case matching each DEMO_WANTS entry, renumbered D000001.. in order."""
    found: dict[int, dict[str, Any]] = {}
    for scenario, case in generate_labelled(limit, seed):
        for i, (_, want) in enumerate(DEMO_WANTS):
            if i not in found and want(scenario, case):
                found[i] = case
                break
        if len(found) == len(DEMO_WANTS):
            break
    missing = [DEMO_WANTS[i][0] for i in range(len(DEMO_WANTS)) if i not in found]
    if missing:
        raise RuntimeError(f"seed {seed}: no case found for {missing} in {limit} draws")
    picked = []
    for i, (label, _) in enumerate(DEMO_WANTS):
        case = found[i]
        case["case_id"] = f"D{i + 1:06d}"
        picked.append((label, case))
    return picked


def _demo_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--seed", type=int, default=DEMO_SEED, help=f"default {DEMO_SEED}")
    p.add_argument(
        "--out",
        default=str(Path(__file__).resolve().parent / "demo"),
        help="directory for cases.jsonl and case.json (default tools/demo)",
    )


def _demo_run(args: argparse.Namespace) -> int:
    picked = demo_cases(args.seed)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    with (out / "cases.jsonl").open("w", encoding="utf-8", newline="\n") as f:
        for _, case in picked:
            f.write(json.dumps(case, ensure_ascii=False) + "\n")
    (out / "case.json").write_text(
        json.dumps(picked[1][1], indent=2, ensure_ascii=False) + "\n", encoding="utf-8"
    )
    for label, case in picked:
        print(f"{case['case_id']}  {label}", file=sys.stderr)
    print(
        f"wrote {out / 'cases.jsonl'} ({len(picked)} invented cases) and {out / 'case.json'}", file=sys.stderr
    )
    return 0


# ----------------------------------------------------------------------------- FHIR and HL7 v2
# The demo cases above written as the messages a hospital system sends: a FHIR R4 Bundle of
# Observations and an HL7 v2.5.1 ORU^R01. Codes come from the shipped rulebook's input catalogue
# (InputSpec.loinc) and the adapters' specimen tables (gasrules.integration.standard_codes); every file is read back
# through gasrules.integration.fhir / gasrules.integration.hl7v2 before it is written and must give the same inputs.
# Inputs without a LOINC code in the catalogue (chronicity, pregnant, ventilator settings) have
# no place in these messages and are left out (listed in generated/README.txt).
UCUM = "http://unitsofmeasure.org"
_SPECIMEN_SNOMED = {
    "arterial": ("122552005", "Arterial blood specimen"),
    "venous": ("122555007", "Venous blood specimen"),
    "capillary": ("122554006", "Capillary blood specimen"),
}
_UNSPECIFIED_SPECIMEN = ("119297000", "Blood specimen")


def _catalog() -> Any:
    import gasrules

    return gasrules.load_rulebook().inputs


def _loinc_for(name: str, spec: Any, sample: str | None) -> str | None:
    from gasrules.integration.standard_codes import SAMPLE_DEFINING_INPUTS, SPECIMEN_BY_LOINC

    codes = list(spec.loinc)
    if not codes:
        return None
    if name in SAMPLE_DEFINING_INPUTS:
        fitting = [c for c in codes if SPECIMEN_BY_LOINC.get(c) == sample]
        neutral = [c for c in codes if c not in SPECIMEN_BY_LOINC]
        return (fitting or neutral or [None])[0]
    return codes[0]


def message_items(
    case: dict[str, Any], catalog: Any
) -> tuple[list[tuple[str, str, str, Any, str]], list[str]]:
    """[(input, loinc, label, value, UCUM unit)] for the inputs a message can carry, and the
    names of those it cannot."""
    sample = case.get("sample_type")
    items, left_out = [], []
    for name, raw in case.items():
        if name in ("case_id", "context", "sample_type") or raw is None:
            continue
        spec = catalog[name]
        code = _loinc_for(name, spec, sample)
        if code is None or spec.kind != "number":
            left_out.append(name)
            continue
        value, unit = (raw["value"], raw["unit"]) if isinstance(raw, dict) else (raw, spec.unit)
        items.append((name, code, spec.label, value, unit))
    return items, left_out


def _uuid(case_id: str, n: int) -> str:
    import uuid

    return "urn:uuid:" + str(uuid.uuid5(uuid.UUID("0d3c6a52-59b8-5f0e-8c1e-64656d6f6461"), f"{case_id}/{n}"))


def fhir_bundle(case: dict[str, Any], catalog: Any) -> dict[str, Any]:
    """A FHIR R4 Bundle (collection): Patient, Specimen, a gas panel Observation with hasMember
    and one Observation per value (LOINC code, UCUM valueQuantity)."""
    from gasrules.integration.standard_codes import PANEL_SPECIMEN

    cid, ctx = case["case_id"], case["context"]
    items, _ = message_items(case, catalog)
    sample = case.get("sample_type")
    when = ctx["collected_at"].replace("Z", "+00:00")
    patient, specimen = _uuid(cid, 0), _uuid(cid, 1)
    snomed, text = _SPECIMEN_SNOMED.get(sample or "", _UNSPECIFIED_SPECIMEN)
    panel = next((c for c, s in PANEL_SPECIMEN.items() if s == sample), "24338-6")
    entries = [
        {
            "fullUrl": patient,
            "resource": {
                "resourceType": "Patient",
                "id": f"pt-{cid}",
                "identifier": [{"system": "urn:example:demo-record", "value": ctx["record_number"]}],
            },
        },
        {
            "fullUrl": specimen,
            "resource": {
                "resourceType": "Specimen",
                "id": f"spec-{cid}",
                "type": {"coding": [{"system": "http://snomed.info/sct", "code": snomed, "display": text}]},
            },
        },
    ]
    members = []
    for n, (name, code, label, value, unit) in enumerate(items, start=3):
        url = _uuid(cid, n)
        members.append({"reference": url})
        entries.append(
            {
                "fullUrl": url,
                "resource": {
                    "resourceType": "Observation",
                    "id": f"{cid}-{name.replace('_', '-')}",
                    "status": "final",
                    "code": {"coding": [{"system": "http://loinc.org", "code": code, "display": label}]},
                    "subject": {"reference": patient},
                    "effectiveDateTime": when,
                    "specimen": {"reference": specimen},
                    "valueQuantity": {"value": value, "unit": unit, "system": UCUM, "code": unit},
                },
            }
        )
    entries.insert(
        2,
        {
            "fullUrl": _uuid(cid, 2),
            "resource": {
                "resourceType": "Observation",
                "id": f"{cid}-panel",
                "status": "final",
                "code": {"coding": [{"system": "http://loinc.org", "code": panel, "display": "Gas panel"}]},
                "subject": {"reference": patient},
                "effectiveDateTime": when,
                "specimen": {"reference": specimen},
                "hasMember": members,
            },
        },
    )
    return {"resourceType": "Bundle", "id": f"demo-{cid}", "type": "collection", "entry": entries}


def oru_message(case: dict[str, Any], catalog: Any) -> str:
    """An HL7 v2.5.1 ORU^R01 (segments separated by CR): MSH, PID, OBR, SPM and one OBX per value."""
    from gasrules.integration.hl7v2 import escape
    from gasrules.integration.standard_codes import PANEL_SPECIMEN

    cid, ctx = case["case_id"], case["context"]
    items, _ = message_items(case, catalog)
    sample = case.get("sample_type")
    stamp = ctx["collected_at"].replace("-", "").replace(":", "").replace("T", "").rstrip("Z")
    minute = stamp[:12]
    snomed, text = _SPECIMEN_SNOMED.get(sample or "", _UNSPECIFIED_SPECIMEN)
    panel = next((c for c, s in PANEL_SPECIMEN.items() if s == sample), "24338-6")
    segments = [
        f"MSH|^~\\&|DEMO_ANALYZER|DEMO_LAB|GASRULES|DEMO_HOSP|{stamp}||ORU^R01^ORU_R01|{cid}|P|2.5.1",
        f"PID|1||{ctx['record_number']}^^^DEMO^MR||Demo^Case||||U",
        f"OBR|1|ORD-{cid}|FIL-{cid}|{panel}^Gas panel^LN|||{minute}|||||||||||||||{stamp}||LAB|F",
        f"SPM|1|SPEC-{cid}||{snomed}^{text}^SCT|||||||||||||{minute}",
    ]
    for n, (_name, code, label, value, unit) in enumerate(items, start=1):
        segments.append(f"OBX|{n}|NM|{code}^{escape(label)}^LN||{value}|{unit}^{unit}^UCUM|||||F|||{minute}")
    return "\r".join(segments) + "\r"


def _same_inputs(rb: Any, want: dict[str, Any], got: dict[str, Any], where: str) -> None:
    from gasrules.evaluation.evaluator import read_case

    a, errors_a, _, _ = read_case(rb, want)
    b, errors_b, _, _ = read_case(rb, got)
    if errors_a or errors_b or a != b:
        diff = {k: (a.get(k), b.get(k)) for k in set(a) | set(b) if a.get(k) != b.get(k)}
        raise RuntimeError(f"{where}: read back differently: {diff or errors_a or errors_b}")


def _expressible(case: dict[str, Any], catalog: Any) -> dict[str, Any]:
    items, _ = message_items(case, catalog)
    out = {name: {"value": v, "unit": u} for name, _, _, v, u in items}
    if case.get("sample_type") in _SPECIMEN_SNOMED or case.get("sample_type") == "mixed_venous":
        out["sample_type"] = case["sample_type"]
    return out


def _fhir_model_check(bundle: dict[str, Any], cid: str) -> None:
    """Validate with the general-purpose FHIR models when installed (the test extra has them)."""
    try:
        from fhir.resources.bundle import Bundle
    except ImportError:
        return
    try:
        Bundle.model_validate(bundle)
    except ValueError as exc:
        raise RuntimeError(f"{cid} FHIR: not a valid Bundle: {exc}") from None


def _messages_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--seed", type=int, default=DEMO_SEED, help=f"default {DEMO_SEED}")
    p.add_argument(
        "--out",
        default=str(Path(__file__).resolve().parent / "demo" / "generated"),
        help="directory for fhir/*.json and hl7/*.hl7 (default tools/demo/generated)",
    )


def _messages_run(args: argparse.Namespace) -> int:
    import gasrules
    from gasrules.integration.fhir import case_from_fhir
    from gasrules.integration.hl7v2 import case_from_hl7

    rb = gasrules.load_rulebook()
    catalog = rb.inputs
    out = Path(args.out)
    (out / "fhir").mkdir(parents=True, exist_ok=True)
    (out / "hl7").mkdir(parents=True, exist_ok=True)
    stream, notes = [], []
    for label, case in demo_cases(args.seed):
        cid = case["case_id"]
        bundle, message = fhir_bundle(case, catalog), oru_message(case, catalog)
        want = _expressible(case, catalog)
        for kind, read in (
            ("FHIR", case_from_fhir(bundle, catalog)),
            ("HL7", case_from_hl7(message, catalog)),
        ):
            if read.issues:
                raise RuntimeError(f"{cid} {kind}: the adapter reports {[str(i) for i in read.issues]}")
            _same_inputs(rb, want, {k: v for k, v in read.case.items() if k != "case_id"}, f"{cid} {kind}")
        _fhir_model_check(bundle, cid)
        (out / "fhir" / f"{cid}.json").write_text(json.dumps(bundle, indent=2) + "\n", encoding="utf-8")
        (out / "hl7" / f"{cid}.hl7").write_bytes(message.encode("utf-8"))
        stream.append(message)
        _, left_out = message_items(case, catalog)
        notes.append(
            f"{cid}  {label}" + (f"  (not in the messages: {', '.join(left_out)})" if left_out else "")
        )
    (out / "hl7" / "all.hl7").write_bytes("".join(stream).encode("utf-8"))
    (out / "README.txt").write_text(
        "Invented demo messages (no real patient), written by tools/make_demo_data.py messages from\n"
        "the same seeded generator as the corpus (gasrules.verification.casegen) and the quick-start cases.\n"
        "Each file was read back through gasrules.integration.fhir / gasrules.integration.hl7v2 and gave the same inputs.\n\n"
        + "\n".join(notes)
        + "\n",
        encoding="utf-8",
    )
    print(
        f"wrote {len(notes)} FHIR bundles and {len(notes)} HL7 v2 messages (+ all.hl7) under {out}",
        file=sys.stderr,
    )
    return 0


# ----------------------------------------------------------------------------- command table
@dataclass(frozen=True)
class Subcommand:
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


SUBCOMMANDS: dict[str, Subcommand] = {
    "corpus": Subcommand(
        "stream a large invented corpus as CSV or JSON Lines", _corpus_arguments, _corpus_run
    ),
    "demo": Subcommand("write the shipped quick-start files (tools/demo)", _demo_arguments, _demo_run),
    "messages": Subcommand(
        "write the quick-start cases as FHIR R4 bundles and HL7 v2 ORU^R01 "
        "messages (tools/demo/generated), each checked by reading it back",
        _messages_arguments,
        _messages_run,
    ),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="make_demo_data.py", description="Write invented blood gas demo data (no real patients)."
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name, cmd in SUBCOMMANDS.items():
        cmd.add_arguments(sub.add_parser(name, help=cmd.help, description=cmd.help))
    return parser


def run(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return SUBCOMMANDS[args.command].run(args)


def main() -> None:
    sys.exit(run())


if __name__ == "__main__":
    main()
