"""Instruction counts under valgrind's callgrind, for the scripts that count them
(``loop_cost.py --instructions``, ``worker_instructions.py``, ``pipe_instructions.py``).

Each runs itself again under callgrind with instrumentation off at the start
(``--instr-atstart=no``) and switches it on only around what it measures (:func:`instrument`), so the
count leaves out start-up and warm-up: instructions repeat to ~0.1–1.5 % between runs where wall
times here move ±20 %.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from collections.abc import Mapping, Sequence


def available() -> bool:
    """Whether valgrind and callgrind_control are installed; says how to get them when not."""
    if shutil.which("valgrind") is None or shutil.which("callgrind_control") is None:
        print("needs valgrind (apt-get install valgrind)", file=sys.stderr)
        return False
    return True


def instrument(on: bool) -> None:
    """Switch counting on or off for this process (which callgrind runs)."""
    subprocess.run(["callgrind_control", "-i", "on" if on else "off", str(os.getpid())], capture_output=True)


def command(out: str) -> list[str]:
    """The valgrind command line, counting only while instrumented, writing its output to ``out``."""
    return ["valgrind", "--tool=callgrind", "--instr-atstart=no", f"--callgrind-out-file={out}"]


def collected(args: Sequence[str], env: Mapping[str, str], out: str = "/dev/null") -> int | None:
    """``args`` run under callgrind: the instructions it counted, or None (with the run's output on
    stderr) when the run failed."""
    run = subprocess.run([*command(out), *args], env=dict(env), capture_output=True, text=True)
    found = re.search(r"Collected : (\d+)", run.stderr)
    if run.returncode != 0 or found is None:
        print(run.stdout + run.stderr[-3000:], file=sys.stderr)
        return None
    return int(found.group(1))
