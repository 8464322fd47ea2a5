"""``textsieve score --cluster tcp://HOST:8786``: the input's partitions scored on Dask workers, written
by this process as a partitioned Parquet dataset.

- Partitions: a Parquet file's row groups, or byte ranges of a JSONL file (a partition owns the lines
  that start inside its range). Workers read them themselves, so INPUT must be a path every worker
  can read or a URL fsspec understands (s3://, gs://, http://, …); only descriptors travel.
- The bundle: this process resolves the version once and fetches it from the registry (every blob
  re-hashed), then ships its files to every worker once (``scatter(broadcast=True)``). A worker checks
  each file's sha256 against the registry's record once, keeps the folder for the run, and keeps one
  single-thread onnxruntime session per worker thread; as the local pool's workers, it does not repeat
  the graph check (onnx's checker) that the version passed when it was published.
- Results come back as Arrow tables and this process writes ``part-NNNNN.parquet`` (one per
  partition, input order) into a temporary folder that is renamed to OUTPUT when every partition is
  in; ``_textsieve.json`` beside the parts records the model, version and bundle sha256 once.
- A worker that dies mid-run: the scheduler reschedules its partitions on the others (Dask's own
  retry of lost tasks); a partition is written once, whichever worker finished it.
- ``--resume`` keeps the parts already written and submits only the missing partitions.
"""

from __future__ import annotations

import contextlib
import hashlib
import itertools
import json
import os
import shutil
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from textsieve.errors import InputError, IntegrityError, TextsieveError, UnavailableError
from textsieve.files import atomic_write_text, check_writable, fsync_dir
from textsieve.labelled import cr_line_ends, cr_separated
from textsieve.scoring import formats
from textsieve.scoring.columns import Layout, plan
from textsieve.scoring.local import STATE_FORMAT, Options, Summary, metadata, work_dir
from textsieve.scoring.model import Resolved, resolve
from textsieve.scoring.progress import Progress
from textsieve.scoring.rows import Unreadable, check_fields, output_rows, score_texts, split

if TYPE_CHECKING:
    import pyarrow as pa

    from textsieve.registry.api import Registry
    from textsieve.registry.runtime import Predictor

SIDECAR = "_textsieve.json"
SAMPLE_ROWS = 1000
SAMPLE_BYTES = 1 << 20  # of a JSONL input, read for the sample
CLUSTER_EXTRA = "pip install 'textsieve[cluster]'"


@dataclass(frozen=True)
class Partition:
    """What a worker reads: a JSONL byte range or a Parquet file's row groups."""

    index: int
    url: str
    fmt: str
    start: int = 0
    end: int = 0
    row_groups: tuple[int, ...] = ()
    first_row: int = 0  # a Parquet partition's rows before it (its row groups' counts, in the file's footer)

    @property
    def numbered_as_the_file(self) -> bool:
        """Whether its rows and lines are numbered as the file's, as local scoring numbers them: a JSONL
        partition past the first does not know how many lines come before its byte range (counting them
        would read the file up to it again on every worker)."""
        return self.fmt == "parquet" or self.start == 0

    @property
    def where(self) -> str:
        """How a message names a JSONL partition past the first (its line numbers count from its start)."""
        return f"partition {self.index} (the lines from byte {self.start:,})"


@dataclass(frozen=True)
class Payload:
    """A bundle's files as bytes, with the sha256 the registry recorded for each."""

    bundle_sha256: str
    files: dict[str, bytes]
    digests: dict[str, str]


@dataclass(frozen=True)
class Task:
    """Everything a worker needs besides the partition and the bundle."""

    layout: Layout
    schema: pa.Schema
    text_field: str
    spans: int
    strict: bool
    fields: frozenset[str] | None = None  # JSONL with every field kept: the fields the sample had
    sampled: int = 0


# -- on the workers ---------------------------------------------------------------------------
_FOLDERS: dict[str, Path] = {}
_FOLDERS_LOCK = threading.Lock()
_THREAD = threading.local()


def _bundle_folder(payload: Payload) -> Path:
    """The worker's verified copy of the bundle: hashed once per worker process, then reused."""
    with _FOLDERS_LOCK:
        folder = _FOLDERS.get(payload.bundle_sha256)
        if folder is not None:
            return folder
        folder = Path(tempfile.mkdtemp(prefix=f"textsieve-bundle-{payload.bundle_sha256[:12]}-"))
        for name, data in payload.files.items():
            actual = hashlib.sha256(data).hexdigest()
            if actual != payload.digests[name]:
                shutil.rmtree(folder, ignore_errors=True)
                raise IntegrityError(
                    f"bundle file {name} reached a worker with sha256 {actual[:12]}…, the registry says "
                    f"{payload.digests[name][:12]}…"
                )
            (folder / name).write_bytes(data)
        _FOLDERS[payload.bundle_sha256] = folder
        return folder


def _predictor(payload: Payload) -> Predictor:
    """One session per worker thread: onnxruntime sessions are run by one thread at a time here."""
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.runtime import Predictor

    sessions: dict[str, Predictor] | None = getattr(_THREAD, "sessions", None)
    if sessions is None:
        sessions = _THREAD.sessions = {}
    found = sessions.get(payload.bundle_sha256)
    if found is None:
        # As the local pool's workers (scoring/pool.py): every file is hashed against the registry's
        # record, but the graph check, which passed when the version was published, is not repeated:
        # its import of the onnx package cost each worker ~0.5 s of its first partition
        # (bench/README.md, "Where a Dask run's extra time goes").
        checked = open_bundle(_bundle_folder(payload), check_onnx=False)
        found = sessions[payload.bundle_sha256] = Predictor.from_bundle(checked, threads=1)
    return found


@contextlib.contextmanager
def _parquet_source(fs: Any, path: str) -> Iterator[Any]:
    """What to hand ``pyarrow.parquet.ParquetFile`` for ``path`` on fsspec file system ``fs``.

    A local file goes as its path, and Arrow opens it itself. Given a Python file object instead,
    Arrow's column readers hold buffers that only the GIL may release, and a reader's last
    reference can be dropped by an Arrow pool thread after the interpreter began to exit, which
    aborts the process ("terminate called without an active exception", seen in CI: `score
    --cluster` refusing a missing column exited -6 once; under CPU contention here 5 runs in
    120). Remote files still go through fsspec's file objects, closed on leaving."""
    from fsspec.implementations.local import LocalFileSystem

    if isinstance(fs, LocalFileSystem):
        yield path
    else:
        with fs.open(path, "rb") as f:
            yield f


def read_partition(part: Partition) -> list[Any]:
    """The partition's rows, read with fsspec (local paths included)."""
    import fsspec

    if part.fmt == "parquet":
        import pyarrow.parquet as pq

        with _parquet_source(*fsspec.core.url_to_fs(part.url)) as source:
            table = pq.ParquetFile(source).read_row_groups(list(part.row_groups))
        rows: list[Any] = table.to_pylist()
        return rows
    rows = []
    with fsspec.open(part.url, "rb") as f:
        if part.start > 0:
            f.seek(part.start - 1)
            f.readline()  # the line that started before this range belongs to the previous partition
        number = 0  # lines of a partition that starts the file are numbered as the file's
        while f.tell() < part.end:
            raw = f.readline()
            number += 1
            if not raw:
                break
            if not raw.strip():
                continue
            try:
                row = formats.json_loads(raw)
            except ValueError:
                if cr_separated(raw):  # as the local reader: a file whose lines end in \r alone
                    raise cr_line_ends(f"{part.url}: {_line(part, number)}") from None
                rows.append(Unreadable(f"{_line(part, number)} is not valid JSON"))
                continue
            if formats.lone_surrogate(row, raw):
                row = Unreadable(f"{_line(part, number)} {formats.LONE_SURROGATE}")
            rows.append(row)
    return rows


def _line(part: Partition, number: int) -> str:
    """Line ``number`` of the partition, named as local scoring names it where the partition knows it."""
    return f"line {number}" if part.numbered_as_the_file else f"line {number} of {part.where}"


def score_partition(payload: Payload, part: Partition, task: Task) -> pa.Table:
    """Runs on a worker: read, score and lay out one partition."""
    rows = read_partition(part)
    try:
        check_fields(rows, task.fields, first_row=part.first_row, sampled=task.sampled)
        chunk = split(rows, task.text_field, strict=task.strict, first_row=part.first_row)
        scored = score_texts(_predictor(payload), chunk.texts, task.spans)
        out = output_rows(rows, chunk, scored, task.layout)
        return formats.to_table(out, task.schema, part.first_row)
    except InputError as exc:
        if part.numbered_as_the_file:
            raise
        raise InputError(f"{part.where}: {exc.message}") from None


# -- on the client ------------------------------------------------------------------------------
def partitions(url: str, fmt: str, partition_bytes: int) -> tuple[list[Partition], pa.Schema | None]:
    import fsspec

    try:
        fs, path = fsspec.core.url_to_fs(url)
    except ImportError as exc:  # fsspec knows the scheme; its filesystem package is not installed
        raise InputError(f"{url}: {exc}, here and on every worker, to read such a URL") from exc
    except ValueError as exc:  # "Protocol not known: …"
        raise InputError(f"{url}: {exc}; give a path or a URL an fsspec filesystem reads") from exc
    try:
        info = fs.info(path)
    except FileNotFoundError:
        raise InputError(f"{url}: no such file") from None
    if info.get("type") == "directory":
        raise InputError(f"{url}: is a folder; INPUT is one JSONL or Parquet file")
    if fmt == "parquet":
        import pyarrow.parquet as pq

        with _parquet_source(fs, path) as source:
            try:
                pf = pq.ParquetFile(source)
            except Exception as exc:  # pyarrow raises several kinds for a file that is not Parquet
                raise InputError(f"{url}: not a Parquet file ({exc})") from exc
            counts = [pf.metadata.row_group(i).num_rows for i in range(pf.metadata.num_row_groups)]
            schema = pf.schema_arrow
            pf.close()
        formats.check_unique(url, schema.names, "the schema")
        firsts = [0, *itertools.accumulate(counts)]
        return [Partition(i, url, fmt, row_groups=(i,), first_row=firsts[i]) for i in range(len(counts))], schema
    size = int(info["size"])
    parts = [
        Partition(i, url, fmt, start=lo, end=min(lo + partition_bytes, size))
        for i, lo in enumerate(range(0, max(size, 1), partition_bytes))
    ]
    return parts, None


def _sample(parts: Sequence[Partition]) -> list[Any]:
    """The input's first ``SAMPLE_ROWS`` rows, read on this process before any partition is sent."""
    if not parts:
        return []
    first = parts[0]
    if first.fmt == "parquet":
        return _parquet_head(first, SAMPLE_ROWS)
    first = Partition(0, first.url, first.fmt, 0, min(first.end, SAMPLE_BYTES))
    return read_partition(first)[:SAMPLE_ROWS]


def _parquet_head(part: Partition, count: int) -> list[Any]:
    """The first ``count`` rows of the partition's row groups. Reading the first row group whole as
    Python rows to keep 1,000 of them took ~0.6 s of this process's CPU, before any work was sent,
    for the 125,000 rows of a 1,000,000-row file's first row group (bench/README.md, "Where a Dask
    run's extra time goes")."""
    import fsspec
    import pyarrow.parquet as pq

    with _parquet_source(*fsspec.core.url_to_fs(part.url)) as source:
        pf = pq.ParquetFile(source)
        try:
            batches = pf.iter_batches(batch_size=count, row_groups=list(part.row_groups))
            head = next(batches, None)
            del batches
        finally:
            pf.close()
    rows: list[Any] = [] if head is None else head.to_pylist()
    return rows


def _layout(
    sample: list[Any], input_schema: pa.Schema | None, opts: Options, resolved: Resolved, *, whole: bool
) -> Layout:
    """The output's layout; ``whole``: the sample is every row of the input."""
    if input_schema is not None:
        columns = list(input_schema.names)
        if opts.text_field not in columns:
            raise InputError(
                f"the input has no column {opts.text_field!r}; its columns: {', '.join(columns[:20])}; "
                "pass --text-field NAME"
            )
        formats.check_text_column(input_schema, opts.text_field)
    else:
        seen: dict[str, None] = {}
        for row in sample:
            if isinstance(row, dict):
                seen.update(dict.fromkeys(row))
        if sample and opts.text_field not in seen:
            raise InputError(
                f"no row among the first {len(sample):,} has the field {opts.text_field!r}; fields seen: "
                f"{', '.join(list(seen)[:20]) or 'none'}; pass --text-field NAME"
            )
        columns = list(seen)
    keep = None if opts.keep is None else list(opts.keep)
    return plan(columns, keep, resolved.labels, spans=opts.spans > 0, complete=input_schema is not None or whole)


def _payload(resolved: Resolved) -> Payload:
    files = {}
    for name, digest in resolved.files.items():
        data = (resolved.folder / name).read_bytes()
        if hashlib.sha256(data).hexdigest() != digest:
            raise IntegrityError(f"{resolved.folder / name}: changed since the registry verified it; run again")
        files[name] = data
    return Payload(resolved.bundle_sha256, files, dict(resolved.files))


def _check_output(output: Path) -> None:
    if output.is_file():
        raise InputError(f"{output}: is a file; with --cluster, --out names a folder for the Parquet dataset")
    if output.is_dir() and any(output.iterdir()) and not (output / SIDECAR).is_file():
        raise InputError(f"{output}: is a folder holding other files; name a new folder (or one this verb wrote)")
    if not output.parent.is_dir():
        raise InputError(f"{output.parent}: no such folder for --out; create it first")
    check_writable(output.parent, output)


def _connect(address: str) -> Any:
    try:
        from distributed import Client
    except ModuleNotFoundError as exc:
        raise InputError(f"--cluster needs Dask distributed: {CLUSTER_EXTRA}") from exc
    try:
        # distributed's Client.__init__ has no annotations.
        return Client(address, timeout="15s", set_as_default=False)  # type: ignore[no-untyped-call]
    except (OSError, TimeoutError) as exc:
        raise UnavailableError(
            f"cannot reach the Dask scheduler at {address} ({exc}); start one with 'dask scheduler' "
            "(README: Scoring on a Dask cluster)"
        ) from exc
    except ValueError as exc:
        raise InputError(f"--cluster {address!r}: not a scheduler address, e.g. tcp://HOST:8786 ({exc})") from exc


def score_on_cluster(
    registry: Registry,
    model: str,
    source: str,
    output: Path,
    *,
    cluster: str,
    version: int | None = None,
    options: Options | None = None,
    resume: bool = False,
    partition_bytes: int = 64 << 20,
    stream: TextIO | None = None,
    retired: bool = False,
) -> Summary:
    """Score ``source`` on the Dask cluster at ``cluster`` into the Parquet dataset folder ``output``."""
    opts = options or Options()
    err = stream or sys.stderr
    started = time.monotonic()
    fmt = formats.detect(source, opts.input_format, "--input-format")
    if fmt in formats.DELIMITERS:
        raise InputError(
            f"--cluster reads Parquet or JSONL ({fmt.upper()} cannot be split at byte offsets safely: a quoted "
            "field may hold line breaks)"
        )
    formats._pyarrow()
    # The workers open INPUT themselves, from their own working folders: a relative path is made
    # absolute here (it named '/tmp/a/dask/big.parquet' on a worker started in /tmp/a/dask).
    source = _absolute(source)
    output = Path(os.path.abspath(output))
    _check_output(output)
    parts, input_schema = partitions(source, fmt, partition_bytes)
    resolved = resolve(registry, model, version, retired=retired)
    sample = _sample(parts)
    whole = len(parts) == 1 and parts[0].end <= SAMPLE_BYTES and len(sample) < SAMPLE_ROWS
    layout = _layout(sample, input_schema, opts, resolved, whole=whole)
    renamed_sample = [{layout.renamed[c]: r.get(c) for c in layout.kept} for r in sample if isinstance(r, dict)] or [
        {layout.renamed[c]: None for c in layout.kept}
    ]
    for r in renamed_sample:
        r.update(dict.fromkeys(layout.results))
    schema = formats.output_schema(layout, renamed_sample, input_schema)
    fields = frozenset(layout.kept) if input_schema is None and opts.keep is None else None
    task = Task(layout, schema, opts.text_field, opts.spans, opts.strict, fields, len(sample))
    # Before anything is written: a scheduler that cannot be reached left an empty unfinished run.
    client = _connect(cluster)
    try:
        return _score(client, cluster, resolved, parts, layout, task, source, output, opts, resume, err, started)
    finally:
        _close(client)


def _score(
    client: Any,
    cluster: str,
    resolved: Resolved,
    parts: list[Partition],
    layout: Layout,
    task: Task,
    source: str,
    output: Path,
    opts: Options,
    resume: bool,
    err: TextIO,
    started: float,
) -> Summary:
    """The run on a connected client: the unfinished run's folder, the partitions, OUTPUT."""
    work = work_dir(output)
    dataset = work / "dataset"
    expected = {
        "format": STATE_FORMAT,
        "input": {"url": source, "partitions": len(parts)},
        "options": opts.fixed(),
        **resolved.describe(),
    }
    if work.is_dir():
        old = _load_state(work)
        if not resume or old != expected:
            if resume:
                print(f"textsieve: the unfinished run in {work} differs; starting over", file=err)
            shutil.rmtree(work)
    dataset.mkdir(parents=True, exist_ok=True)
    atomic_write_text(work / "state.json", json.dumps(expected) + "\n")
    done = {p.index for p in parts if (dataset / _part_name(p.index)).is_file()}
    counts = _count_existing(dataset, done, err)
    todo = [p for p in parts if p.index not in done]
    progress = Progress(
        f"scoring {output.name} on {cluster}",
        fraction=lambda: len(done) / len(parts) if parts else 1.0,
        stream=err,
        every=opts.progress_every,
        start_count=counts[0],
    )
    tally = _Tally(*counts)
    try:
        _run(client, _payload(resolved), todo, task, dataset, done, progress, tally)
    except InputError:
        shutil.rmtree(work, ignore_errors=True)
        raise
    except TextsieveError as exc:  # a failure on a worker or of the cluster: the parts written are kept
        if not done:
            shutil.rmtree(work, ignore_errors=True)
            raise
        raise type(exc)(
            f"{exc.message}; the {len(done):,} of {len(parts):,} partitions written are kept in {work}: run the same "
            "command with --resume to continue"
        ) from exc
    except KeyboardInterrupt as exc:
        # The CLI's one line for Ctrl-C or SIGTERM carries it (textsieve/cli.py _stopped), as a local run's.
        exc.add_note(
            f"stopped after {len(done):,} of {len(parts):,} partitions ({tally.rows:,} rows) were written; they are "
            f"kept in {work}; {output} was not written; run the same command with --resume to continue"
        )
        raise
    finally:
        progress.close()
    rows, errors = tally.rows, tally.errors
    meta = metadata(resolved, layout, opts, rows, errors, source)
    meta["partitions"] = len(parts)
    atomic_write_text(dataset / SIDECAR, json.dumps(meta, indent=2, ensure_ascii=False) + "\n")
    fsync_dir(dataset)
    _swap_in(dataset, output)
    shutil.rmtree(work, ignore_errors=True)
    return Summary(
        output,
        rows,
        errors,
        resolved.model,
        resolved.version,
        resolved.bundle_sha256,
        time.monotonic() - started,
        counts[0],
    )


def _absolute(source: str) -> str:
    """``source`` as the workers must open it: a local path made absolute, a URL as given."""
    if "://" in source:
        return source
    return os.path.abspath(source)


def _close(client: Any) -> None:
    """Close the client on every path, so that its ``__del__`` has nothing left to do at exit (a traceback
    ended by "Exception ignored in Client.__del__ … TimeoutError" otherwise)."""
    with contextlib.suppress(Exception):
        client.close(timeout=10)


@dataclass
class _Tally:
    """Rows and error rows written so far: what an interrupted run reports."""

    rows: int
    errors: int


# What a worker's OSError says, briefly (pyarrow's carries no strerror and quotes the path again).
_UNREADABLE: tuple[tuple[type[OSError], str], ...] = (
    (FileNotFoundError, "no such file"),
    (PermissionError, "permission denied"),
    (IsADirectoryError, "a folder"),
    (NotADirectoryError, "a part of the path is not a folder"),
)


def _worker_error(exc: BaseException, part: Partition) -> BaseException:
    """What a partition's failure on a worker becomes here: an error of our tree, one line at the CLI."""
    if isinstance(exc, TextsieveError):  # bad input found on the worker (a row, a column), or a bundle check
        return exc
    why = next((text for kind, text in _UNREADABLE if isinstance(exc, kind)), None)
    if why is not None:
        return InputError(
            f"{part.url}: a Dask worker cannot read it ({why}); the workers must see the same path as this "
            "process (a shared filesystem) or read a URL (s3://, gs://, http://, …)"
        )
    kind = type(exc).__name__
    return UnavailableError(f"partition {part.index} of {part.url} failed on a Dask worker: {kind}: {exc}")


def _part_name(index: int) -> str:
    return f"part-{index:05d}.parquet"


def _load_state(work: Path) -> dict[str, Any] | None:
    try:
        data: dict[str, Any] = json.loads((work / "state.json").read_text(encoding="utf-8"))
    except (FileNotFoundError, ValueError):
        return None
    return data


def _count_existing(dataset: Path, done: set[int], err: TextIO) -> tuple[int, int]:
    """Rows and error rows in the parts already written; a part that is no longer Parquet (damaged
    since) leaves ``done`` and is scored again, rather than stop the resumed run with a traceback."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rows = errors = 0
    for i in sorted(done):
        try:
            table = pq.read_table(dataset / _part_name(i), columns=["error"])
        except (OSError, pa.ArrowException):
            print(f"textsieve: {_part_name(i)} of the unfinished run cannot be read; scoring it again", file=err)
            done.discard(i)
            continue
        rows += table.num_rows
        errors += table.num_rows - table.column("error").null_count
    return rows, errors


def _run(
    client: Any,
    payload: Payload,
    todo: Sequence[Partition],
    task: Task,
    dataset: Path,
    done: set[int],
    progress: Progress,
    tally: _Tally,
) -> None:
    from distributed import as_completed

    if not todo:
        return
    shipped = client.scatter(payload, broadcast=True, hash=False)
    run = uuid.uuid4().hex[:8]
    futures = {
        client.submit(score_partition, shipped, p, task, key=f"textsieve-score-{run}-{p.index}", pure=False): p
        for p in todo
    }
    try:
        # distributed's as_completed has no annotations.
        done_iter = as_completed(  # type: ignore[no-untyped-call]
            futures, with_results=True, raise_errors=False, loop=client.loop
        )
        for future, result in done_iter:
            part = futures[future]
            if future.status == "error":  # distributed hands the error as (type, exception, traceback)
                raise _worker_error(result[1], part) from None
            if isinstance(result, BaseException):  # cancelled (the scheduler gave it up)
                raise _worker_error(result, part) from None
            formats.write_part(dataset / _part_name(part.index), result)
            future.release()
            done.add(part.index)
            tally.rows += result.num_rows
            tally.errors += result.num_rows - result.column("error").null_count
            progress.update(tally.rows)
    except BaseException:
        with contextlib.suppress(Exception):
            client.cancel(list(futures))
        raise
    progress.update(tally.rows, force=True)


def _swap_in(dataset: Path, output: Path) -> None:
    """Rename the finished dataset to OUTPUT; a dataset this verb wrote before is replaced only afterwards."""
    if output.exists():
        old = output.with_name(f".{output.name}.old-{os.getpid()}")
        os.rename(output, old)
        os.rename(dataset, output)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.rename(dataset, output)
    fsync_dir(output.parent)


__all__ = ["Partition", "Payload", "SIDECAR", "partitions", "read_partition", "score_on_cluster", "score_partition"]
