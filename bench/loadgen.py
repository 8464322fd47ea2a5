"""Closed-loop HTTP load on loopback: N connections, each sending its next request as soon as the
last reply arrived, cycling through prepared request bodies.

The load generator shares the 2 cores with the server, so it must cost little: wrk (C, one
thread, event loop) from Debian's packages is used, installed with apt-get when missing.
Where that cannot be had, a small asyncio client in its own process takes its place (it costs
the server noticeably more CPU; the report says which one ran).

Latency is per request, from sending it to the last byte of the reply, on kept-alive
connections; in a closed loop it includes the time queued inside the server.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

_LUA = r"""
-- done() runs in wrk's main Lua state, where init() never ran: the result path comes from
-- the environment.
local bodies = {}
local at = 0

init = function(args)
  local offset = tonumber(args[2] or "0")
  for line in io.lines(args[1]) do
    bodies[#bodies + 1] = wrk.format("POST", "/v1/predict", {["Content-Type"] = "application/json"}, line)
  end
  at = offset % #bodies
end

request = function()
  at = at % #bodies + 1
  return bodies[at]
end

done = function(summary, latency, requests)
  local e = summary.errors
  local out = io.open(os.getenv("TEXTSIEVE_WRK_RESULT"), "w")
  out:write(string.format(
    '{"requests": %d, "duration_us": %d, "bytes": %d, "errors": {"connect": %d, "read": %d, ' ..
    '"write": %d, "status": %d, "timeout": %d}, "latency_us": {"mean": %.1f, "p50": %d, "p90": %d, ' ..
    '"p95": %d, "p99": %d, "max": %d}}',
    summary.requests, summary.duration, summary.bytes, e.connect, e.read, e.write, e.status, e.timeout,
    latency.mean, latency:percentile(50), latency:percentile(90), latency:percentile(95),
    latency:percentile(99), latency.max))
  out:close()
end
"""


@dataclass
class LoadResult:
    tool: str
    requests: int
    seconds: float
    errors: int
    latency_ms: dict[str, float]
    client_cpu_seconds: float
    raw: dict[str, object]

    @property
    def requests_per_second(self) -> float:
        return self.requests / self.seconds if self.seconds > 0 else 0.0


def ensure_wrk(log: object = print) -> str | None:
    """The wrk binary, installing Debian's package when missing; None when it cannot be had."""
    found = shutil.which("wrk")
    if found:
        return found
    say = log if callable(log) else print
    if shutil.which("apt-get") is None or os.geteuid() != 0:
        say("wrk is missing and cannot be installed here (needs apt-get as root); using the asyncio client")
        return None
    say("installing wrk from Debian's packages (apt-get install -y wrk) …")
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    for cmd in (
        ["apt-get", "install", "-y", "-qq", "wrk"],
        ["apt-get", "update", "-qq"],
        ["apt-get", "install", "-y", "-qq", "wrk"],
    ):
        subprocess.run(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, timeout=300, check=False)
        if shutil.which("wrk"):
            return shutil.which("wrk")
    say("apt-get could not install wrk; using the asyncio client")
    return None


def _wait_rusage(proc: subprocess.Popen[bytes], timeout: float) -> float:
    """Wait for ``proc`` and return its user+system CPU seconds."""
    deadline = time.monotonic() + timeout
    while True:
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid == proc.pid:
            proc.returncode = os.waitstatus_to_exitcode(status)
            return usage.ru_utime + usage.ru_stime
        if time.monotonic() > deadline:
            proc.kill()
            pid, status, usage = os.wait4(proc.pid, 0)
            proc.returncode = os.waitstatus_to_exitcode(status)
            raise TimeoutError(f"load generator still running after {timeout:.0f} s")
        time.sleep(0.05)


def run_load(url: str, bodies: list[bytes], *, connections: int, seconds: float, wrk: str | None) -> LoadResult:
    """Keep ``connections`` requests in flight against ``url`` (POST /v1/predict) for ``seconds``."""
    with tempfile.TemporaryDirectory(prefix="textsieve-bench-") as tmp:
        body_file = Path(tmp) / "bodies.jsonl"
        body_file.write_bytes(b"\n".join(b.replace(b"\n", b" ") for b in bodies) + b"\n")
        result_file = Path(str(body_file) + ".result.json")
        if wrk is not None:
            script = Path(tmp) / "cycle.lua"
            script.write_text(_LUA)
            cmd = [
                wrk,
                "-t1",
                f"-c{connections}",
                f"-d{max(1, round(seconds))}s",
                "--timeout",
                "30s",
                "-s",
                str(script),
                url,
                "--",
                str(body_file),
                "0",
            ]
            tool = "wrk"
        else:
            cmd = [
                sys.executable,
                str(Path(__file__).with_name("aioload.py")),
                url,
                str(body_file),
                str(connections),
                str(seconds),
                str(result_file),
            ]
            tool = "asyncio"
        proc = subprocess.Popen(
            cmd,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            env={**os.environ, "TEXTSIEVE_WRK_RESULT": str(result_file)},
        )
        cpu = _wait_rusage(proc, seconds + 120)
        out = proc.stdout.read().decode() if proc.stdout else ""
        err = proc.stderr.read().decode() if proc.stderr else ""
        if proc.returncode != 0 or not result_file.exists():
            raise RuntimeError(f"{tool} failed (exit {proc.returncode}): {err.strip() or out.strip()}")
        raw = json.loads(result_file.read_text())
    errors = sum(int(v) for v in raw["errors"].values())
    lat = {k: v / 1000.0 for k, v in raw["latency_us"].items()}
    return LoadResult(tool, int(raw["requests"]), raw["duration_us"] / 1e6, errors, lat, cpu, raw)


def run_open_loop(url: str, bodies: list[bytes], *, rate: float, seconds: float, connections: int) -> dict[str, object]:
    """``rate`` requests a second for ``seconds`` against ``url``, whatever the replies (bench/openloop.py)."""
    with tempfile.TemporaryDirectory(prefix="textsieve-bench-") as tmp:
        body_file = Path(tmp) / "bodies.jsonl"
        body_file.write_bytes(b"\n".join(b.replace(b"\n", b" ") for b in bodies) + b"\n")
        result_file = Path(tmp) / "result.json"
        cmd = [
            sys.executable,
            str(Path(__file__).with_name("openloop.py")),
            url,
            str(body_file),
            repr(rate),
            repr(seconds),
            str(connections),
            str(result_file),
        ]
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        cpu = _wait_rusage(proc, seconds + 120)
        err = proc.stderr.read().decode() if proc.stderr else ""
        if proc.returncode != 0 or not result_file.exists():
            raise RuntimeError(f"open-loop client failed (exit {proc.returncode}): {err.strip()[-2000:]}")
        result: dict[str, object] = json.loads(result_file.read_text())
    result["client_cpu_s"] = round(cpu, 3)
    return result


__all__ = ["LoadResult", "ensure_wrk", "run_load", "run_open_loop"]
