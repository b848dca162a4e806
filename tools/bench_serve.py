"""Bounded loopback load test of `gasrules serve`: requests/s and p50/p99 latency.

Starts `gasrules serve --port 0` (uvicorn, ASGI) in its own process, and, for comparison, the
former http.server service kept in tools/bench/old_httpserver.py (``--servers asgi,old``, the
default). For each endpoint and each concurrency level (1, 8, 32 by default) it keeps that many
keep-alive connections busy for a fixed time, alternating the servers run by run, and prints the
median over ``--runs`` runs (3 by default) of requests per second and p50/p99 latency, and the
ratio of the new server's req/s to the old one's. Loopback only; every run is bounded by
--seconds. Cases are the invented demo cases in tools/demo.

    .venv/bin/python tools/bench_serve.py [--seconds 5] [--runs 3] [--levels 1,8,32]
                                          [--endpoints interpret] [--servers asgi,old]
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import subprocess
import sys
import time
import uuid
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "tools" / "demo"


def _cases() -> list[dict[str, Any]]:
    return [json.loads(x) for x in (DEMO / "cases.jsonl").read_text().splitlines() if x.strip()]


def _cds_body() -> bytes:
    panel = json.loads((DEMO / "fhir" / "arterial_electrolytes.json").read_text())
    panel["type"] = "searchset"
    patient = next(
        (e["resource"]["id"] for e in panel["entry"] if e["resource"]["resourceType"] == "Patient"), "pt"
    )
    return json.dumps(
        {
            "hook": "patient-view",
            "hookInstance": str(uuid.uuid4()),
            "context": {"userId": "Practitioner/bench", "patientId": patient},
            "prefetch": {"observations": panel},
        }
    ).encode()


def endpoints(batch_size: int) -> dict[str, tuple[str, str, list[bytes]]]:
    cases = _cases()
    bodies = [json.dumps(c).encode() for c in cases]
    batch = json.dumps(cases[:batch_size]).encode()
    return {
        "interpret": ("POST", "/interpret", bodies),
        "interpret-notrace": ("POST", "/interpret?trace=0", bodies),
        "batch": ("POST", "/interpret/batch?trace=0", [batch]),
        "cds": ("POST", "/cds-services/blood-gas-patient-view", [_cds_body()]),
        "health": ("GET", "/health", [b""]),
    }


async def _client(
    host: str,
    port: int,
    method: str,
    path: str,
    bodies: list[bytes],
    stop_at: float,
    lat: list[float],
    errors: list[int],
    offset: int,
) -> None:
    reader, writer = await asyncio.open_connection(host, port)
    i = offset
    try:
        while time.perf_counter() < stop_at:
            body = bodies[i % len(bodies)]
            i += 1
            head = (
                f"{method} {path} HTTP/1.1\r\nHost: {host}\r\n"
                f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n"
            )
            t0 = time.perf_counter()
            writer.write(head.encode() + body)
            status_line = await reader.readline()
            length = 0
            while (line := await reader.readline()) not in (b"\r\n", b""):
                name, _, value = line.decode().partition(":")
                if name.lower() == "content-length":
                    length = int(value)
            await reader.readexactly(length)
            lat.append(time.perf_counter() - t0)
            if not status_line.startswith(b"HTTP/1.1 200"):
                errors.append(int(status_line.split()[1]))
    finally:
        writer.close()


async def _level(
    host: str, port: int, spec: tuple[str, str, list[bytes]], clients: int, seconds: float
) -> dict[str, Any]:
    method, path, bodies = spec
    lat: list[float] = []
    errors: list[int] = []
    start = time.perf_counter()
    stop_at = start + seconds
    await asyncio.gather(
        *(_client(host, port, method, path, bodies, stop_at, lat, errors, k * 7) for k in range(clients))
    )
    elapsed = time.perf_counter() - start
    lat.sort()

    def pct(p: float) -> float:
        return lat[min(len(lat) - 1, int(p * len(lat)))] * 1000 if lat else float("nan")

    return {
        "requests": len(lat),
        "rps": len(lat) / elapsed,
        "p50_ms": pct(0.50),
        "p99_ms": pct(0.99),
        "errors": len(errors),
    }


SERVERS = {
    "asgi": lambda log: [
        sys.executable,
        "-m",
        "gasrules.cli",
        "serve",
        "--port",
        "0",
        "--no-access-log",
        "--feedback-log",
        str(log),
    ],
    "old": lambda log: [
        sys.executable,
        str(ROOT / "tools" / "bench" / "old_httpserver.py"),
        "--port",
        "0",
        "--feedback-log",
        str(log),
    ],
}


def start_server(kind: str, feedback_log: Path) -> tuple[subprocess.Popen[str], int]:
    cmd = SERVERS[kind](feedback_log)
    env = {**os.environ, "PYTHONPATH": str(ROOT / "engine") + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True, env=env)
    line = proc.stdout.readline() if proc.stdout else ""
    if "listening on http://" not in line:
        proc.kill()
        raise SystemExit(f"server did not start: {line!r}")
    return proc, int(line.split("listening on http://")[1].split()[0].rsplit(":", 1)[1])


def jwt_verify_cost(n: int = 300) -> list[str]:
    """Per-token cost of the CDS bearer check (ES384 and RS384), in process, tokens pre-signed."""
    import jwt
    from cryptography.hazmat.primitives.asymmetric import ec, rsa

    sys.path.insert(0, str(ROOT / "engine"))
    from gasrules.service.cdsauth import AuthConfig, Issuer, TokenVerifier

    out = []
    for alg, key in (
        ("ES384", ec.generate_private_key(ec.SECP384R1())),
        ("RS384", rsa.generate_private_key(public_exponent=65537, key_size=2048)),
    ):
        iss = "https://ehr.example.org"
        config = AuthConfig(
            issuers={iss: Issuer(iss, {"k": key.public_key()})}, algorithms=(alg,), replay_cache_size=n + 100
        )
        verifier = TokenVerifier(config, "https://cds.example.org")
        now = int(time.time())
        tokens = [
            jwt.encode(
                {
                    "iss": iss,
                    "aud": "https://cds.example.org/cds-services",
                    "exp": now + 120,
                    "iat": now,
                    "jti": str(uuid.uuid4()),
                },
                key,
                algorithm=alg,
                headers={"kid": "k", "typ": "JWT"},
            )
            for _ in range(n)
        ]
        t0 = time.perf_counter()
        for tok in tokens:
            verifier.verify(f"Bearer {tok}", "/cds-services", None)
        per = (time.perf_counter() - t0) / n * 1000
        out.append(f"JWT check {alg}: {per:.3f} ms per token ({n} tokens, in process)")
    return out


def cpu_seconds(pid: int) -> float | None:
    """User + system CPU time of a process so far (Linux /proc; None elsewhere)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _measured(
    proc: subprocess.Popen[str], port: int, spec: Any, clients: int, seconds: float
) -> dict[str, Any]:
    """One run, plus the server's CPU milliseconds per answered request: a figure that does not
    depend on how much of a shared machine the server was given."""
    before = cpu_seconds(proc.pid)
    r = asyncio.run(_level("127.0.0.1", port, spec, clients, seconds))
    after = cpu_seconds(proc.pid)
    r["cpu_ms"] = (
        (after - before) * 1000 / r["requests"]
        if before is not None and after is not None and r["requests"]
        else float("nan")
    )
    return r


def _median(values: list[float]) -> float:
    import statistics

    return statistics.median(values)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=5.0, help="duration of each run (1-60)")
    ap.add_argument("--runs", type=int, default=3, help="runs per server and level (median)")
    ap.add_argument("--levels", default="1,8,32", help="concurrent clients, comma-separated")
    ap.add_argument(
        "--endpoints", default="interpret", help="any of: interpret, interpret-notrace, batch, cds, health"
    )
    ap.add_argument(
        "--servers",
        default="asgi,old",
        help="asgi (gasrules serve) and/or old (the former http.server service, for comparison)",
    )
    ap.add_argument("--batch-size", type=int, default=100, help="cases per batch request")
    ap.add_argument("--json", action="store_true", help="also print the figures as JSON")
    ap.add_argument("--jwt", action="store_true", help="also time the CDS bearer-token check")
    args = ap.parse_args(argv)
    if not 1 <= args.seconds <= 60:
        ap.error("--seconds must be within 1-60 (the load test is bounded)")
    if not 1 <= args.runs <= 9:
        ap.error("--runs must be within 1-9")
    levels = [int(x) for x in args.levels.split(",")]
    if any(not 1 <= n <= 64 for n in levels):
        ap.error("--levels must be within 1-64 clients")
    specs = endpoints(args.batch_size)
    chosen = args.endpoints.split(",")
    unknown = [e for e in chosen if e not in specs]
    if unknown:
        ap.error(f"unknown endpoints {unknown}; choose from {', '.join(specs)}")
    servers = args.servers.split(",")
    if any(k not in SERVERS for k in servers):
        ap.error(f"--servers: choose from {', '.join(SERVERS)}")
    host = "127.0.0.1"  # loopback only
    tmp = Path(os.environ.get("TMPDIR", "/tmp"))
    procs: dict[str, tuple[subprocess.Popen[str], int]] = {}
    rows = []
    try:
        for kind in servers:
            procs[kind] = start_server(kind, tmp / f"bench-serve-{kind}-{os.getpid()}.jsonl")
        print(
            f"servers: {', '.join(f'{k} on {host}:{p}' for k, (_, p) in procs.items())}; "
            f"{os.cpu_count()} CPUs; {args.seconds:g} s per run, median of {args.runs} runs "
            "(servers alternate run by run); each server in its own process, asyncio "
            "keep-alive clients"
        )
        print(
            f"load average before: {os.getloadavg()[0]:.2f} (other work on the machine "
            "takes CPU from both servers; 'cpu ms/req' is the server's own CPU time per "
            "request, which does not depend on it)"
        )
        print(
            f"{'endpoint':<18} {'clients':>7} {'server':<6} {'req/s':>9} {'p50 ms':>8} "
            f"{'p99 ms':>8} {'cpu ms/req':>10} {'non-200':>7} {'vs old':>7}"
        )
        for name in chosen:
            for n in levels:
                runs: dict[str, list[dict[str, Any]]] = {k: [] for k in servers}
                for _ in range(args.runs):
                    for kind in servers:
                        proc, port = procs[kind]
                        runs[kind].append(_measured(proc, port, specs[name], n, args.seconds))
                med = {
                    k: {
                        m: _median([r[m] for r in rs])
                        for m in ("rps", "p50_ms", "p99_ms", "errors", "cpu_ms")
                    }
                    for k, rs in runs.items()
                }
                for kind in servers:
                    r = med[kind]
                    ratio = f"{r['rps'] / med['old']['rps']:.2f}x" if "old" in med and kind != "old" else ""
                    rows.append({"endpoint": name, "clients": n, "server": kind, **r})
                    print(
                        f"{name:<18} {n:>7} {kind:<6} {r['rps']:>9.0f} {r['p50_ms']:>8.2f} "
                        f"{r['p99_ms']:>8.2f} {r['cpu_ms']:>10.3f} {r['errors']:>7.0f} "
                        f"{ratio:>7}",
                        flush=True,
                    )
        print(f"load average after: {os.getloadavg()[0]:.2f}")
    finally:
        for proc, _ in procs.values():
            proc.terminate()
            proc.wait(timeout=20)
        for kind in servers:
            (tmp / f"bench-serve-{kind}-{os.getpid()}.jsonl").unlink(missing_ok=True)
    if args.jwt:
        for line in jwt_verify_cost():
            print(line)
    if args.json:
        print(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
