"""Cost of the runtime's extras, side by side in one run on the shipped adult rulebook:
plain gasrules.interpret, Runtime with nothing on, with a decision log (fsync off, then on, in
the directory given), with a shadow candidate (the example-site overlay), and strict admission.

Usage: python tools/bench_runtime.py [N] [DIR]
N invented cases from gasrules.verification.casegen (demo data; default 2000); DIR where the logs go (default:
a temporary directory here; fsync cost depends on the disk). Prints cases/s and the ratio to
plain interpret, measured in the same process one after the other (noisy machine: repeat).
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import gasrules
from gasrules.governance.release import Approver, SuiteSummary, release
from gasrules.governance.runtime import Runtime
from gasrules.governance.settings import Settings
from gasrules.verification.casegen import generate_cases

ROOT = Path(__file__).resolve().parents[1]
ADULT = ROOT / "rulebooks" / "adult" / "rulebook.yaml"
SITE = ROOT / "rulebooks" / "example-site" / "rulebook.yaml"
SALT = "bench-salt-0123456789abcdef"


def timed(label: str, n: int, go: Callable[[], Any], base: float | None) -> float:
    start = time.perf_counter()
    go()
    rate = n / (time.perf_counter() - start)
    ratio = f"  x{rate / base:.2f} of plain" if base else ""
    print(f"{label:<44} {rate:9.0f} cases/s{ratio}")
    return rate


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 2000
    cases = list(generate_cases(n, seed=11))
    rb = gasrules.load_rulebook(ADULT)
    gasrules.load_rulebook(SITE)
    with tempfile.TemporaryDirectory(dir=sys.argv[2] if len(sys.argv) > 2 else ".") as tmp:
        d = Path(tmp)
        # admission only needs a manifest: bypass the suite here (the gate is not what is timed)
        whole = SuiteSummary("0" * 64, [], 1, 1, 0, 0, [], 1, 1, [], [])
        release(
            ADULT,
            release_dir=d / "rel",
            approvers=[Approver("bench", "bench")],
            authors=["bench author"],
            validate=lambda path, book: whole,
        )

        def with_runtime(settings: Settings, trace: bool = True) -> Callable[[], None]:
            def go() -> None:
                with Runtime(
                    rb, settings, candidate=gasrules.load_rulebook(SITE) if settings.shadow_rulebook else None
                ) as rt:
                    for c in cases:
                        rt.interpret(c, trace=trace)

            return go

        for c in cases[:200]:  # warm up (first calls pay for imports and caches)
            gasrules.interpret(rb, c)

        def plain() -> None:
            for c in cases:
                gasrules.interpret(rb, c)

        base = timed("plain gasrules.interpret (trace)", n, plain, None)
        timed("Runtime, nothing on", n, with_runtime(Settings()), base)
        timed(
            "Runtime, strict (admitted once)",
            n,
            with_runtime(Settings(strict=True, release_dir=d / "rel")),
            base,
        )
        timed(
            "Runtime + decision log, masked, fsync off",
            n,
            with_runtime(
                Settings(decision_log=d / "a.jsonl", context_policy="mask", mask_salt=SALT, log_fsync=False)
            ),
            base,
        )
        few = cases[: max(1, n // 4)]
        timed(
            "Runtime + decision log, masked, fsync on",
            len(few),
            lambda: _subset(rb, few, d / "b.jsonl"),
            base,
        )
        timed(
            "Runtime + shadow candidate (log fsync off)",
            n,
            with_runtime(Settings(shadow_rulebook=SITE, shadow_log=d / "s.jsonl", log_fsync=False)),
            base,
        )
        size = (d / "a.jsonl").stat().st_size
        print(f"decision log: {size / n / 1024:.1f} KiB per entry (trace included)")


def _subset(rb: Any, cases: list[Any], log: Path) -> None:
    settings = Settings(decision_log=log, context_policy="mask", mask_salt=SALT, log_fsync=True)
    with Runtime(rb, settings) as rt:
        for c in cases:
            rt.interpret(c)


if __name__ == "__main__":
    main()
