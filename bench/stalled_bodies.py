"""The stalled-body attack against one replica with default settings (not in ``make test``).

``--connections`` clients each declare a ``--declared``-byte body, send all but
``--held-back`` bytes of it, and stall. Without a budget every such body is buffered until the
client goes away; with ``TEXTSIEVE_BODY_BUDGET_BYTES`` the replica holds at most the budget and
refuses the rest at once, and the read deadline closes the stalled ones. Prints the server's
resident memory (server process plus its workers) idle, while the attack holds, and after the
read deadline, and how the connections were answered.

    .venv/bin/python bench/stalled_bodies.py            # 150 x 4,000,000 bytes, 100,000 held back
"""

from __future__ import annotations

import argparse
import select
import socket
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402  (bench/ is a folder of scripts: its path is added just above)
from servers import free_port, process_tree, start  # noqa: E402


def rss_mb(pid: int) -> float:
    total = 0
    for p in process_tree(pid):
        try:
            for line in Path(f"/proc/{p}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1])
        except OSError:
            pass
    return total / 1024


def answer(s: socket.socket, timeout: float) -> bytes:
    ready, _, _ = select.select([s], [], [], timeout)
    if not ready:
        return b""
    try:
        return s.recv(4096)
    except OSError:
        return b"(reset)"


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--connections", type=int, default=150)
    p.add_argument("--declared", type=int, default=4_000_000)
    p.add_argument("--held-back", type=int, default=100_000)
    p.add_argument("-v", action="store_true", help="print the end of the server log")
    args = p.parse_args()
    model = demo_model.ensure_model()
    with tempfile.TemporaryDirectory(prefix="textsieve-stalled-") as tmp:
        registry = demo_model.live_registry(model, Path(tmp) / "registry")
        port = free_port()
        cmd = [sys.executable, "-m", "textsieve.cli", "serve", "--registry", str(registry), "--port", str(port)]
        server = start(
            "textsieve", cmd, "/readyz", port, Path(tmp) / "server.log", env={"TEXTSIEVE_ACCESS_LOG": "false"}
        )
        socks: list[socket.socket] = []
        try:
            time.sleep(2)
            idle = rss_mb(server.proc.pid)
            head = (
                f"POST /v1/predict HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\n"
                f"Content-Length: {args.declared}\r\n\r\n"
            ).encode()
            body = b" " * (args.declared - args.held_back)
            refused = admitted = 0
            started = time.monotonic()
            for _ in range(args.connections):
                s = socket.create_connection(("127.0.0.1", port), timeout=30)
                socks.append(s)
                s.sendall(head)
                if answer(s, 0.2):
                    refused += 1
                    continue
                try:
                    s.sendall(body)
                    admitted += 1
                except OSError:
                    refused += 1
            time.sleep(1)
            held = rss_mb(server.proc.pid)
            print(f"stalled bodies: {args.connections} connections x {args.declared:,} bytes declared")
            print(f"  admitted and stalled {admitted}, refused at once {refused} ({time.monotonic() - started:.1f} s)")
            print(f"  memory (server + workers, RSS): idle {idle:.0f} MB, during the attack {held:.0f} MB")
            timed_out = sum(1 for s in socks if answer(s, 20).startswith(b"HTTP/1.1 408"))
            for s in socks:
                s.close()
            time.sleep(2)
            after = rss_mb(server.proc.pid)
            print(f"  answered 408 after the read deadline: {timed_out}")
            print(f"  memory after: {after:.0f} MB ({(after / idle - 1) * 100:+.1f} % of idle)")
            print(Path(tmp, "server.log").read_text(errors="replace")[-1500:]) if "-v" in sys.argv else None
            return 0 if after <= idle * 1.10 else 1
        finally:
            for s in socks:
                s.close()
            server.stop()


if __name__ == "__main__":
    raise SystemExit(main())
