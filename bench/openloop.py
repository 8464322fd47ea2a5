"""Open-loop load: requests sent at a fixed rate whatever the server does, latency counted from
each request's intended send time.

    openloop.py URL BODIES_JSONL RATE SECONDS CONNECTIONS RESULT_JSON

A closed-loop client (wrk, aioload.py) waits for a reply before it sends its next request, so a
server that stalls for 100 ms also stops the clock of every request that would have arrived in
those 100 ms: they are sent late and timed from then, and the stall barely shows in the
percentiles ("coordinated omission", Tene, "How NOT to Measure Latency", 2015). Here request
``i`` is due at ``start + i / RATE``; its latency runs from that moment to the last byte of its
reply, whether the delay was spent waiting for a free connection, in this client's event loop
or in the server. How late the client itself was in sending (``send_lag_ms``) is reported, so a
client that could not keep up is seen rather than blamed on the server.

Up to CONNECTIONS requests are in flight at once on kept-alive connections; a request due while
all are busy waits for one (and that wait counts). Raw HTTP/1.1 through an asyncio protocol,
uvloop when installed: the client shares the cores with the server it measures and must cost little.
"""

from __future__ import annotations

import asyncio
import gc
import json
import sys
import time
from typing import Any
from urllib.parse import urlsplit

PERCENTILES = (50, 90, 99, 99.9)


def percentile(sorted_values: list[float], p: float) -> float:
    """Nearest-rank percentile (the smallest value with at least p % of the values at or below it)."""
    if not sorted_values:
        return float("nan")
    rank = max(1, -(-len(sorted_values) * p // 100))  # ceil(n p / 100)
    return sorted_values[min(len(sorted_values), int(rank)) - 1]


class Connection(asyncio.Protocol):
    """One kept-alive HTTP/1.1 connection, one request at a time (a protocol, not streams: cheaper)."""

    def __init__(self, host: str, port: int) -> None:
        self.host, self.port = host, port
        self.transport: Any = None  # an asyncio.Transport, or uvloop's, which is not a subclass of it
        self.buffer = bytearray()
        self.need = -1  # bytes of the reply (head and body) once its head is in; -1 before
        self.status = 0
        self.close_after = False
        self.reply: asyncio.Future[int] | None = None

    async def exchange(self, request: bytes) -> int:
        """Send one request, read its whole reply; the HTTP status."""
        loop = asyncio.get_running_loop()
        if self.transport is None or self.transport.is_closing():
            await loop.create_connection(lambda: self, self.host, self.port)
        if self.transport is None:
            raise ConnectionError("not connected")
        self.buffer.clear()
        self.need = -1
        self.reply = loop.create_future()
        self.transport.write(request)
        status = await self.reply
        if self.close_after:
            self.close()
        return status

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        self.transport = transport

    def data_received(self, data: bytes) -> None:
        self.buffer += data
        if self.need < 0:
            end = self.buffer.find(b"\r\n\r\n")
            if end < 0:
                return
            head = bytes(self.buffer[:end])
            length = 0
            self.close_after = False
            for line in head.split(b"\r\n")[1:]:
                name, _, value = line.partition(b":")
                name = name.strip().lower()
                if name == b"content-length":
                    length = int(value)
                elif name == b"connection" and value.strip().lower() == b"close":
                    self.close_after = True
            self.status = int(head.split(b" ", 2)[1])
            self.need = end + 4 + length
        if len(self.buffer) >= self.need and self.reply is not None and not self.reply.done():
            self.reply.set_result(self.status)

    def connection_lost(self, exc: Exception | None) -> None:
        self.transport = None
        if self.reply is not None and not self.reply.done():
            self.reply.set_exception(ConnectionError("connection closed before the whole reply"))

    def close(self) -> None:
        if self.transport is not None:
            self.transport.close()
        self.transport = None


async def run(url: str, bodies: list[bytes], rate: float, seconds: float, connections: int) -> dict[str, object]:
    parts = urlsplit(url)
    host, port = parts.hostname or "127.0.0.1", parts.port or 80
    path = (parts.path or "/").encode()
    requests = [
        b"POST %s HTTP/1.1\r\nHost: %s:%d\r\nContent-Type: application/json\r\nContent-Length: %d\r\n\r\n%s"
        % (path, host.encode(), port, len(body), body)
        for body in bodies
    ]
    free: asyncio.Queue[Connection] = asyncio.Queue()
    for _ in range(connections):
        free.put_nowait(Connection(host, port))
    latencies: list[float] = []
    lags: list[float] = []
    errors = {"connect": 0, "read": 0, "status": 0, "timeout": 0}
    statuses: dict[int, int] = {}

    async def one(i: int, due: float) -> None:
        lags.append(time.perf_counter() - due)  # this client's own lateness; waiting for a connection is not
        conn = await free.get()
        try:
            status = await conn.exchange(requests[i % len(requests)])
        except (OSError, ValueError, IndexError):  # refused, reset, or a reply that is not HTTP
            errors["read"] += 1
            return
        finally:
            free.put_nowait(conn)
        statuses[status] = statuses.get(status, 0) + 1
        if status >= 400:
            errors["status"] += 1
            return
        latencies.append(time.perf_counter() - due)

    # Only the requests in flight are held (a set the done ones leave), and the end is one future:
    # holding every task of the run made each of the client's own cyclic-GC passes walk tens of
    # thousands of them (pauses of 50-150 ms, counted as the server's latency), and waiting for
    # them all with asyncio.wait stalled the client for ~80 ms at the end (bench/README.md).
    pending: set[asyncio.Future[None]] = set()
    all_done = asyncio.get_running_loop().create_future()
    sending = True

    def finished(task: asyncio.Future[None]) -> None:
        pending.discard(task)
        if not pending and not sending and not all_done.done():
            all_done.set_result(None)

    total = int(rate * seconds)
    gc.collect()
    gc.freeze()  # what was built before the window is never walked again by the collector
    start = time.perf_counter() + 0.05
    for i in range(total):
        due = start + i / rate
        delay = due - time.perf_counter()
        if delay > 0:
            await asyncio.sleep(delay)
        task = asyncio.ensure_future(one(i, due))
        pending.add(task)
        task.add_done_callback(finished)
    sent_by = time.perf_counter()
    sending = False
    if pending:
        try:
            await asyncio.wait_for(all_done, timeout=30.0)
        except TimeoutError:
            for late in list(pending):
                late.cancel()
                errors["timeout"] += 1
    duration = time.perf_counter() - start
    ms = sorted(x * 1000 for x in latencies)
    lag_ms = sorted(x * 1000 for x in lags)
    while not free.empty():
        free.get_nowait().close()
    return {
        "rate": rate,
        "requests": total,
        "answered": len(latencies),
        "duration_s": round(duration, 3),
        "send_seconds": round(sent_by - start, 3),
        "connections": connections,
        "errors": errors,
        "statuses": {str(k): v for k, v in sorted(statuses.items())},
        "latency_ms": {
            "mean": round(sum(ms) / len(ms), 3) if ms else float("nan"),
            **{f"p{p:g}": round(percentile(ms, p), 3) for p in PERCENTILES},
            "max": round(ms[-1], 3) if ms else float("nan"),
        },
        "send_lag_ms": {f"p{p:g}": round(percentile(lag_ms, p), 3) for p in (50, 99)},
    }


def main(argv: list[str]) -> int:
    url, bodies_path, rate, seconds, connections, out_path = argv
    with open(bodies_path, "rb") as src:
        bodies = [line.rstrip(b"\n") for line in src if line.strip()]
    try:
        import uvloop

        runner = uvloop.run
    except ImportError:  # the asyncio loop also works, at some more CPU per request
        runner = asyncio.run
    result = runner(run(url, bodies, float(rate), float(seconds), int(connections)))
    with open(out_path, "w") as out:
        json.dump(result, out)
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
