"""The scoring workers: Ctrl-C reaches every process of the foreground group, and only the scoring
process may act on it (POSIX: the terminal sends SIGINT to the foreground process group)."""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

from textsieve.scoring.pool import Pool, result


def test_a_worker_sent_sigint_while_idle_goes_on_scoring(tiny_bundles: dict[str, Path]) -> None:
    pool = Pool(tiny_bundles["a"], workers=1)
    try:
        first = result(pool.submit(["the chain is broken"], 0))
        assert pool._executor is not None
        (pid,) = list(pool._executor._processes)
        worker = pool._executor._processes[pid]
        for _ in range(10):  # the worker waits on its queue meanwhile; one that took SIGINT died there
            if not worker.is_alive():
                break
            os.kill(pid, signal.SIGINT)
            time.sleep(0.05)
        assert worker.is_alive()
        again = result(pool.submit(["the chain is broken"], 0))
        assert again.probabilities.tolist() == first.probabilities.tolist()
        assert worker.is_alive()
    finally:
        pool.close()
