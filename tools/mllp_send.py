"""Send the HL7 v2 messages of a file over MLLP and print each acknowledgement (a demo and test
client for `gasrules listen`; loopback by default).

    .venv/bin/python tools/mllp_send.py tools/demo/hl7/batch.hl7 --port 2575
"""

from __future__ import annotations

import argparse
import socket
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "engine"))


def main(argv: list[str] | None = None) -> int:
    from gasrules.integration.hl7wire import MllpDecoder, frame, split_raw

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("file", type=Path)
    ap.add_argument("--host", default="127.0.0.1")
    ap.add_argument("--port", type=int, default=2575)
    ap.add_argument("--timeout", type=float, default=30.0)
    args = ap.parse_args(argv)
    messages = list(split_raw(args.file.read_bytes()))
    decoder = MllpDecoder(max_frame=1 << 24)
    worst = 0
    with socket.create_connection((args.host, args.port), timeout=args.timeout) as sock:
        for raw in messages:
            sock.sendall(frame(raw))
            acks: list[bytes] = []
            while not acks:
                data = sock.recv(65536)
                if not data:
                    print("the listener closed the connection", file=sys.stderr)
                    return 1
                acks = decoder.feed(data)
            text = acks[0].decode("utf-8", "replace")
            print(text.replace("\r", "\n").strip() + "\n")
            worst = max(worst, 0 if "MSA|AA|" in text else 1)
    return worst


if __name__ == "__main__":
    sys.exit(main())
