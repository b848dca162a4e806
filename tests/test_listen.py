"""`gasrules listen` over real loopback sockets: framing, ACKs, retransmissions, forwarding.

Each test runs a :class:`Listener` on 127.0.0.1 (a free port) in its own event loop in a
thread; clients are plain sockets with timeouts. Messages are the invented demo messages of
tools/demo/hl7; no clinical number is asserted (the result messages are the engine's own).
"""

from __future__ import annotations

import asyncio
import re
import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

import gasrules
from gasrules.integration.interfaces import InterfaceSettings
from gasrules.integration.mllp import ListenConfig, Listener
from gasrules.service.handlers import EngineInterpreter

DEMO = Path(__file__).parents[1] / "tools" / "demo" / "hl7"
HOST = "127.0.0.1"


def message(name: str = "arterial_electrolytes.hl7", control: str | None = None) -> bytes:
    raw = re.sub(rb"\r\n|\n", b"\r", (DEMO / name).read_bytes()).strip(b"\r") + b"\r"
    if control is not None:
        fields = raw.split(b"\r", 1)[0].split(b"|")
        fields[9] = control.encode()
        raw = b"|".join(fields) + b"\r" + raw.split(b"\r", 1)[1]
    return raw


def framed(raw: bytes) -> bytes:
    return b"\x0b" + raw + b"\x1c\r"


class Running:
    """A listener in a thread with its own event loop."""

    def __init__(self, tmp: Path, **config: Any) -> None:
        self.loop = asyncio.new_event_loop()
        self.outbox = tmp / "out"
        rb = gasrules.load_rulebook()
        self.listener = Listener(
            EngineInterpreter(rb),
            ListenConfig(host=HOST, port=0, outbox=self.outbox, **config),
            InterfaceSettings(facility="DEMO-SITE"),
            log=lambda **_: None,
        )
        threading.Thread(target=self.loop.run_forever, daemon=True).start()
        asyncio.run_coroutine_threadsafe(self.listener.start(), self.loop).result(10)
        self.port = self.listener.port

    def close(self) -> None:
        asyncio.run_coroutine_threadsafe(self.listener.stop(), self.loop).result(10)
        self.loop.call_soon_threadsafe(self.loop.stop)

    def connect(self) -> socket.socket:
        return socket.create_connection((HOST, self.port), timeout=10)

    def filed(self) -> list[Path]:
        return sorted(self.outbox.glob("*.hl7"))


def read_acks(sock: socket.socket, n: int) -> list[str]:
    data = b""
    while data.count(b"\x1c\r") < n:
        chunk = sock.recv(65536)
        if not chunk:
            break
        data += chunk
    return [f.strip(b"\x0b").decode("latin-1") for f in data.split(b"\x1c\r") if f.strip()]


def segment(ack: str, name: str) -> list[str]:
    return next(s for s in ack.split("\r") if s.startswith(name)).split("|")


@pytest.fixture
def running(tmp_path: Path) -> Iterator[Running]:
    srv = Running(tmp_path)
    yield srv
    srv.close()


def test_a_message_is_interpreted_filed_and_acknowledged(running: Running) -> None:
    with running.connect() as sock:
        sock.sendall(framed(message()))
        [ack] = read_acks(sock, 1)
    assert segment(ack, "MSA")[1:3] == ["AA", "DEMO0001"]  # MSA-2 = MSH-10
    assert segment(ack, "MSH")[3] == "DEMO-SITE"  # MSH-4 from settings
    [filed] = running.filed()
    oru = filed.read_text(encoding="utf-8")
    assert oru.startswith("MSH|^~\\&|GASRULES|DEMO-SITE|") and "|GR-DEMO0001|" in oru
    assert running.listener.interpreted == 1


def test_framing_split_across_packets_and_several_messages_per_connection(running: Running) -> None:
    stream = b"".join(framed(message(control=f"SPLIT{i}")) for i in range(3))
    with running.connect() as sock:
        for i in range(0, len(stream), 97):  # a frame boundary inside many packets
            sock.sendall(stream[i : i + 97])
            time.sleep(0.002)
        acks = read_acks(sock, 3)
    assert [segment(a, "MSA")[1:3] for a in acks] == [["AA", f"SPLIT{i}"] for i in range(3)]
    assert len(running.filed()) == 3


def test_a_retransmission_is_answered_again_but_not_interpreted_twice(running: Running) -> None:
    with running.connect() as sock:
        sock.sendall(framed(message(control="RETRY1")))
        first = read_acks(sock, 1)
    with running.connect() as sock:  # a new connection, as after a lost ACK
        sock.sendall(framed(message(control="RETRY1")))
        again = read_acks(sock, 1)
    assert again == first
    assert running.listener.interpreted == 1 and len(running.filed()) == 1


@pytest.mark.parametrize(
    ("raw", "code", "where", "err"),
    [
        (b"MSH|^~\\&|A|B|||20310402||ADT^A01|BAD1|P|2.5.1\r", "AR", "MSH^1^9", "200"),
        (b"MSH|^~\\&|A|B|||20310402||ORU^R01|BAD2|P|2.5.1||||||KLINGON\r", "AR", "MSH^1^18", "207"),
        (b"MSH|^~\\&|A|B|||20310402||ORU^R01||P|2.5.1\r", "AR", "MSH^1^10", "101"),
    ],
)
def test_messages_that_cannot_be_taken_are_rejected_naming_the_field(
    running: Running, raw: bytes, code: str, where: str, err: str
) -> None:
    with running.connect() as sock:
        sock.sendall(framed(raw))
        [ack] = read_acks(sock, 1)
    assert segment(ack, "MSA")[1] == code
    error = segment(ack, "ERR")
    assert (error[2], error[3].split("^")[0], error[4]) == (where, err, "E")
    assert running.filed() == []


def test_unusable_content_is_ae_with_the_segment_and_field(running: Running) -> None:
    raw = message(control="BADOBX").replace(b"||7.30|", b"||seven|", 1)
    with running.connect() as sock:
        sock.sendall(framed(raw))
        [ack] = read_acks(sock, 1)
    assert segment(ack, "MSA")[1:3] == ["AE", "BADOBX"]
    error = segment(ack, "ERR")
    assert error[2] == "OBX^1^5" and error[3].startswith("102^")  # HL7 table 0357
    assert "seven" in error[8]
    assert running.filed() == []


def test_msh18_character_set_is_honoured(running: Running) -> None:
    raw = message(control="LATIN1").replace(b"Testperson^Alex", "Testpérson^Alex".encode("latin-1"))
    head, rest = raw.split(b"\r", 1)
    raw = head + b"||||||8859/1\r" + rest
    with running.connect() as sock:
        sock.sendall(framed(raw))
        [ack] = read_acks(sock, 1)
    assert segment(ack, "MSA")[1:3] == ["AA", "LATIN1"]
    assert segment(ack, "MSH")[17] == "8859/1"  # answered in kind
    undeclared = message(control="RAWBYTES").replace(b"Testperson", b"Test\xe9")
    with running.connect() as sock:
        sock.sendall(framed(undeclared))
        [ack] = read_acks(sock, 1)
    assert segment(ack, "MSA")[1] == "AR" and segment(ack, "ERR")[2] == "MSH^1^18"


def test_results_are_forwarded_before_the_ack_and_a_failed_forward_is_retried(tmp_path: Path) -> None:
    received: list[bytes] = []

    async def destination(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        data = b""
        while b"\x1c\r" not in data:
            chunk = await reader.read(65536)
            if not chunk:
                return
            data += chunk
        received.append(data)
        writer.write(framed(b"MSH|^~\\&|EHR|H|||20310402||ACK|A1|P|2.5.1\rMSA|AA|X\r"))
        await writer.drain()
        writer.close()

    loop = asyncio.new_event_loop()
    threading.Thread(target=loop.run_forever, daemon=True).start()
    dest = asyncio.run_coroutine_threadsafe(asyncio.start_server(destination, HOST, 0), loop).result(10)
    dest_port = dest.sockets[0].getsockname()[1]
    with socket.socket() as probe:  # a port with nobody listening
        probe.bind((HOST, 0))
        dead_port = probe.getsockname()[1]
    srv = Running(tmp_path, forward=(HOST, dead_port), forward_timeout=2.0)
    try:
        with srv.connect() as sock:
            sock.sendall(framed(message(control="FWD1")))
            [ack] = read_acks(sock, 1)
        assert segment(ack, "MSA")[1] == "AR" and "not delivered" in segment(ack, "ERR")[8]
        srv.listener.config = ListenConfig(
            host=HOST, port=0, outbox=srv.outbox, forward=(HOST, dest_port), forward_timeout=5.0
        )
        with srv.connect() as sock:  # the sender tries again
            sock.sendall(framed(message(control="FWD1")))
            [ack] = read_acks(sock, 1)
        assert segment(ack, "MSA")[1:3] == ["AA", "FWD1"]
        assert len(received) == 1 and b"|GR-FWD1|" in received[0]
    finally:
        srv.close()
        dest.close()
        loop.call_soon_threadsafe(loop.stop)


def test_listen_settings_are_checked(tmp_path: Path) -> None:
    from gasrules.governance.settings import SettingsError
    from gasrules.integration.interfaces import interfaces_section

    good = tmp_path / "site.yaml"
    good.write_text(
        "interfaces:\n  facility: LAB-1\n  listen:\n    port: 0\n    outbox: out\n"
        "    forward: ehr.example.org:2576\n"
    )
    got = interfaces_section(good)
    assert got.facility == "LAB-1"
    assert got.listen == {"port": 0, "outbox": tmp_path / "out", "forward": ("ehr.example.org", 2576)}
    bad = tmp_path / "bad.yaml"
    bad.write_text("interfaces:\n  listen:\n    forward: nowhere\n")
    with pytest.raises(SettingsError, match="interfaces.listen.forward.*HOST:PORT"):
        interfaces_section(bad)


@pytest.mark.slow
def test_gasrules_listen_runs_acknowledges_and_stops_on_sigterm(tmp_path: Path) -> None:
    import subprocess
    import sys

    settings = tmp_path / "site.yaml"
    settings.write_text("interfaces:\n  facility: CLI-SITE\n  listen:\n    port: 0\n    outbox: filed\n")
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys; from gasrules.cli import main; sys.exit(main())",
            "listen",
            "--settings",
            str(settings),
            "--host",
            HOST,
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        line = proc.stdout.readline() if proc.stdout else ""
        assert "MLLP on 127.0.0.1:" in line, line
        port = int(line.split("127.0.0.1:")[1].split()[0])
        with socket.create_connection((HOST, port), timeout=10) as sock:
            sock.sendall(framed(message(control="CLI1")))
            [ack] = read_acks(sock, 1)
        assert segment(ack, "MSA")[1:3] == ["AA", "CLI1"] and segment(ack, "MSH")[3] == "CLI-SITE"
        assert len(list((tmp_path / "filed").glob("*-CLI1.hl7"))) == 1
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    assert proc.returncode == 0


def test_an_internal_failure_is_ar_and_not_remembered(tmp_path: Path) -> None:
    srv = Running(tmp_path)
    real = srv.listener.interpreter

    class Broken:
        rulebook = real.rulebook

        def interpret(self, case: Any, trace: bool = True) -> dict[str, Any]:
            raise RuntimeError("boom")

    try:
        srv.listener.interpreter = Broken()
        with srv.connect() as sock:
            sock.sendall(framed(message(control="BUG1")))
            [ack] = read_acks(sock, 1)
        assert segment(ack, "MSA")[1:3] == ["AR", "BUG1"] and "boom" not in ack
        srv.listener.interpreter = real
        with srv.connect() as sock:  # a retry is processed anew
            sock.sendall(framed(message(control="BUG1")))
            [ack] = read_acks(sock, 1)
        assert segment(ack, "MSA")[1:3] == ["AA", "BUG1"] and len(srv.filed()) == 1
    finally:
        srv.close()


def test_connections_beyond_the_cap_are_closed_at_once(tmp_path: Path) -> None:
    srv = Running(tmp_path, max_connections=1)
    try:
        with srv.connect() as held:
            held.sendall(framed(message(control="HOLD1")))
            assert segment(read_acks(held, 1)[0], "MSA")[1] == "AA"  # the one place is taken
            with srv.connect() as extra:
                assert extra.recv(100) == b""  # closed without a word
        for _ in range(100):  # the place frees
            with srv.connect() as again:
                again.sendall(framed(message(control="HOLD2")))
                acks = read_acks(again, 1)
            if acks:
                break
            time.sleep(0.02)
        assert segment(acks[0], "MSA")[1:3] == ["AA", "HOLD2"]
    finally:
        srv.close()
