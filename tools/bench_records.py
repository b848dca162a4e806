"""Appends per second to a decision log, with fsync on and off, and verification speed.

Usage: python tools/bench_records.py [N] [DIR]
N entries per run (default 300); DIR where the logs go (default: a temporary directory; use a
directory on the disk the real log will live on, since fsync cost depends on it).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

from gasrules.governance.audit import replay_log, verify_log
from gasrules.governance.decision_log import DecisionLog, RecordConfig

RULEBOOK = {"id": "bench", "version": "1.0.0", "sha256": "c3" * 32}


def demo_pair(i: int) -> tuple[dict, dict]:
    """An invented case and a result of realistic size (about 40 trace events). Demo data."""
    case = {
        "case_id": f"bench-{i}",
        "ph": 7.31,
        "pco2": 31.0,
        "hco3": 15.2,
        "na": 139,
        "k": 4.1,
        "cl": 104,
        "albumin": 38,
        "context": {"mrn": f"M{i}", "ward": "ED"},
    }
    trace = [
        {
            "op": "not_fired" if j % 3 else "fired",
            "rule": f"rule.{j}",
            "inputs": {"ph": 7.31, "hco3": 15.2},
            "result": j % 3 == 0,
            "margin": 0.013 * j,
        }
        for j in range(40)
    ]
    result = {
        "schema_version": 1,
        "case_id": case["case_id"],
        "context": case["context"],
        "rulebook": RULEBOOK,
        "engine_version": "0.1.0",
        "status": "interpreted",
        "headline": "demo",
        "errors": [],
        "values": {"anion_gap": 19.8, "h_plus": 4.9e-08},
        "units": {"anion_gap": "mmol/L", "h_plus": "mol/L"},
        "findings": [
            {
                "code": "ag.high",
                "category": "acid_base",
                "severity": "warning",
                "text": "demo",
                "rule": "ag.high",
            }
        ],
        "disorders": ["metabolic_acidosis_high_anion_gap"],
        "qualifiers": {},
        "not_assessed": [],
        "cautions": ["demo"],
        "trace": trace,
    }
    return case, result


def run(directory: Path, n: int, fsync: bool) -> float:
    path = directory / f"bench-{'fsync' if fsync else 'nofsync'}.jsonl"
    pairs = [demo_pair(i) for i in range(n)]
    config = RecordConfig(context_policy="mask", salt="bench-salt-0123456789", fsync=fsync)
    with DecisionLog(path, config) as log:
        start = time.perf_counter()
        for case, result in pairs:
            log.append(case, result)
        elapsed = time.perf_counter() - start
    size = path.stat().st_size
    t0 = time.perf_counter()
    report = verify_log(path)
    t_verify = time.perf_counter() - t0
    assert report.ok, report.issues
    t0 = time.perf_counter()
    replay = replay_log(path, lambda sha: RULEBOOK, lambda rb, case: demo_pair(0)[1])
    t_replay = time.perf_counter() - t0
    print(
        f"fsync={'on ' if fsync else 'off'}  {n / elapsed:9.0f} appends/s  "
        f"({elapsed / n * 1e3:.2f} ms each, {size / n / 1024:.1f} KiB/entry)  "
        f"verify {n / t_verify:9.0f} entries/s  replay {n / t_replay:9.0f} entries/s "
        f"({replay.counts['same']} same)"
    )
    return n / elapsed


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 300
    if len(sys.argv) > 2:
        run(Path(sys.argv[2]), n, True)
        run(Path(sys.argv[2]), n * 10, False)
        return
    with tempfile.TemporaryDirectory(dir=".") as tmp:
        run(Path(tmp), n, True)
        run(Path(tmp), n * 10, False)


if __name__ == "__main__":
    main()
