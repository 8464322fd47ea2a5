"""Fallback load generator (when wrk cannot be installed): asyncio, raw HTTP/1.1 keep-alive.

Usage: aioload.py URL BODIES_JSONL CONNECTIONS SECONDS RESULT_JSON. Writes the same JSON as
the wrk script in loadgen.py. Plain sockets rather than an HTTP client library keep its own
CPU cost low, since it shares the cores with the server it measures.
"""

from __future__ import annotations

import asyncio
import json
import sys
import time
from urllib.parse import urlsplit


async def _client(
    host: str,
    port: int,
    requests: list[bytes],
    start: int,
    until: float,
    latencies: list[float],
    errors: dict[str, int],
) -> None:
    try:
        reader, writer = await asyncio.open_connection(host, port)
    except OSError:
        errors["connect"] += 1
        return
    i = start
    try:
        while time.perf_counter() < until:
            req = requests[i % len(requests)]
            i += 1
            sent = time.perf_counter()
            writer.write(req)
            head = await reader.readuntil(b"\r\n\r\n")
            status = int(head.split(b" ", 2)[1])
            length = 0
            for line in head.split(b"\r\n"):
                if line[:15].lower() == b"content-length:":
                    length = int(line[15:])
            await reader.readexactly(length)
            latencies.append(time.perf_counter() - sent)
            if status >= 400:
                errors["status"] += 1
    except (OSError, asyncio.IncompleteReadError):
        errors["read"] += 1
    finally:
        writer.close()


async def main(url: str, bodies_path: str, connections: int, seconds: float, out_path: str) -> None:
    parts = urlsplit(url)
    host, port = parts.hostname or "127.0.0.1", parts.port or 80
    requests = []
    with open(bodies_path, "rb") as src:
        for line in src:
            body = line.rstrip(b"\n")
            requests.append(
                b"POST /v1/predict HTTP/1.1\r\nHost: %s:%d\r\nContent-Type: application/json\r\n"
                b"Content-Length: %d\r\n\r\n%s" % (host.encode(), port, len(body), body)
            )
    latencies: list[float] = []
    errors = {"connect": 0, "read": 0, "write": 0, "status": 0, "timeout": 0}
    started = time.perf_counter()
    until = started + seconds
    await asyncio.gather(
        *(_client(host, port, requests, k * 7919, until, latencies, errors) for k in range(connections))
    )
    duration = time.perf_counter() - started
    lat = sorted(latencies) or [0.0]

    def pct(p: float) -> int:
        return round(lat[min(len(lat) - 1, int(p / 100 * len(lat)))] * 1e6)

    result = {
        "requests": len(latencies),
        "duration_us": round(duration * 1e6),
        "bytes": 0,
        "errors": errors,
        "latency_us": {
            "mean": sum(lat) / len(lat) * 1e6,
            "p50": pct(50),
            "p90": pct(90),
            "p95": pct(95),
            "p99": pct(99),
            "max": round(lat[-1] * 1e6),
        },
    }
    with open(out_path, "w") as out:
        json.dump(result, out)


if __name__ == "__main__":
    asyncio.run(main(sys.argv[1], sys.argv[2], int(sys.argv[3]), float(sys.argv[4]), sys.argv[5]))
