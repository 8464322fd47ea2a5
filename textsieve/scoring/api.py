"""``textsieve.score_file``: the file run as Python callers reach it.

The command line hands :func:`textsieve.scoring.local.score_file` what argparse has already typed;
a notebook hands it whatever it has (a str path, a registry folder, an Options field of another
type). Those are checked here, each one an InputError naming the argument, so that nothing fails
later as an AttributeError or TypeError from inside the run.
"""

from __future__ import annotations

import ast
import dataclasses
import os
import sys
from collections.abc import Sequence
from numbers import Integral, Real
from pathlib import Path
from types import FrameType
from typing import TYPE_CHECKING, TextIO

from textsieve.errors import InputError
from textsieve.scoring.local import WORKERS_PER_CORE, Options, Summary, most_workers
from textsieve.scoring.local import score_file as _score_file
from textsieve.scoring.model import _kind, _open
from textsieve.texts import MAX_SPANS

if TYPE_CHECKING:
    from textsieve.registry.api import Registry


def score_file(
    registry: Registry | str | os.PathLike[str],
    model: str,
    source: str | os.PathLike[str],
    output: str | os.PathLike[str],
    *,
    version: int | None = None,
    options: Options | None = None,
    resume: bool = False,
    stream: TextIO | None = None,
    blobs: str | os.PathLike[str] | None = None,
    retired: bool = False,
) -> Summary:
    """Score every row of ``source`` with ``model`` (its live version, or ``version``) into ``output``:
    what ``textsieve score`` runs. ``registry`` is a Registry, a folder or a postgresql:// URL (with
    ``blobs``). Bad input is an InputError or NotFoundError before anything is written; a retired
    ``version`` is a StateError unless ``retired`` is True (as in :func:`textsieve.load_model`)."""
    paths = {"source": _path("source", source), "output": _path("output", output)}
    if options is not None and not isinstance(options, Options):
        raise InputError(f"options must be textsieve.Options(...), not {_kind(options)}")
    opts = options or Options()
    _check_options(opts)
    if not isinstance(resume, bool):
        raise InputError(f"resume must be True or False, not {resume!r}")
    if not isinstance(retired, bool):
        raise InputError(f"retired must be True or False, not {retired!r}")
    if opts.workers != 0:
        _check_main_guard()
    reg, owned = _open(registry, blobs)
    try:
        return _score_file(
            reg,
            model,
            paths["source"],
            paths["output"],
            version=version,
            options=opts,
            resume=resume,
            stream=stream,
            retired=retired,
        )
    finally:
        if owned:
            reg.close()


GUARD = 'if __name__ == "__main__":'
_WHY = (
    "the worker processes re-import the script's main module (Python's multiprocessing does) and each would "
    f"score again; put the call under {GUARD} (README: Python API)"
)


def _check_main_guard() -> None:
    """Refuse a call that the worker processes would make again when they re-import the main script.

    In a worker, the re-import runs the script as ``__mp_main__``: a call from its top level is refused
    there (it used to start another run, "another 'textsieve score' is writing the same output", and the
    first run ended with "a scoring worker process stopped"). In the process the user started, a call
    from the script's top level outside the guard is refused before any worker starts, so the user
    reads why rather than that a worker stopped."""
    frame = sys._getframe(2)
    while frame is not None:
        if frame.f_code.co_name == "<module>":
            name = frame.f_globals.get("__name__")
            if name == "__mp_main__":
                raise InputError(
                    f"score_file was called while a worker process re-imported {frame.f_code.co_filename}: {_WHY}"
                )
            if name == "__main__" and _reimported(frame) and not _guarded(frame.f_code.co_filename, frame.f_lineno):
                raise InputError(
                    f"score_file was called at the top level of {frame.f_code.co_filename} (line {frame.f_lineno}), "
                    f"outside {GUARD}: {_WHY}"
                )
        frame = frame.f_back  # type: ignore[assignment]


def _reimported(frame: FrameType) -> bool:
    """Whether ``frame`` runs the main module that multiprocessing's workers import again: a script or a
    ``python -m`` module, not a package's ``__main__`` nor an interactive session (multiprocessing/spawn.py,
    get_preparation_data and _fixup_main_from_name)."""
    main = sys.modules.get("__main__")
    if main is None or frame.f_globals is not vars(main) or getattr(main, "__file__", None) is None:
        return False
    spec_name = getattr(getattr(main, "__spec__", None), "name", None) or ""
    return not (spec_name == "__main__" or spec_name.endswith(".__main__"))


def _guarded(filename: str, line: int) -> bool:
    """Whether ``line`` of the script ``filename`` is inside an ``if __name__ == "__main__":`` block (True when
    the script's source cannot be read: only a call known to be outside it is refused)."""
    try:
        tree = ast.parse(Path(filename).read_bytes(), filename)
    except (OSError, SyntaxError, ValueError):
        return True
    for node in tree.body:
        if isinstance(node, ast.If) and _is_main_test(node.test) and node.body:
            if node.body[0].lineno <= line <= (node.body[-1].end_lineno or node.body[-1].lineno):
                return True
    return False


def _is_main_test(test: ast.expr) -> bool:
    if not (isinstance(test, ast.Compare) and len(test.ops) == 1 and isinstance(test.ops[0], ast.Eq)):
        return False
    sides = [test.left, test.comparators[0]]
    names = [s for s in sides if isinstance(s, ast.Name) and s.id == "__name__"]
    mains = [s for s in sides if isinstance(s, ast.Constant) and s.value == "__main__"]
    return len(names) == 1 and len(mains) == 1


def _path(name: str, value: object) -> Path:
    if isinstance(value, str | os.PathLike) and not isinstance(value, bytes):
        return Path(value)
    raise InputError(f"{name} must be a file path (str or pathlib.Path), not {_kind(value)}")


def _whole(value: object, least: int) -> bool:
    return not isinstance(value, bool) and isinstance(value, Integral) and int(value) >= least


def _check_options(options: Options) -> None:
    """Each field of ``options`` of the kind and range the command line's flags allow."""
    # As given: a dataclass does not check its fields' annotations.
    o: dict[str, object] = {f.name: getattr(options, f.name) for f in dataclasses.fields(options)}
    problems = []
    if not isinstance(o["text_field"], str) or not o["text_field"]:
        problems.append(f"text_field must be a non-empty str, not {o['text_field']!r}")
    keep = o["keep"]
    if keep is not None and (
        isinstance(keep, str) or not isinstance(keep, Sequence) or not all(isinstance(c, str) for c in keep)
    ):
        problems.append(f"keep must be None or a list of column names, not {keep!r}")
    if not _whole(o["spans"], 0):
        problems.append(f"spans must be a whole number, 0 or more, not {o['spans']!r}")
    elif int(o["spans"]) > MAX_SPANS:  # type: ignore[call-overload]
        problems.append(f"spans must be at most {MAX_SPANS} per text (the HTTP API's limit too), not {o['spans']!r}")
    if not isinstance(o["strict"], bool):
        problems.append(f"strict must be True or False, not {o['strict']!r}")
    if o["workers"] is not None and not _whole(o["workers"], 0):
        problems.append(f"workers must be None (one per core), 0 (this process) or more, not {o['workers']!r}")
    elif o["workers"] is not None and int(o["workers"]) > most_workers():  # type: ignore[call-overload]
        problems.append(
            f"workers must be at most {most_workers()} ({WORKERS_PER_CORE} per core this process may use), "
            f"not {o['workers']!r}"
        )
    if not _whole(o["chunk_rows"], 1):
        problems.append(f"chunk_rows must be a whole number, 1 or more, not {o['chunk_rows']!r}")
    for name in ("input_format", "output_format"):
        if o[name] is not None and not isinstance(o[name], str):
            problems.append(f"{name} must be None (from the file name) or a format name, not {o[name]!r}")
    every = o["progress_every"]
    if isinstance(every, bool) or not isinstance(every, Real) or not float(every) > 0:
        problems.append(f"progress_every must be a number of seconds more than 0, not {every!r}")
    if problems:
        raise InputError("Options: " + "; ".join(problems))


__all__ = ["score_file"]
