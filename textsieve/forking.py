"""The multiprocessing fork server every worker process of ours is started from.

A fork server is one clean process that imports the given modules once and forks each worker
from itself, so a worker starts in milliseconds with them already imported, without a copy of
the caller's threads and memory. One per process (multiprocessing keeps one).
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading
from collections.abc import Sequence
from typing import Any

_lock = threading.Lock()


def fork_server(preload: Sequence[str] = ()) -> Any:
    """The forkserver context, its server started now (if it is not running yet) importing ``preload``.

    Started early, the server imports while the caller goes on with its own work (they overlap on
    a second core). Python 3.11's fork server runs as ``python -c`` and imports its preload before
    it applies the ``sys_path`` it is handed, so its first search entry would be the working
    directory: started from a folder holding another ``textsieve`` (a source checkout, an older
    copy), the workers would run that folder's code. ``PYTHONSAFEPATH`` leaves the working
    directory out and ``PYTHONPATH`` hands it this process's own search path, in order (an empty
    entry, this process's working directory, as that directory).

    Started from the main thread, the server starts with SIGINT ignored. Python's ignores it only
    once its preload is imported, and Ctrl-C reaches the whole foreground process group: pressed in
    the first fraction of a second, it printed a KeyboardInterrupt traceback from the server's
    imports and killed it, under the caller's own one-line message. An ignored signal stays ignored
    across exec and Python then installs no handler of its own; its workers ignore SIGINT anyway (the
    caller decides). A blocked signal would not do: multiprocessing starts the server with an empty
    signal mask. This process ignores a Ctrl-C for the few milliseconds the start takes.
    """
    from multiprocessing import forkserver

    ctx = multiprocessing.get_context("forkserver")
    with _lock:
        if preload:
            ctx.set_forkserver_preload(list(preload))
        saved = {key: os.environ.get(key) for key in ("PYTHONSAFEPATH", "PYTHONPATH")}
        os.environ["PYTHONSAFEPATH"] = "1"
        os.environ["PYTHONPATH"] = os.pathsep.join(os.path.abspath(p) for p in sys.path)
        main = threading.current_thread() is threading.main_thread()  # where a handler may be set
        previous = signal.signal(signal.SIGINT, signal.SIG_IGN) if main else None
        try:
            forkserver.ensure_running()
        finally:
            if main:
                signal.signal(signal.SIGINT, previous)
            for key, value in saved.items():
                if value is None:
                    os.environ.pop(key, None)
                else:
                    os.environ[key] = value
    return ctx


__all__ = ["fork_server"]
