"""The ``textsieve score`` verb: its flags next to its handler. numpy, onnxruntime, pyarrow and Dask
are imported inside the handler (this module is imported on every run and every TAB press)."""

from __future__ import annotations

import argparse
import contextlib
import gc
import math
import os
from collections.abc import Iterator
from pathlib import Path

from textsieve.errors import InputError, Terminated
from textsieve.registry.cli import add_location_args

FORMAT_CHOICES = ("jsonl", "csv", "tsv", "parquet")
PARTITION_MB = 64


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be 1 or more, not {value}")
    return value


def _count(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be 0 or more, not {value}")
    return value


def _spans(text: str) -> int:
    from textsieve.texts import MAX_SPANS

    value = _count(text)
    if value > MAX_SPANS:
        raise argparse.ArgumentTypeError(f"at most {MAX_SPANS} spans per text (the HTTP API's limit too), not {value}")
    return value


def _workers(text: str) -> int:
    from textsieve.scoring.local import WORKERS_PER_CORE, most_workers
    from textsieve.scoring.pool import default_workers

    value = _count(text)
    if value > most_workers():
        raise argparse.ArgumentTypeError(
            f"at most {most_workers()} ({WORKERS_PER_CORE} per core this process may use, {default_workers()}), "
            f"not {value}"
        )
    return value


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number of seconds: {text!r}") from None
    if not math.isfinite(value) or value < 0:  # 0: a line at every update
        raise argparse.ArgumentTypeError(f"must be a number of seconds, 0 or more, not {text}")
    return value


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``score`` to the ``textsieve`` command."""
    p = sub.add_parser(
        "score",
        help="label every row of a JSONL, CSV, TSV or Parquet file with a registered model, on every core or a "
        "Dask cluster",
    )
    p.add_argument(
        "input", help="file to score (.jsonl, .csv, .tsv or .parquet); with --cluster also a URL fsspec reads"
    )
    p.add_argument("--model", required=True, help="model name in the registry")
    p.add_argument("--version", type=_positive, help="version number (default: the live version, pinned at the start)")
    p.add_argument(
        "--retired",
        action="store_true",
        help="with --version: allow it to name a retired version (refused otherwise, as the HTTP API refuses to pin "
        "one)",
    )
    p.add_argument(
        "--out",
        required=True,
        help="file to write (.jsonl, .csv, .tsv or .parquet), in place only when complete; with --cluster a folder "
        "that becomes a Parquet dataset",
    )
    p.add_argument("--text-field", default="text", help="the column or JSON field holding each row's text")
    p.add_argument("--spans", type=_spans, default=0, help="n-gram spans to add per row (0: none)")
    p.add_argument(
        "--keep",
        help="comma-separated input columns to carry into the output (default: all; '' for none)",
    )
    p.add_argument("--strict", action="store_true", help="stop at the first row whose text is missing or empty")
    p.add_argument("--resume", action="store_true", help="continue an interrupted run from its last completed chunk")
    p.add_argument(
        "--workers",
        type=_workers,
        help="worker processes (default: one per core; 0: in this process; at most 4 per core; not with --cluster)",
    )
    p.add_argument(
        "--chunk-rows",
        type=_positive,
        help="rows read, scored and written at a time (default: 8192; not with --cluster)",
    )
    p.add_argument("--input-format", choices=FORMAT_CHOICES, help="input format when the name does not say")
    p.add_argument("--output-format", choices=FORMAT_CHOICES, help="output format when the name does not say")
    p.add_argument(
        "--cluster", help="a Dask scheduler's address (tcp://HOST:8786): score the input's partitions on its workers"
    )
    p.add_argument(
        "--partition-mb",
        type=_positive,
        help=f"with --cluster: MiB of JSONL per partition (Parquet partitions are its row groups; default: "
        f"{PARTITION_MB})",
    )
    p.add_argument(
        "--progress-every",
        type=_seconds,
        default=10.0,
        help="seconds between progress lines when stderr is no terminal",
    )
    add_location_args(p)
    p.set_defaults(func=cli_score)


# What a scoring worker imports (textsieve/scoring/pool.py), imported once by the fork server.
PRELOAD = (
    "textsieve.scoring.pool",
    "textsieve.registry.runtime",
    "textsieve.registry.bundle",
    "onnxruntime",
    "textsieve.registry.prewarm",
)


@contextlib.contextmanager
def _stopped_by_sigterm() -> Iterator[None]:
    """SIGTERM (a job runner's or a container's stop, ``kill``) ends the run as Ctrl-C does: the
    chunks done are kept for ``--resume``, OUTPUT is not written, one line says so (exit 143).
    Without this the process died where it stood, with multiprocessing's warnings on stderr."""
    import signal

    def stop(signum: int, frame: object) -> None:
        raise Terminated

    previous = signal.signal(signal.SIGTERM, stop)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def one_blas_thread() -> None:
    """Ask NumPy's OpenBLAS for no threads of its own, in this process and every process it starts,
    unless the caller chose a number. Loading it starts a thread per core that spins ~40 ms of CPU
    (2 cores, 2026-12-05), in this process and again in the fork server, where scoring is otherwise
    starting up on both cores; nothing here multiplies matrices with it (the graph runs in
    onnxruntime, one single-thread session per worker). Called before NumPy is imported: the
    library reads the variable once, when it loads."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


def cli_score(args: argparse.Namespace) -> int:
    one_blas_thread()
    with _stopped_by_sigterm():
        code = _score(args)
    # And what the run made since (the pool, the reader, the resolved version): the process ends
    # next, and Python's exit runs full collections while it clears the modules.
    gc.freeze()
    return code


def _check_dependent_flags(args: argparse.Namespace) -> None:
    """A flag that only works with another one, given without it, was ignored (exit 0): refused."""
    for given, flag, needed in (
        (args.retired, "--retired", "--version"),
        (args.partition_mb is not None, "--partition-mb", "--cluster"),
    ):
        if given and getattr(args, needed.removeprefix("--")) is None:
            raise InputError(f"{flag} works only with {needed}; add {needed} or drop {flag}")
    # A cluster's partitions are scored by its own workers, a partition at a time: these size a local run.
    for value, flag in ((args.workers, "--workers"), (args.chunk_rows, "--chunk-rows")):
        if args.cluster and value is not None:
            raise InputError(
                f"{flag} sizes a run on this machine and does nothing with --cluster (its workers score a "
                "partition at a time: size them with `dask worker --nthreads`, the partitions with --partition-mb); "
                f"drop {flag}"
            )


def _score(args: argparse.Namespace) -> int:
    _check_dependent_flags(args)
    if not args.cluster and args.workers != 0:
        # The workers' fork server imports NumPy, onnxruntime and the runtime on the other core while
        # this process imports the registry and checks the bundle (~0.3 s of a 100,000-text run).
        from textsieve.forking import fork_server

        fork_server(PRELOAD)
    from textsieve.environment import registry_location
    from textsieve.files import check_out_file
    from textsieve.registry.api import open_registry
    from textsieve.scoring.columns import parse_keep
    from textsieve.scoring.local import DEFAULT_CHUNK, Options

    keep = parse_keep(args.keep)
    options = Options(
        text_field=args.text_field,
        keep=None if keep is None else tuple(keep),
        spans=args.spans,
        strict=args.strict,
        workers=args.workers,
        chunk_rows=DEFAULT_CHUNK if args.chunk_rows is None else args.chunk_rows,
        input_format=args.input_format,
        output_format=args.output_format,
        progress_every=args.progress_every,
    )
    where = registry_location(args.registry, args.blobs)
    with open_registry(where.registry, blobs=where.blobs, create=False) as reg:
        # What the imports made (NumPy, pydantic's schemas, the registry: most of this process's
        # objects) lives until the process ends: frozen, it is out of the cycle collector's scans.
        # The full collections the rows in flight set off each walked it all (4 in a 100,000-row run,
        # 63-79 ms of this process's CPU), and so did Python's exit (40-50 ms of a one-row run's
        # wall time); bench/README.md, "Scoring a file".
        gc.freeze()
        if args.cluster:
            from textsieve.scoring.cluster import score_on_cluster

            if args.output_format not in (None, "parquet"):
                raise InputError("--cluster writes a Parquet dataset; drop --output-format or make it parquet")
            check_out_file(Path(args.out), allowed="a folder for the Parquet dataset (a new one, or one it wrote)")
            summary = score_on_cluster(
                reg,
                args.model,
                args.input,
                Path(args.out),
                cluster=args.cluster,
                version=args.version,
                options=options,
                resume=args.resume,
                retired=args.retired,
                partition_bytes=(args.partition_mb or PARTITION_MB) << 20,
            )
        else:
            from textsieve.scoring.local import score_file

            if "://" in args.input:  # Path() would make s3://b/f "s3:/b/f: no such file"
                raise InputError(f"{args.input}: a URL is read only with --cluster; give a local file")
            summary = score_file(
                reg,
                args.model,
                Path(args.input),
                Path(args.out),
                version=args.version,
                options=options,
                resume=args.resume,
                retired=args.retired,
            )
    print(summary.line())
    return 0


__all__ = ["register"]
