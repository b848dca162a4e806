"""Bounded loopback load test of `gasrules serve`: requests/s and p50/p99 latency.

Starts `gasrules serve --port 0` in its own process (so the load generator does not share the
server's interpreter lock), then, for each endpoint and each concurrency level (1, 8, 32 by
default), keeps that many keep-alive connections busy for a fixed time and prints one line:
requests, requests per second, p50 and p99 latency, non-200 answers. Loopback only; every run
is bounded by --seconds per level. Cases are the invented demo cases in tools/demo.

    .venv/bin/python tools/bench_serve.py [--seconds 5] [--levels 1,8,32] [--endpoints ...]
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
    patient = next((e["resource"]["id"] for e in panel["entry"]
                    if e["resource"]["resourceType"] == "Patient"), "pt")
    return json.dumps({"hook": "patient-view", "hookInstance": str(uuid.uuid4()),
                       "context": {"userId": "Practitioner/bench", "patientId": patient},
                       "prefetch": {"observations": panel}}).encode()


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


async def _client(host: str, port: int, method: str, path: str, bodies: list[bytes],
                  stop_at: float, lat: list[float], errors: list[int], offset: int) -> None:
    reader, writer = await asyncio.open_connection(host, port)
    i = offset
    try:
        while time.perf_counter() < stop_at:
            body = bodies[i % len(bodies)]
            i += 1
            head = (f"{method} {path} HTTP/1.1\r\nHost: {host}\r\n"
                    f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n")
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


async def _level(host: str, port: int, spec: tuple[str, str, list[bytes]], clients: int,
                 seconds: float) -> dict[str, Any]:
    method, path, bodies = spec
    lat: list[float] = []
    errors: list[int] = []
    start = time.perf_counter()
    stop_at = start + seconds
    await asyncio.gather(*(_client(host, port, method, path, bodies, stop_at, lat, errors, k * 7)
                           for k in range(clients)))
    elapsed = time.perf_counter() - start
    lat.sort()

    def pct(p: float) -> float:
        return lat[min(len(lat) - 1, int(p * len(lat)))] * 1000 if lat else float("nan")

    return {"requests": len(lat), "rps": len(lat) / elapsed, "p50_ms": pct(0.50),
            "p99_ms": pct(0.99), "errors": len(errors)}


def start_server(extra: list[str], feedback_log: Path) -> tuple[subprocess.Popen[str], int]:
    cmd = [sys.executable, "-m", "gasrules.cli", "serve", "--port", "0", "--no-access-log",
           "--feedback-log", str(feedback_log), *extra]
    env = {**os.environ, "PYTHONPATH": str(ROOT / "engine") + os.pathsep +
           os.environ.get("PYTHONPATH", "")}
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
    from gasrules.cdsauth import Issuer, AuthConfig, TokenVerifier

    out = []
    for alg, key in (("ES384", ec.generate_private_key(ec.SECP384R1())),
                     ("RS384", rsa.generate_private_key(public_exponent=65537, key_size=2048))):
        iss = "https://ehr.example.org"
        config = AuthConfig(issuers={iss: Issuer(iss, {"k": key.public_key()})},
                            algorithms=(alg,), replay_cache_size=n + 100)
        verifier = TokenVerifier(config, "https://cds.example.org")
        now = int(time.time())
        tokens = [jwt.encode({"iss": iss, "aud": "https://cds.example.org/cds-services",
                              "exp": now + 120, "iat": now, "jti": str(uuid.uuid4())}, key,
                             algorithm=alg, headers={"kid": "k", "typ": "JWT"}) for _ in range(n)]
        t0 = time.perf_counter()
        for tok in tokens:
            verifier.verify(f"Bearer {tok}", "/cds-services", None)
        per = (time.perf_counter() - t0) / n * 1000
        out.append(f"JWT check {alg}: {per:.3f} ms per token ({n} tokens, in process)")
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=5.0, help="duration of each level (1-60)")
    ap.add_argument("--levels", default="1,8,32", help="concurrent clients, comma-separated")
    ap.add_argument("--endpoints", default="interpret,interpret-notrace,cds,batch",
                    help="any of: interpret, interpret-notrace, batch, cds, health")
    ap.add_argument("--batch-size", type=int, default=100, help="cases per batch request")
    ap.add_argument("--json", action="store_true", help="also print the figures as JSON")
    ap.add_argument("--jwt", action="store_true", help="also time the CDS bearer-token check")
    args = ap.parse_args(argv)
    if not 1 <= args.seconds <= 60:
        ap.error("--seconds must be within 1-60 (the load test is bounded)")
    levels = [int(x) for x in args.levels.split(",")]
    if any(not 1 <= n <= 64 for n in levels):
        ap.error("--levels must be within 1-64 clients")
    specs = endpoints(args.batch_size)
    chosen = args.endpoints.split(",")
    unknown = [e for e in chosen if e not in specs]
    if unknown:
        ap.error(f"unknown endpoints {unknown}; choose from {', '.join(specs)}")
    host = "127.0.0.1"   # loopback only
    log = Path(os.environ.get("TMPDIR", "/tmp")) / f"bench-serve-{os.getpid()}.jsonl"
    proc, port = start_server([], log)
    rows = []
    try:
        print(f"gasrules serve on {host}:{port}, {os.cpu_count()} CPUs, {args.seconds:g} s per "
              f"level; server in its own process, asyncio keep-alive clients")
        print(f"{'endpoint':<18} {'clients':>7} {'requests':>9} {'req/s':>9} {'p50 ms':>8} "
              f"{'p99 ms':>8} {'non-200':>7}")
        for name in chosen:
            for n in levels:
                r = asyncio.run(_level(host, port, specs[name], n, args.seconds))
                rows.append({"endpoint": name, "clients": n, **r})
                print(f"{name:<18} {n:>7} {r['requests']:>9} {r['rps']:>9.0f} "
                      f"{r['p50_ms']:>8.2f} {r['p99_ms']:>8.2f} {r['errors']:>7}", flush=True)
        if "batch" in chosen:
            per = [r for r in rows if r["endpoint"] == "batch"]
            best = max(r["rps"] for r in per) * args.batch_size
            print(f"batch: {args.batch_size} cases per request, up to {best:.0f} cases/s")
    finally:
        proc.terminate()
        proc.wait(timeout=20)
        log.unlink(missing_ok=True)
    if args.jwt:
        for line in jwt_verify_cost():
            print(line)
    if args.json:
        print(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
