"""Write invented demo data from the seeded case generator (engine/gasrules/casegen.py).

    python tools/make_demo_data.py corpus --n 100000 --seed 7 --format csv --out /tmp/corpus.csv
    python tools/make_demo_data.py corpus --n 1000 --format jsonl --out -        # to stdout
    python tools/make_demo_data.py demo --out tools/demo     # the shipped quick-start files

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
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator, TextIO

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "engine"))

from gasrules.casegen import (  # noqa: E402  (path set just above for a source checkout)
    HAGMA, MALK, NAGMA, Scenario, generate_corpus, generate_labelled, to_canonical,
)

CONTEXT_COLUMNS = ("case_id", "ward", "collected_at", "record_number")
CSV_ANALYTES: tuple[str, ...] = (
    "sample_type", "chronicity", "age", "pregnant",
    "ph", "pco2", "po2", "hco3", "tco2", "base_excess", "so2", "hb",
    "na", "k", "cl", "albumin", "lactate", "glucose", "urea", "creatinine", "osmolality",
    "ethanol", "phosphate", "ionized_calcium", "magnesium",
    "fio2", "peep", "etco2", "minute_ventilation", "predicted_body_weight",
    "barometric_pressure", "temperature", "urine_na", "urine_k", "urine_cl",
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
    return ([case["case_id"], ctx["ward"], ctx["collected_at"], ctx["record_number"]]
            + [_cell(name, case.get(name)) for name in CSV_ANALYTES])


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
    else:                                   # text_value, out_of_range
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


def write_corpus(out: TextIO, n: int, seed: int, fmt: str, mix: str,
                 malformed_share: float) -> tuple[int, int]:
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
    p.add_argument("--format", choices=("csv", "jsonl"), default="jsonl")
    p.add_argument("--mix", choices=("hospital", "icu", "ed", "ward"), default="hospital")
    p.add_argument("--malformed-share", type=float, default=0.001,
                   help="share of deliberately malformed rows (default 0.001)")
    p.add_argument("--out", required=True, help="output file, or - for stdout")


def _corpus_run(args: argparse.Namespace) -> int:
    if args.n < 0:
        print(f"--n must be 0 or more, got {args.n}", file=sys.stderr)
        return 2
    if not 0.0 <= args.malformed_share <= 1.0:
        print(f"--malformed-share must be between 0 and 1, got {args.malformed_share}",
              file=sys.stderr)
        return 2
    t0 = time.perf_counter()
    with _open_out(args.out) as f:
        written, malformed = write_corpus(f, args.n, args.seed, args.format, args.mix,
                                          args.malformed_share)
    dt = time.perf_counter() - t0
    print(f"wrote {written} invented cases ({malformed} deliberately malformed) to {args.out} "
          f"in {dt:.1f} s", file=sys.stderr)
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
    ("high-gap acidosis with respiratory compensation",
     lambda s, c: _plain(s) and s.combination == f"none+{HAGMA}" and s.albumin
     and "lactate" in c),
    ("acute respiratory acidosis", lambda s, c: _plain(s) and s.electrolytes
     and s.combination == "respiratory_acidosis/acute"),
    ("chronic respiratory acidosis in kPa", lambda s, c: _clean(s) and s.kpa
     and s.sample_type == "arterial" and s.combination == "respiratory_acidosis/chronic"
     and c.get("chronicity") == "chronic"),
    ("acute respiratory alkalosis", lambda s, c: _plain(s)
     and s.combination == "respiratory_alkalosis/acute"),
    ("mixed: high-gap acidosis with respiratory acidosis", lambda s, c: _plain(s) and s.albumin
     and s.combination == f"respiratory_acidosis/acute+{HAGMA}"),
    ("triple: high-gap acidosis, metabolic alkalosis, respiratory alkalosis",
     lambda s, c: _plain(s) and s.albumin and s.respiratory == "respiratory_alkalosis"
     and s.metabolic == (HAGMA, MALK)),
    ("normal-gap acidosis", lambda s, c: _plain(s) and s.albumin
     and s.combination == f"none+{NAGMA}"),
    ("metabolic alkalosis", lambda s, c: _plain(s) and s.combination == f"none+{MALK}"
     and "urine_cl" in c),
    ("venous sample", lambda s, c: _clean(s) and s.sample_type == "venous" and s.electrolytes),
    ("high-gap acidosis, albumin missing", lambda s, c: _plain(s) and s.electrolytes
     and not s.albumin and s.combination == f"none+{HAGMA}"),
    ("ventilated ICU patient", lambda s, c: _clean(s) and s.ventilated and s.electrolytes
     and s.sample_type == "arterial"),
    ("inconsistent values (transcription-like error)",
     lambda s, c: s.inconsistent is not None and s.out_of_scope is None),
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
    p.add_argument("--out", default=str(Path(__file__).resolve().parent / "demo"),
                   help="directory for cases.jsonl and case.json (default tools/demo)")


def _demo_run(args: argparse.Namespace) -> int:
    picked = demo_cases(args.seed)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    with (out / "cases.jsonl").open("w", encoding="utf-8", newline="\n") as f:
        for _, case in picked:
            f.write(json.dumps(case, ensure_ascii=False) + "\n")
    (out / "case.json").write_text(json.dumps(picked[1][1], indent=2, ensure_ascii=False)
                                   + "\n", encoding="utf-8")
    for label, case in picked:
        print(f"{case['case_id']}  {label}", file=sys.stderr)
    print(f"wrote {out / 'cases.jsonl'} ({len(picked)} invented cases) and {out / 'case.json'}",
          file=sys.stderr)
    return 0


# ----------------------------------------------------------------------------- command table
@dataclass(frozen=True)
class Subcommand:
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


# Extension point: the integration work adds "fhir" and "hl7" rows here (not implemented yet).
SUBCOMMANDS: dict[str, Subcommand] = {
    "corpus": Subcommand("stream a large invented corpus as CSV or JSON Lines",
                         _corpus_arguments, _corpus_run),
    "demo": Subcommand("write the shipped quick-start files (tools/demo)",
                       _demo_arguments, _demo_run),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="make_demo_data.py",
        description="Write invented blood gas demo data (no real patients).")
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
