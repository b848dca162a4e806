"""Service metrics in the Prometheus text exposition format (version 0.0.4).

Counters and one histogram, kept in memory per process and guarded by a lock:

* ``gasrules_requests_total{method,route,status}``: every HTTP request answered (status ``0``
  when none could be sent, ``499`` when the client left first);
* ``gasrules_request_duration_seconds{route}``: a latency histogram;
* ``gasrules_cases_total{status}``: interpreted cases by result status;
* ``gasrules_rulebook_info{id,version,sha256}``: always 1; the rulebook in force as labels.

Routes are the endpoint patterns (``/cds-services/{id}``), never raw paths, so a scan of random
paths cannot make the label set grow.
"""

from __future__ import annotations

import threading
from bisect import bisect_left
from collections import Counter
from typing import Any

__all__ = ["Metrics"]

BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


def _label(value: Any) -> str:
    return str(value).replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def _labels(**pairs: Any) -> str:
    return "{" + ",".join(f'{k}="{_label(v)}"' for k, v in pairs.items()) + "}"


class Metrics:
    CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"

    def __init__(self, rulebook: Any) -> None:
        self.identity = {"id": rulebook.id, "version": rulebook.version, "sha256": rulebook.sha256}
        self._lock = threading.Lock()
        self.requests: Counter[tuple[str, str, int]] = Counter()
        self.cases: Counter[str] = Counter()
        self._hist: dict[str, list[int]] = {}
        self._sum: Counter[str] = Counter()

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        with self._lock:
            self.requests[(method, route, status)] += 1
            counts = self._hist.setdefault(route, [0] * (len(BUCKETS) + 1))
            counts[bisect_left(BUCKETS, seconds)] += 1
            self._sum[route] += seconds

    def observe_case(self, status: str) -> None:
        with self._lock:
            self.cases[status] += 1

    def counting(self, interpreter: Any) -> Any:
        """``interpreter`` with every result's status counted (same interface)."""
        return _Counting(interpreter, self)

    def render(self) -> bytes:
        with self._lock:
            requests = sorted(self.requests.items())
            cases = sorted(self.cases.items())
            hist = {k: list(v) for k, v in sorted(self._hist.items())}
            sums = dict(self._sum)
        out = [
            "# HELP gasrules_requests_total HTTP requests answered.",
            "# TYPE gasrules_requests_total counter",
        ]
        out += [
            f"gasrules_requests_total{_labels(method=m, route=r, status=s)} {n}" for (m, r, s), n in requests
        ]
        out += [
            "# HELP gasrules_request_duration_seconds Time from request to response.",
            "# TYPE gasrules_request_duration_seconds histogram",
        ]
        for route, counts in hist.items():
            running = 0
            for bound, n in zip((*BUCKETS, float("inf")), counts, strict=True):
                running += n
                le = "+Inf" if bound == float("inf") else repr(bound)
                out.append(f"gasrules_request_duration_seconds_bucket{_labels(route=route, le=le)} {running}")
            out.append(f"gasrules_request_duration_seconds_sum{_labels(route=route)} {sums[route]:.6f}")
            out.append(f"gasrules_request_duration_seconds_count{_labels(route=route)} {running}")
        out += [
            "# HELP gasrules_cases_total Cases interpreted, by result status.",
            "# TYPE gasrules_cases_total counter",
        ]
        out += [f"gasrules_cases_total{_labels(status=s)} {n}" for s, n in cases]
        out += [
            "# HELP gasrules_rulebook_info The rulebook in force.",
            "# TYPE gasrules_rulebook_info gauge",
            f"gasrules_rulebook_info{_labels(**self.identity)} 1",
        ]
        return ("\n".join(out) + "\n").encode("utf-8")


class _Counting:
    """An interpreter that counts the status of every result it returns."""

    def __init__(self, inner: Any, metrics: Metrics) -> None:
        self.inner, self.metrics = inner, metrics
        self.rulebook = inner.rulebook

    def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
        result = self.inner.interpret(case, trace)
        self.metrics.observe_case(str(result.get("status", "unknown")))
        return result

    def prepare(self, case: Any, trace: bool = True) -> tuple[dict[str, Any], Any]:
        """(result, deliver) of the inner interpreter; the case is counted when it is delivered."""
        result, deliver = self.inner.prepare(case, trace)

        def counted_deliver() -> None:
            deliver()
            self.metrics.observe_case(str(result.get("status", "unknown")))

        return result, counted_deliver

    def record(self, case: Any, result: dict[str, Any]) -> None:
        self.inner.record(case, result)

    def describe(self) -> dict[str, Any]:
        return self.inner.describe()

    def close(self) -> None:
        self.inner.close()

    def __getattr__(self, name: str) -> Any:  # e.g. the Runtime behind a RuntimeInterpreter
        return getattr(self.inner, name)
