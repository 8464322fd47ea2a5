"""``textsieve.score_file``: the file run as Python callers reach it.

The command line hands :func:`textsieve.scoring.local.score_file` what argparse has already typed;
a notebook hands it whatever it has (a str path, a registry folder, an Options field of another
type). Those are checked here, each one an InputError naming the argument, so that nothing fails
later as an AttributeError or TypeError from inside the run.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Sequence
from numbers import Integral, Real
from pathlib import Path
from typing import TYPE_CHECKING, TextIO

from textsieve.errors import InputError
from textsieve.scoring.local import WORKERS_PER_CORE, Options, Summary
from textsieve.scoring.local import score_file as _score_file
from textsieve.scoring.model import _kind, _open
from textsieve.scoring.pool import default_workers
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
    elif o["workers"] is not None and int(o["workers"]) > WORKERS_PER_CORE * default_workers():  # type: ignore[call-overload]
        most = WORKERS_PER_CORE * default_workers()
        problems.append(
            f"workers must be at most {most} ({WORKERS_PER_CORE} per core this process may use), not {o['workers']!r}"
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
