"""Soak: ten minutes of mixed load against a real ``textsieve serve`` (``make soak``; not in
``make test``).

What runs: the demo's help-desk model (built as ``make bench`` builds it) published three
times into a fresh folder registry — version 1 live, version 2 swapped in and out by a promote /
rollback through the admin API every ``--swap-every`` seconds, version 3 a candidate that some
requests pin. ``--clients`` concurrent clients loop until the time is up, each request drawn
from this mix:

    62 %  predict, 1–64 texts of 5–60 tokens, spans 0–5
     5 %  predict pinned to the candidate (version 3)
     5 %  bad input (empty list, unknown field, empty text, malformed JSON): must be 4xx problem+json
    14 %  registry views (models, one model, its versions, one version)
    14 %  /readyz, /metrics, /healthz

Clients behave as the README asks callers to: a ``503`` refusal with ``Retry-After`` (the
replica's overload bounds, on a machine busy with other work) is waited out and retried, up to
three times; refusals are counted on their own row, not as errors.

What it prints: requests by kind and status, refusals, the error count (any failure, or any
status other than the expected one), throughput, and the server's resident memory (VmRSS from /proc, summed
over the server and its worker processes; the median of the 30 s after the warm-up and of the
last 30 s). Exit status 0 only when there was
no error, memory stayed within ``--memory-tolerance`` (10 %) of its post-warm-up value, and
the server then stopped cleanly on SIGTERM.

    make soak                                                   # 10 minutes
    .venv/bin/python bench/soak.py --seconds 120 --warmup 30    # a short try
"""

from __future__ import annotations

import argparse
import asyncio
import collections
import hashlib
import json
import os
import random
import secrets
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402  (bench/ is a folder of scripts: its path is added just above)
from servers import free_port, process_tree  # noqa: E402
from texts import bench_texts  # noqa: E402

MODEL = demo_model.MODEL_NAME
WINDOW = 30.0  # seconds of memory samples (one every 5 s) summarised at each end
RETRIES = 3  # refusals waited out per request before its last try counts whatever it gets
MIX = [("predict", 62), ("pinned", 5), ("bad", 5), ("view", 14), ("probe", 14)]
BAD_BODIES = [
    b'{"texts": []}',
    b'{"texts": ["a"], "span": 2}',
    b'{"texts": [""]}',
    b'{"texts": ["a"',
    b'{"texts": ["a"], "version": 99}',
]


@dataclass
class Tally:
    counts: collections.Counter[tuple[str, str]] = field(default_factory=collections.Counter)
    errors: list[str] = field(default_factory=list)
    texts: int = 0

    def record(self, kind: str, outcome: str, ok: bool, detail: str = "") -> None:
        self.counts[(kind, outcome)] += 1
        if not ok and len(self.errors) < 1000:
            self.errors.append(f"{kind}: {outcome} {detail[:200]}")


def _variant(bundle: Path, dst: Path, n: int) -> Path:
    """A copy of ``bundle`` that differs only in its model card, so it publishes as a new version."""
    shutil.copytree(bundle, dst)
    (dst / "card.md").write_text(
        (bundle / "card.md").read_text(encoding="utf-8") + f"\n\nSoak copy {n}.\n", encoding="utf-8"
    )
    manifest = json.loads((dst / "manifest.json").read_text(encoding="utf-8"))
    manifest["files"] = {name: hashlib.sha256((dst / name).read_bytes()).hexdigest() for name in manifest["files"]}
    (dst / "manifest.json").write_text(json.dumps(manifest, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    return dst


def _registry(work: Path, bundle: Path) -> Path:
    from textsieve.registry import open_registry

    folder = work / "registry"
    with open_registry(folder) as reg:
        for n in (1, 2, 3):
            reg.publish(_variant(bundle, work / f"bundle-{n}", n), MODEL, actor="soak")
        reg.promote(MODEL, 1, "live", reason="soak start", actor="soak", force=True)
        reg.promote(MODEL, 3, "candidate", reason="pinned by the soak", actor="soak")
    return folder


def _rss_bytes(pid: int) -> int:
    """Resident memory of the server and its worker processes, summed."""
    total = 0
    for p in process_tree(pid):
        try:
            for line in Path(f"/proc/{p}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1]) * 1024
        except OSError:
            continue  # a worker being replaced
    if not total:
        raise RuntimeError("no VmRSS in /proc")
    return total


def _refusal(r: Any) -> float | None:
    """The seconds a 503 refusal asks the caller to wait (its Retry-After), or None if ``r`` is not one."""
    if r.status_code != 503 or r.headers.get("content-type") != "application/problem+json":
        return None
    retry_after = r.headers.get("retry-after", "")
    return float(retry_after) if retry_after.isdigit() else None


async def _send(http: Any, method: str, path: str, tally: Tally, kind: str, **kw: Any) -> Any:
    """One request as a well-behaved caller sends it: a 503 refusal with Retry-After (the replica's
    overload bounds, SECURITY.md) is waited out and retried, up to RETRIES times; each refusal is
    counted (kind "refused"), not as an error. Any other answer is returned."""
    for _ in range(RETRIES):
        r = await http.request(method, path, **kw)
        wait = _refusal(r)
        if wait is None:
            return r
        tally.record("refused", f"{kind} 503", True)
        await asyncio.sleep(wait)
    return await http.request(method, path, **kw)


async def _client(http: Any, rng: random.Random, pool: list[str], until: float, tally: Tally) -> None:
    kinds, weights = zip(*MIX, strict=True)
    while time.monotonic() < until:
        kind = rng.choices(kinds, weights)[0]
        try:
            if kind in ("predict", "pinned"):
                texts = rng.sample(pool, rng.randint(1, 64))
                body: dict[str, Any] = {"texts": texts, "spans": rng.randint(0, 5)}
                if kind == "pinned":
                    body["version"] = 3
                r = await _send(http, "POST", "/v1/predict", tally, kind, json=body)
                ok = r.status_code == 200 and len(r.json()["results"]) == len(texts)
                tally.texts += len(texts) if ok else 0
            elif kind == "bad":
                r = await _send(
                    http,
                    "POST",
                    "/v1/predict",
                    tally,
                    kind,
                    content=rng.choice(BAD_BODIES),
                    headers={"content-type": "application/json"},
                )
                ok = 400 <= r.status_code < 500 and r.headers.get("content-type") == "application/problem+json"
            elif kind == "view":
                path = rng.choice(
                    [
                        "/v1/models",
                        f"/v1/models/{MODEL}",
                        f"/v1/models/{MODEL}/versions",
                        f"/v1/models/{MODEL}/versions/{rng.randint(1, 3)}",
                    ]
                )
                r = await _send(http, "GET", path, tally, kind)
                ok = r.status_code == 200
            else:
                r = await http.get(rng.choice(["/readyz", "/metrics", "/healthz"]))  # never refused
                ok = r.status_code == 200
            tally.record(kind, str(r.status_code), ok, "" if ok else r.text)
        except Exception as exc:  # noqa: BLE001 - every failure is counted and reported, none stops the soak
            tally.record(kind, type(exc).__name__, False, str(exc))


async def _swapper(http: Any, token: str, every: float, until: float, tally: Tally) -> None:
    promote = True
    while time.monotonic() + every < until:
        await asyncio.sleep(every)
        if promote:
            r = await _send(
                http,
                "POST",
                f"/v1/models/{MODEL}/versions/2/promote",
                tally,
                "promote",
                headers={"Authorization": f"Bearer {token}"},
                json={"to": "live", "reason": "soak swap", "force": True},
            )
        else:
            r = await _send(
                http,
                "POST",
                f"/v1/models/{MODEL}/rollback",
                tally,
                "rollback",
                headers={"Authorization": f"Bearer {token}"},
                json={"reason": "soak swap back"},
            )
        ok = r.status_code == 200 and r.json()["serving"]["version"] == (2 if promote else 1)
        tally.record("promote" if promote else "rollback", str(r.status_code), ok, r.text)
        promote = not promote


async def _memory(pid: int, began: float, warmup: float, until: float, samples: list[tuple[float, int]]) -> None:
    while time.monotonic() < until:
        samples.append((time.monotonic() - began, _rss_bytes(pid)))
        await asyncio.sleep(5 if time.monotonic() - began > warmup else 1)
    samples.append((time.monotonic() - began, _rss_bytes(pid)))


async def _soak(
    url: str, pid: int, args: argparse.Namespace, token: str
) -> tuple[Tally, list[tuple[float, int]], float]:
    import httpx

    pool = bench_texts(5000, seed=11)
    tally = Tally()
    samples: list[tuple[float, int]] = []
    began = time.monotonic()
    until = began + args.seconds
    # A kept-alive connection is reused only while the server will still keep it: httpx's default
    # idle expiry (5 s) equals the server's TEXTSIEVE_KEEPALIVE_SECONDS, and a request sent just as
    # the server closes the idle connection fails on the client side (ReadError /
    # RemoteProtocolError, never reaching the server). Expiring a second earlier avoids that race.
    keepalive = float(os.environ.get("TEXTSIEVE_KEEPALIVE_SECONDS", "5"))
    limits = httpx.Limits(max_connections=args.clients + 2, keepalive_expiry=max(0.5, keepalive - 1.0))
    async with httpx.AsyncClient(base_url=url, timeout=60, limits=limits) as http:
        await asyncio.gather(
            _memory(pid, began, args.warmup, until, samples),
            _swapper(http, token, args.swap_every, until, tally),
            *(_client(http, random.Random(i), pool, until, tally) for i in range(args.clients)),
        )
    return tally, samples, time.monotonic() - began


def _wait_ready(url: str, proc: subprocess.Popen[bytes], timeout: float = 120) -> None:
    import httpx

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise SystemExit(f"soak: the server exited with {proc.returncode}")
        try:
            if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.2)
    raise SystemExit(f"soak: the server was not ready after {timeout:.0f} s")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seconds", type=float, default=600.0, help="how long the load runs (default 600)")
    p.add_argument("--warmup", type=float, default=60.0, help="seconds before the memory baseline (default 60)")
    p.add_argument("--clients", type=int, default=16)
    p.add_argument("--swap-every", type=float, default=30.0, help="seconds between promote/rollback (default 30)")
    p.add_argument("--memory-tolerance", type=float, default=0.10, help="allowed relative change (default 0.10)")
    p.add_argument("--keep", action="store_true", help="keep the work folder (registry, server log)")
    args = p.parse_args(argv)
    if args.warmup + 2 * WINDOW > args.seconds:
        p.error(f"--seconds must leave {2 * WINDOW:.0f} s after --warmup for the memory baseline and the end")

    model = demo_model.ensure_model()
    work = Path(tempfile.mkdtemp(prefix="textsieve-soak-"))
    token = secrets.token_urlsafe(24)
    registry = _registry(work, model.bundle)
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    env = {k: v for k, v in os.environ.items() if not k.startswith("TEXTSIEVE_")}
    env.update({"TEXTSIEVE_ADMIN_TOKEN": token, "TEXTSIEVE_ACCESS_LOG": "false", "TEXTSIEVE_POLL_SECONDS": "1"})
    log = work / "server.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "textsieve.cli",
                "serve",
                "--registry",
                str(registry),
                "--host",
                "127.0.0.1",
                "--port",
                str(port),
            ],
            stdout=out,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            env=env,
        )
    try:
        _wait_ready(url, proc)
        print(
            f"soak: {args.seconds:.0f} s of mixed load, {args.clients} clients, model {MODEL} "
            f"({model.source}), server pid {proc.pid}; work folder {work}",
            flush=True,
        )
        tally, samples, elapsed = asyncio.run(_soak(url, proc.pid, args, token))
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
        try:
            code = proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            proc.kill()
            code = proc.wait()

    total = sum(tally.counts.values())
    print(
        f"\nrequests: {total} in {elapsed:.0f} s ({total / elapsed:.0f}/s), texts scored: {tally.texts} "
        f"({tally.texts / elapsed:.0f}/s)"
    )
    for kind, _ in [*MIX, ("promote", 0), ("rollback", 0), ("refused", 0)]:
        row = {outcome: n for (k, outcome), n in sorted(tally.counts.items()) if k == kind}
        if row:
            print(f"  {kind:9s} {sum(row.values()):8d}  " + "  ".join(f"{o}: {n}" for o, n in row.items()))
    print(f"errors: {len(tally.errors)}")
    for line in tally.errors[:10]:
        print(f"  {line}")

    # Medians over 30 s at each end: the resident size moves by several MiB from one sample to
    # the next as batches come and go, and one sample at either end would judge that noise.
    first = [rss for t, rss in samples if args.warmup <= t <= args.warmup + WINDOW] or [samples[0][1]]
    last = [rss for t, rss in samples if t >= elapsed - WINDOW] or [samples[-1][1]]
    start, end = statistics.median(first), statistics.median(last)
    change = (end - start) / start
    flat = abs(change) <= args.memory_tolerance
    print(
        f"memory (VmRSS, median of {WINDOW:.0f} s): {start / 2**20:.1f} MiB after the {args.warmup:.0f} s warm-up, "
        f"{end / 2**20:.1f} MiB at the end ({change:+.1%}; {'flat' if flat else 'NOT flat'} within "
        f"±{args.memory_tolerance:.0%}); peak {max(r for _, r in samples) / 2**20:.1f} MiB"
    )
    print(f"server exit status after SIGTERM: {code}")
    if not args.keep and not tally.errors and code == 0:
        shutil.rmtree(work, ignore_errors=True)
    else:
        print(f"work folder kept: {work} (server log: {log})")
    return 0 if (not tally.errors and flat and code == 0) else 1


if __name__ == "__main__":
    raise SystemExit(main())
