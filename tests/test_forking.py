"""The fork server every worker process of ours starts from (textsieve/forking.py)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

_SCRIPT = """
import os, signal, sys, time
sys.path.insert(0, {folder!r})
from multiprocessing import forkserver
from textsieve.forking import fork_server

if __name__ == "__main__":
    ctx = fork_server(["slow_preload"])
    while not os.path.exists({marker!r}):  # the fork server is importing its preload now
        time.sleep(0.01)
    os.kill(forkserver._forkserver._forkserver_pid, signal.SIGINT)  # Ctrl-C reaches the whole group
    p = ctx.Process(target=os.getpid)
    p.start()
    p.join(60)
    sys.exit(p.exitcode)
"""


def test_ctrl_c_while_the_fork_server_imports_leaves_it_running_and_prints_no_traceback(tmp_path: Path) -> None:
    # Ctrl-C in the first ~0.3-0.8 s of `textsieve score` printed a KeyboardInterrupt traceback from
    # the fork server's preload imports (found by an audit, 2026-12-05): Python's fork server ignores
    # SIGINT only once its preload is imported. It now starts with SIGINT ignored, as its workers run.
    marker = tmp_path / "preload-began"
    (tmp_path / "slow_preload.py").write_text(f"import time\nopen({str(marker)!r}, 'w').close()\ntime.sleep(1.0)\n")
    script = tmp_path / "start.py"
    script.write_text(_SCRIPT.format(folder=str(tmp_path), marker=str(marker)))
    done = subprocess.run([sys.executable, str(script)], cwd=tmp_path, timeout=120, capture_output=True)
    stderr = done.stderr.decode()
    assert done.returncode == 0 and "Traceback" not in stderr and "KeyboardInterrupt" not in stderr, stderr[-2000:]


def test_the_service_starts_its_fork_server_with_sigint_ignored(tmp_path: Path) -> None:
    # The service's workers start off the event loop (a thread, where no signal handler can be set):
    # the pool starts their fork server when it is made, on the main thread (service/inference/workers.py).
    script = tmp_path / "start.py"
    script.write_text(
        "import signal, sys\n"
        "from multiprocessing import forkserver\n"
        "from textsieve.service.inference.workers import WorkerProcesses\n"
        "if __name__ == '__main__':\n"
        "    WorkerProcesses(1)\n"
        "    pid = forkserver._forkserver._forkserver_pid\n"
        "    ignored = int(open(f'/proc/{pid}/status').read().split('SigIgn:')[1].split()[0], 16)\n"
        "    sys.exit(0 if ignored & (1 << (signal.SIGINT - 1)) else 3)\n"
    )
    done = subprocess.run([sys.executable, str(script)], cwd=tmp_path, timeout=120, capture_output=True)
    assert done.returncode == 0, done.stderr.decode()[-2000:]
