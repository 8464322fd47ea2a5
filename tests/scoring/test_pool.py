"""The scoring workers: Ctrl-C reaches every process of the foreground group, and only the scoring
process may act on it (POSIX: the terminal sends SIGINT to the foreground process group)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from tests.helpers.environment import child_env
from tests.scoring.conftest import ROOT, wait_until
from textsieve.scoring.pool import Pool, _stopped


def test_a_worker_sent_sigint_while_idle_goes_on_scoring(tiny_bundles: dict[str, Path]) -> None:
    pool = Pool(tiny_bundles["a"], workers=1)
    try:
        first = pool.result(pool.submit(["the chain is broken"], 0))
        assert pool._executor is not None
        (pid,) = list(pool._executor._processes)
        worker = pool._executor._processes[pid]
        for _ in range(10):  # the worker waits on its queue meanwhile; one that took SIGINT died there
            if not worker.is_alive():
                break
            os.kill(pid, signal.SIGINT)
            time.sleep(0.05)
        assert worker.is_alive()
        again = pool.result(pool.submit(["the chain is broken"], 0))
        assert again.probabilities.tolist() == first.probabilities.tolist()
        assert worker.is_alive()
    finally:
        pool.close()


def _python(code: str, bundle: Path, **pipes: int) -> subprocess.Popen[str]:
    """``code`` run by this Python in a process of its own, the bundle its one argument, its stdout a pipe."""
    return subprocess.Popen(
        [sys.executable, "-c", code, str(bundle)],
        stdout=subprocess.PIPE,
        text=True,
        env=child_env() | {"PYTHONPATH": str(ROOT)},
        **pipes,
    )


def _output(proc: subprocess.Popen[str], *, timeout: float) -> tuple[str, str]:
    """What ``proc`` wrote to its stdout and stderr once it has ended; a failure if not within ``timeout`` s."""
    try:
        return proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate()
        raise AssertionError(f"the scoring process did not end: {out!r} {err[-2000:]!r}") from None


def _ended(pid: int) -> bool:
    """Whether ``pid`` has ended (gone, or a zombie waiting to be reaped: proc(5))."""
    try:
        status = Path(f"/proc/{pid}/status").read_text(encoding="utf-8")
    except FileNotFoundError:
        return True
    return "\nState:\tZ" in status


def test_the_workers_end_when_the_scoring_process_is_killed(tiny_bundles: dict[str, Path]) -> None:
    """SIGKILL (or the OOM killer) gives the scoring process no chance to stop its pool; its
    workers waited on their queue for ever, and kept the fork server alive with them."""
    code = (
        "import sys\n"
        "from pathlib import Path\n"
        "from textsieve.scoring.pool import Pool\n"
        "pool = Pool(Path(sys.argv[1]), workers=1)\n"
        "pool.result(pool.submit(['the chain is broken'], 0))\n"
        "print(*pool._executor._processes, flush=True)\n"
        "sys.stdin.read()\n"
    )
    proc = _python(code, tiny_bundles["a"], stdin=subprocess.PIPE)
    assert proc.stdout is not None
    workers = [int(pid) for pid in proc.stdout.readline().split()]
    try:
        assert len(workers) == 1 and not _ended(workers[0])
        proc.kill()
        proc.wait()
        wait_until(lambda: all(map(_ended, workers)), 10, "the worker to end after its scoring process")
    finally:
        for pid in workers:
            if not _ended(pid):
                os.kill(pid, signal.SIGKILL)
        for pipe in (proc.stdin, proc.stdout):
            if pipe is not None:
                pipe.close()


def test_the_scoring_process_ends_when_a_worker_dies_halfway_through_a_result(
    tiny_bundles: dict[str, Path],
) -> None:
    """SIGTERM to the process group (a job runner's or a container's stop) can kill a worker while it
    writes a result into the pool's pipe. The executor's thread then waited for the rest of that
    message for ever: the scoring process holds the pipe's write end too, so it never saw the end of
    the pipe, and Python's exit joins that thread. The scoring process hung after its one line.

    The half-written message is made here by hand, the way a killed worker leaves it (a frame's
    4-byte length, then less than that many bytes), so the test does not depend on when a signal
    lands; the worker is then killed as the group's SIGTERM kills it."""
    code = (
        "import os, signal, struct, sys, time\n"
        "from pathlib import Path\n"
        "from textsieve.scoring.pool import Pool\n"
        "pool = Pool(Path(sys.argv[1]), workers=1)\n"
        "pool.result(pool.submit(['the chain is broken'], 0))\n"
        "(pid,) = list(pool._executor._processes)\n"
        "os.kill(pid, signal.SIGSTOP)\n"  # so the executor sees the half message before the death
        "writer = pool._executor._result_queue._writer\n"
        "os.write(writer.fileno(), struct.pack('!i', 4096) + b'\\x80')\n"
        "time.sleep(0.3)\n"
        "os.kill(pid, signal.SIGKILL)\n"
        "pool.close(cancel=True)\n"
        "print('closed', flush=True)\n"
    )
    proc = _python(code, tiny_bundles["a"], stderr=subprocess.PIPE)
    out, err = _output(proc, timeout=30)
    assert out == "closed\n", err[-2000:]
    assert proc.returncode == 0, err[-2000:]


def test_a_worker_killed_halfway_through_a_result_stops_the_run_with_one_line(tiny_bundles: dict[str, Path]) -> None:
    """One worker killed (the OOM killer) while it writes a result, the other alive: the executor's
    thread read for the rest of the message for ever, as this process and the live worker hold the
    pipe's write end, and the wait for that result never ended. It ends now in the error that says
    to resume, and the process exits."""
    code = (
        "import sys\n"
        "from pathlib import Path\n"
        "from tests.helpers.dying_worker import die_halfway_through_a_result\n"
        "from textsieve.errors import UnavailableError\n"
        "from textsieve.scoring.pool import Pool\n"
        "pool = Pool(Path(sys.argv[1]), workers=2)\n"
        "for f in [pool.submit(['the chain is broken'], 0) for _ in range(2)]:\n"
        "    pool.result(f)\n"
        "print(sum(p.is_alive() for p in pool._executor._processes.values()), flush=True)\n"
        "try:\n"
        "    pool.result(pool._executor.submit(die_halfway_through_a_result))\n"
        "except UnavailableError as exc:\n"
        "    print(exc, flush=True)\n"
    )
    proc = _python(code, tiny_bundles["a"], stderr=subprocess.PIPE)
    out, err = _output(proc, timeout=60)
    assert out.splitlines() == ["2", str(_stopped())], err[-2000:]
    assert proc.returncode == 0 and "Traceback" not in err, err[-2000:]
