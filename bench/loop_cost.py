"""What the service's app costs the event loop per request, in-process, with no HTTP and no model.

    .venv/bin/python bench/loop_cost.py [--requests 20000] [--texts 1] [--floor]
    .venv/bin/python bench/loop_cost.py --instructions [--requests 2000]   # needs valgrind

The app (``create_app``, the predict lane, the batcher, the access log and metrics, as
``textsieve serve`` configures them) is called as an ASGI callable by 32 in-process clients, each
sending its next request when the last is answered; the worker processes are loaded as in the
server, but once one real reply has been read, each batch is answered at the worker's pipe with
copies of it (the loop still pickles each batch and reads, unpickles and routes each reply), so
what is counted is the app's own Python, the loop's side of the pipe included: validation, the
lane, the batcher's queue and dispatch, routing the replies, the access log, the metrics.
``--floor`` calls the HTTP floor's app (bench/http_floor.py: the same body parsed and validated, a
fixed reply) the same way.

By default it prints CPU µs per request (process CPU time over the window). Machine speed moves
that by ±20 % between runs here, so ``--instructions`` runs the same under valgrind's callgrind
with instrumentation switched on for the measured window only and prints instructions per
request, which repeat within ~1 % from run to run: the figure to compare two versions of the
loop's code by (bench/README.md, "The loop's own work"). It takes about a minute.
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import logging
import os
import shutil
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import callgrind  # noqa: E402
import demo_model  # noqa: E402
from run import SPANS, bodies  # noqa: E402
from texts import bench_texts  # noqa: E402

CLIENTS = 32


async def one_request(app: Any, body: bytes, client: int) -> int:
    """One ``POST /v1/predict`` through ``app``; its status."""
    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": "POST",
        "scheme": "http",
        "path": "/v1/predict",
        "raw_path": b"/v1/predict",
        "query_string": b"",
        "root_path": "",
        "headers": [
            (b"host", b"bench"),
            (b"content-type", b"application/json"),
            (b"content-length", str(len(body)).encode()),
        ],
        "client": ("127.0.0.1", 1000 + client),
        "server": ("127.0.0.1", 8000),
        "state": {},
    }
    messages = [{"type": "http.request", "body": body, "more_body": False}]
    status: list[int] = []

    async def receive() -> dict[str, Any]:
        if messages:
            return messages.pop()
        await asyncio.sleep(3600)  # the client never goes away
        raise AssertionError("unreachable")

    async def send(message: dict[str, Any]) -> None:
        if message["type"] == "http.response.start":
            status.append(message["status"])

    await app(scope, receive, send)
    return status[0] if status else 0


async def drive(app: Any, body_list: list[bytes], total: int) -> None:
    """``total`` requests through ``app`` from CLIENTS closed-loop clients."""
    done = 0

    async def client(i: int) -> None:
        nonlocal done
        k = i
        while done < total:
            status = await one_request(app, body_list[k % len(body_list)], i)
            if status != 200:
                raise RuntimeError(f"request answered {status}; raise TEXTSIEVE_QUEUE_WAIT_MS if it was 503")
            k += CLIENTS
            done += 1

    await asyncio.gather(*(client(i) for i in range(CLIENTS)))


def _callgrind(on: bool) -> None:
    if os.environ.get("LOOP_COST_CALLGRIND"):
        callgrind.instrument(on)


def _flush_logs() -> None:
    """Make and write every pending log line now, so that the window counts its own lines only."""
    for handler in logging.getLogger("textsieve").handlers:
        handler.flush()


async def measure(app: Any, body_list: list[bytes], requests: int) -> float:
    """CPU seconds of this process per request over ``requests`` requests (after a warm-up)."""
    await drive(app, body_list, 2000)
    gc.freeze()  # as the server does once started (service/cli.py)
    _flush_logs()
    _callgrind(True)
    started = time.process_time()
    await drive(app, body_list, requests)
    _flush_logs()
    spent = time.process_time() - started
    _callgrind(False)
    return spent / requests


async def service(body_list: list[bytes], requests: int) -> float:
    from textsieve.service import logs
    from textsieve.service.settings import load_settings
    from textsieve.service.web.app import create_app

    model = demo_model.ensure_model()
    folder = demo_model.CACHE / "work" / f"registry-loop-cost-{os.getpid()}"  # runs side by side apart
    registry = demo_model.live_registry(model, folder)
    logs.configure()  # as `textsieve serve` does: the access log's lines are made, then dropped here
    sink = open(os.devnull, "w")  # noqa: SIM115 - lives as long as the process
    for handler in logging.getLogger("textsieve").handlers:
        if isinstance(handler, logs.BatchedLineHandler):
            handler.stream = sink
    app = create_app(load_settings(host="127.0.0.1", port=1, registry=str(registry)))
    async with app.router.lifespan_context(app):
        while not app.state.models.readiness()[0]:
            await asyncio.sleep(0.1)
        procs = app.state.pool.procs
        if procs is None:
            raise SystemExit("needs TEXTSIEVE_INFERENCE=processes (the default)")
        answer_from_copies(asyncio.get_running_loop())
        try:
            return await measure(app, body_list, requests)
        finally:
            stop_answering_from_copies()
            shutil.rmtree(folder, ignore_errors=True)


real_submit: Any = None


def answer_from_copies(loop: asyncio.AbstractEventLoop) -> None:
    """Each worker's replies made from copies of its first real one, fed to the loop as if read off
    the pipe: the loop still pickles each batch, reads, unpickles and routes each reply as in the
    server, and no worker computes. Until a worker's first reply has come back, and while a real
    batch is still in its pipe, batches go to the real worker (its replies come back in order)."""
    global real_submit
    import struct
    from concurrent.futures import Future
    from multiprocessing.reduction import ForkingPickler

    import orjson

    from textsieve.service.inference import workers

    real_submit = workers._Worker.submit
    first: dict[Any, Any] = {}  # key -> the first real reply's value
    real: dict[int, int] = {}  # worker index -> real batches in its pipe
    framed: dict[Any, bytes] = {}  # (key, shape) -> the copied reply as the worker would write it

    def copy_of(msg: Any) -> bytes:
        value = first[msg.key]
        replies, tokens, unknown, truncated, best, top, counts = value
        n = len(msg.texts)
        shape = tuple(msg.pieces) if hasattr(msg, "pieces") else n
        if (msg.key, shape) not in framed:
            if hasattr(msg, "pieces"):  # a reply body a piece of the batch (since 2026-12-05)
                first_body = replies[0]
                head = first_body[: first_body.index(b'"results":') + len(b'"results":')]
                one = orjson.dumps(orjson.loads(first_body)["results"][0])
                copies = [head + b"[" + b",".join([one] * k) + b"]}" for k in msg.pieces]
            else:  # a reply a text
                copies = [replies[0]] * n
            reply = (copies, tokens, unknown, truncated, best[:4] * n, top[:8] * n, counts)
            body = ForkingPickler.dumps((workers.Outcome.OK.value, reply))
            framed[msg.key, shape] = struct.pack("!i", len(body)) + bytes(body)
        return framed[msg.key, shape]

    def submit(self: Any, msg: Any, payload: Any = None, waiter: Any = None, *, wait: bool = True) -> Any:
        if isinstance(msg, workers.Run) and msg.key in first and not real.get(self.index):
            fut = Future() if waiter is None else waiter
            replies = self.replies
            with self.send_lock:
                replies.pending.append(fut)
            loop.call_soon(replies.feed, copy_of(msg))
            return self.generation, fut
        gen, fut = real_submit(self, msg, payload, waiter, wait=wait)
        if isinstance(msg, workers.Run):
            real[self.index] = real.get(self.index, 0) + 1

            def arrived(f: Any, key: Any = msg.key, index: int = self.index) -> None:
                real[index] -= 1
                if not f.cancelled() and f.exception() is None and f.result()[0] == workers.Outcome.OK:
                    first.setdefault(key, f.result()[1])

            fut.add_done_callback(arrived)
        return gen, fut

    workers._Worker.submit = submit  # type: ignore[method-assign]


def stop_answering_from_copies() -> None:
    from textsieve.service.inference import workers

    workers._Worker.submit = real_submit  # type: ignore[method-assign]


async def floor(body_list: list[bytes], requests: int) -> float:
    from http_floor import fixed_reply, make_app

    from textsieve.service.settings import load_settings

    return await measure(make_app(fixed_reply(600), load_settings(host="127.0.0.1", port=1)), body_list, requests)


def under_callgrind(argv: list[str], requests: int) -> int:
    """This script again under callgrind, instrumented only while measuring: instructions a request."""
    if not callgrind.available():
        return 2
    out = demo_model.CACHE / "work" / f"loop-cost-{os.getpid()}.callgrind"  # callgrind_annotate reads it
    out.parent.mkdir(parents=True, exist_ok=True)
    env = os.environ | {
        "LOOP_COST_CALLGRIND": "1",
        "PYTHONMALLOC": "malloc",  # valgrind sees every allocation
        # Under valgrind time runs ~30x slower: no batch wait, no scheduling switches, no overload
        # refusals, so that the same requests take the same path in every run.
        "TEXTSIEVE_BATCH_WAIT_MS": "0",
        "TEXTSIEVE_WORKER_SCHEDULING": "normal",
        "TEXTSIEVE_QUEUE_WAIT_MS": "60000",
    }
    args = [a for a in argv if a != "--instructions"]
    counted = callgrind.collected([sys.executable, __file__, *args], env, str(out))
    if counted is None:
        return 1
    print(f"{counted / requests:,.0f} instructions a request (callgrind, {requests} requests; {out})")
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--requests", type=int, default=None, help="measured requests (20000; 2000 with --instructions)"
    )
    parser.add_argument("--texts", type=int, default=1, help="texts per request")
    parser.add_argument("--floor", action="store_true", help="the HTTP floor's app instead of the service's")
    parser.add_argument("--instructions", action="store_true", help="count instructions under callgrind")
    args = parser.parse_args(argv)
    requests = args.requests or (2000 if args.instructions else 20000)
    if args.instructions:
        return under_callgrind([*(sys.argv[1:] if argv is None else argv), "--requests", str(requests)], requests)
    body_list = bodies(bench_texts(4096), args.texts, SPANS)
    run = floor if args.floor else service
    per_request = asyncio.run(run(body_list, requests))
    if not os.environ.get("LOOP_COST_CALLGRIND"):
        what = "HTTP floor's app" if args.floor else "service's app (workers answered from a copy)"
        print(f"{what}: {per_request * 1e6:.1f} CPU-µs a request over {requests} requests of {args.texts} text(s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
