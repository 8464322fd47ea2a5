"""Servers under test as subprocesses on 127.0.0.1: start, wait until ready, read their CPU
time and peak memory from /proc (the server and every process below it), stop."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from pathlib import Path

_TICKS = os.sysconf("SC_CLK_TCK")


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def process_tree(pid: int) -> list[int]:
    """``pid`` and every process below it, from /proc."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                ppid = int(Path(f"/proc/{entry}/stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            children.setdefault(ppid, []).append(int(entry))
    found, todo = [], [pid]
    while todo:
        p = todo.pop()
        found.append(p)
        todo.extend(children.get(p, []))
    return found


def _kb_fields(text: str) -> dict[str, int]:
    """``Name:   123 kB`` lines as {Name: 123}."""
    out = {}
    for line in text.splitlines():
        name, _, rest = line.partition(":")
        value = rest.split()
        if len(value) == 2 and value[1] == "kB":
            out[name] = int(value[0])
    return out


def _pss_by_mapping(smaps: str) -> dict[str, int]:
    """PSS in kB per mapped object in one /proc/PID/smaps: a file's base name, [heap], [stack] or [anon]."""
    out: dict[str, int] = {}
    name = "[anon]"
    for line in smaps.splitlines():
        first = line.split(None, 5)
        if first and "-" in first[0] and not first[0].endswith(":"):  # a mapping's header line
            path = first[5].strip() if len(first) == 6 else ""
            name = Path(path).name if path.startswith("/") else (path or "[anon]")
        elif line.startswith("Pss:"):
            out[name] = out.get(name, 0) + int(line.split()[1])
    return out


@dataclass
class Server:
    name: str
    proc: subprocess.Popen[bytes]
    url: str
    log: Path

    def pids(self) -> list[int]:
        """The server process and all its descendants (worker processes, their fork server)."""
        return process_tree(self.proc.pid)

    def cpu_seconds(self) -> float:
        """User + system CPU of the server and its descendants (all their threads) so far."""
        total = 0
        for pid in self.pids():
            try:
                fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            total += int(fields[11]) + int(fields[12])
        return total / _TICKS

    def peak_rss_mb(self) -> float:
        """Sum over the server and its descendants of each one's peak resident memory."""
        total = 0
        for pid in self.pids():
            try:
                for line in Path(f"/proc/{pid}/status").read_text().splitlines():
                    if line.startswith("VmHWM:"):
                        total += int(line.split()[1])
            except OSError:
                continue
        return total / 1024 if total else float("nan")

    def memory(self, top: int = 12) -> dict[str, object]:
        """Memory now, as proportional set size (PSS) summed over the server and its descendants.

        A page shared by k processes counts 1/k in each one's PSS (/proc/PID/smaps_rollup), so the
        sum is what the server really holds; summed RSS counts the pages forked workers share with
        their fork server (the interpreter, numpy, onnxruntime's library) once per process.
        ``mappings`` splits the PSS by what is mapped (a library file, the heap, anonymous memory)
        from /proc/PID/smaps, summed over the processes, largest first.
        """
        processes = []
        by_mapping: dict[str, int] = {}
        for pid in self.pids():
            try:
                rollup = _kb_fields(Path(f"/proc/{pid}/smaps_rollup").read_text())
                smaps = Path(f"/proc/{pid}/smaps").read_text()
                cmdline = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
            except OSError:
                continue
            processes.append(
                {
                    "pid": pid,
                    "command": cmdline.strip()[:120],
                    "pss_mb": rollup.get("Pss", 0) / 1024,
                    "rss_mb": rollup.get("Rss", 0) / 1024,
                    "pss_anon_mb": rollup.get("Pss_Anon", 0) / 1024,
                    "pss_file_mb": rollup.get("Pss_File", 0) / 1024,
                }
            )
            for name, kb in _pss_by_mapping(smaps).items():
                by_mapping[name] = by_mapping.get(name, 0) + kb
        ranked = sorted(by_mapping.items(), key=lambda kv: -kv[1])
        rest = sum(kb for _, kb in ranked[top:])
        return {
            "pss_mb": round(sum(float(p["pss_mb"]) for p in processes), 1),  # type: ignore[arg-type]
            "rss_mb": round(sum(float(p["rss_mb"]) for p in processes), 1),  # type: ignore[arg-type]
            "processes": [{k: round(v, 1) if isinstance(v, float) else v for k, v in p.items()} for p in processes],
            "mappings_pss_mb": {name: round(kb / 1024, 1) for name, kb in ranked[:top]}
            | {"(everything else)": round(rest / 1024, 1)},
        }

    def threads(self) -> int:
        return len(os.listdir(f"/proc/{self.proc.pid}/task"))

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)


def start(
    name: str,
    cmd: list[str],
    ready_path: str,
    port: int,
    log: Path,
    *,
    env: dict[str, str] | None = None,
    timeout: float = 180.0,
    cwd: Path | None = None,
) -> Server:
    log.parent.mkdir(parents=True, exist_ok=True)
    fh = open(log, "wb")  # a file, not a pipe: a full pipe would stall a chatty server
    # Same session as the caller: it shares the caller's scheduling autogroup (see run.raise_priority).
    proc = subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT, env={**os.environ, **(env or {})}, cwd=cwd)
    fh.close()
    server = Server(name, proc, f"http://127.0.0.1:{port}", log)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(
                f"{name} exited with {proc.returncode} while starting; see {log}:\n"
                + log.read_text(errors="replace")[-2000:]
            )
        try:
            with urllib.request.urlopen(server.url + ready_path, timeout=2) as reply:
                if reply.status == 200:
                    return server
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            pass
        time.sleep(0.25)
    server.stop()
    raise RuntimeError(f"{name} not ready after {timeout:.0f} s; see {log}")


def post_json(url: str, body: bytes, timeout: float = 30.0) -> bytes:
    req = urllib.request.Request(url, data=body, headers={"Content-Type": "application/json"}, method="POST")
    with urllib.request.urlopen(req, timeout=timeout) as reply:
        return bytes(reply.read())


__all__ = ["Server", "free_port", "post_json", "process_tree", "start"]
