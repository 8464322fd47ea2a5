"""``textsieve score`` on this machine: stream the input in chunks through the worker processes and
write the output under a temporary name, renamed into place only when complete.

The unfinished run lives in a folder beside OUTPUT (``.OUTPUT.score-partial/``): the output so far
(``output.part`` for JSONL/CSV, ``parts/NNNNNN.parquet`` for Parquet) and ``state.json``. A chunk is
first made durable (fsync), then the state is atomically replaced to count it; so the state never
counts a chunk that is not on disk, and output written after the last state (a crash between the two
steps) is cut off again on resume, at the length the state records. The state also pins the version,
the bundle's sha256, the options and the input's size and mtime: ``--resume`` refuses a run whose input
or options changed rather than splice two different runs into one file.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import fcntl
import json
import os
import shutil
import sys
import time
from collections import deque
from collections.abc import Iterator, Sequence
from concurrent.futures import Future
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from textsieve import __version__
from textsieve.errors import InputError, UnavailableError
from textsieve.files import atomic_write_text, check_out_file, check_writable, fsync_dir, special_file
from textsieve.scoring import formats
from textsieve.scoring.columns import Layout, plan
from textsieve.scoring.model import Resolved, resolve
from textsieve.scoring.pool import Pool, default_workers, pieces
from textsieve.scoring.progress import Progress
from textsieve.scoring.rows import Scored, Split, Unreadable, check_fields, output_rows, split

if TYPE_CHECKING:
    import pyarrow as pa

    from textsieve.registry.api import Registry

# 2: the state records the CRC-32 of the output written so far (committed_crc32).
STATE_FORMAT = 2
DEFAULT_CHUNK = 8192
# The most worker processes a core this process may use (default_workers()): more only add sessions in
# memory and switches between them (--workers 999 tried to start 999).
WORKERS_PER_CORE = 4


def most_workers() -> int:
    """The most worker processes a run may ask for: WORKERS_PER_CORE a core this process may use."""
    return WORKERS_PER_CORE * default_workers()


# Chunks in flight: one being written while the workers score the next two; memory holds three.
DEPTH = 3
CAUTION = (
    "Predictions are aids for human review: they can carry bias from the training data and need "
    "monitoring; decisions stay with accountable people."
)


@dataclass(frozen=True)
class Options:
    """How to score: which field, what to keep, spans, strictness, and how to split the work."""

    text_field: str = "text"
    keep: tuple[str, ...] | None = None
    spans: int = 0
    strict: bool = False
    workers: int | None = None  # None: one per core; 0: in this process
    chunk_rows: int = DEFAULT_CHUNK
    input_format: str | None = None
    output_format: str | None = None
    progress_every: float = 10.0

    def fixed(self) -> dict[str, object]:
        """What a resumed run must share with the run it continues."""
        return {
            "text_field": self.text_field,
            "keep": None if self.keep is None else list(self.keep),
            "spans": self.spans,
            "strict": self.strict,
            "chunk_rows": self.chunk_rows,
        }


@dataclass
class Summary:
    """What a run did: rows written, rows without a text, the version used, the time it took."""

    output: Path
    rows: int
    errors: int
    model: str
    version: int
    bundle_sha256: str
    seconds: float
    resumed_rows: int = 0
    extra_columns: list[str] = field(default_factory=list)

    def line(self) -> str:
        rate = (self.rows - self.resumed_rows) / self.seconds if self.seconds > 0 else 0.0
        resumed = f", {self.resumed_rows:,} of them from the interrupted run" if self.resumed_rows else ""
        errors = f"; {self.errors:,} row(s) had no text to score (see their 'error' column)" if self.errors else ""
        return (
            f"scored {self.rows:,} rows with {self.model} version {self.version} "
            f"(bundle sha256 {self.bundle_sha256[:12]}…) in {self.seconds:.1f} s, {rate:,.0f} texts/s{resumed}"
            f"{errors} → {self.output}"
        )


def work_dir(output: Path) -> Path:
    return output.with_name(f".{output.name}.score-partial")


def sidecar(output: Path) -> Path:
    """Where the model, version and bundle sha256 of a JSONL or CSV output are recorded."""
    return output.with_name(f"{output.name}.meta.json")


def check_output(output: Path) -> None:
    if output.is_dir():
        raise InputError(f"{output}: is a folder; --out names the file to write (.jsonl, .csv, .tsv or .parquet)")
    check_out_file(output)
    if not output.parent.is_dir():
        raise InputError(f"{output.parent}: no such folder for --out; create it first")
    check_writable(output.parent, output)


def _input_identity(path: Path) -> dict[str, object]:
    st = path.stat()
    return {"path": str(path.resolve()), "size": st.st_size, "mtime_ns": st.st_mtime_ns}


@contextlib.contextmanager
def _locked(work: Path) -> Iterator[None]:
    fd = os.open(work / "lock", os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise UnavailableError(f"another 'textsieve score' is writing the same output ({work})") from None
        yield
    finally:
        os.close(fd)


class _Run:
    """One run's state and output files, in the work folder."""

    def __init__(self, work: Path, out_fmt: str) -> None:
        self.work = work
        self.out_fmt = out_fmt
        self.state: dict[str, Any] = {}
        # The rows state.json counts: what --resume keeps. The state in memory runs ahead of it while
        # a chunk is being counted (an interrupt between the two said one chunk more than was kept).
        self.saved_rows = 0

    @property
    def state_path(self) -> Path:
        return self.work / "state.json"

    @property
    def parts(self) -> Path:
        return self.work / "parts"

    def load(self) -> dict[str, Any] | str | None:
        """The saved state; None when there is none; or why this version cannot continue it (cut
        short, not JSON, from another state format, or not the shape it writes)."""
        try:
            data = json.loads(self.state_path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            return None
        except (ValueError, OSError):
            return "is not JSON"
        return data if _well_formed(data) else "is not a state this version wrote"

    def damage(self, state: dict[str, Any]) -> str | None:
        """Why the output the state counts is no longer on disk as it was written, or None."""
        if self.out_fmt == "parquet":
            files = [self.part(i) for i in range(state["chunks"])]
            length = None
            what = "its Parquet parts are"
        else:
            files = [self.work / "output.part"]
            length = state["committed_bytes"]
            what = "output.part is"
        if formats.committed_crc32(files, length) != state["committed_crc32"]:
            return f"{what} no longer what it wrote (missing, cut short or changed)"
        return None

    def save(self) -> None:
        atomic_write_text(self.state_path, json.dumps(self.state, indent=1) + "\n")
        self.saved_rows = int(self.state["rows"])

    def part(self, index: int) -> Path:
        return self.parts / f"{index:06d}.parquet"


def _well_formed(state: object) -> bool:
    """Whether ``state`` has the keys and types :func:`_stream` saves (a state.json edited or
    damaged otherwise is not continued: it would be a traceback, or rows skipped)."""
    if not isinstance(state, dict) or state.get("format") != STATE_FORMAT:
        return False
    counts = ("chunks", "rows", "errors", "committed_bytes", "committed_crc32")
    if not all(type(state.get(key)) is int and state[key] >= 0 for key in counts):
        return False
    layout = state.get("layout")
    if not isinstance(layout, dict):
        return False
    kept, renamed = layout.get("kept"), layout.get("renamed")
    return (
        isinstance(kept, list)
        and isinstance(renamed, dict)
        and all(isinstance(c, str) and isinstance(renamed.get(c), str) for c in kept)
    )


def _resume_state(
    run: _Run, expected: dict[str, Any], output: Path, registry: Registry, out: TextIO
) -> dict[str, Any] | None:
    old = run.load()
    if old is None:
        print(f"textsieve: nothing to resume for {output}; starting from the first row", file=out)
        return None
    if isinstance(old, str):
        print(
            f"textsieve: the saved state of the unfinished run for {output} is damaged ({run.work.name}/state.json "
            f"{old}); starting from the first row",
            file=out,
        )
        return None
    for key in ("input", "options", "output_format", "model", "version", "bundle_sha256"):
        if old.get(key) != expected[key]:
            raise InputError(f"--resume: the unfinished run for {output} {_differs(key, old, expected, registry)}")
    why = run.damage(old)
    if why is not None:
        # Appending to it would splice garbage, or a file padded with NUL bytes, into OUTPUT.
        print(
            f"textsieve: cannot continue the unfinished run for {output} ({run.work.name}: {why}); "
            "starting from the first row",
            file=out,
        )
        return None
    return old


# Options.fixed()'s keys as the command line spells them.
_FLAGS = {
    "text_field": "--text-field",
    "keep": "--keep",
    "spans": "--spans",
    "strict": "--strict",
    "chunk_rows": "--chunk-rows",
}
START_OVER = "run without --resume to start over"


def _shown(key: str, value: object, *, again: bool = False) -> str:
    """An option as it is typed (``--spans 3``; ``again``: its value alone, ``3``, after the flag was
    named), ``--keep id,body``, ``--keep ''``, every column, ``--strict`` or not."""
    if key == "keep":
        if value is None:
            return "every column (no --keep)"
        return "--keep " + (",".join(map(str, value)) if value else "''")  # type: ignore[call-overload]
    if key == "strict":
        return "--strict" if value else "no --strict"
    return str(value) if again else f"{_FLAGS.get(key, key)} {value}"


def _differs(key: str, old: dict[str, Any], expected: dict[str, Any], registry: Registry) -> str:
    """How the unfinished run differs from this command in ``key``, and what to run instead."""
    was, now = old.get(key), expected[key]
    if key == "options" and isinstance(was, dict) and isinstance(now, dict):
        changed = [k for k in now if was.get(k) != now[k]]
        parts = [f"{_shown(k, was.get(k))}, now {_shown(k, now[k], again=True)}" for k in changed]
        return f"used other options ({'; '.join(parts)}); run with the same options, or {START_OVER}"
    if key == "input":
        return f"read another input, or this one before it changed (size, modification time); {START_OVER}"
    if key == "output_format":
        return f"wrote {was} (now {now}); pass --output-format {was} to continue it, or {START_OVER}"
    if key == "model":
        return f"used the model {was!r} (now {now!r}); pass --model {was} to continue it, or {START_OVER}"
    if key == "version" and isinstance(was, int):
        return f"used version {was} (now {now}); {_resume_version(registry, str(old.get('model')), was)}"
    return f"used another bundle of version {now} (sha256 {str(was)[:12]}…, now {str(now)[:12]}…); {START_OVER}"


def _resume_version(registry: Registry, model: str, version: int) -> str:
    """How to continue a run that scored with ``version``: that version named, with --retired when a
    promotion has retired it since (the hint after an interrupt was 'the same command', which then
    pinned the new live version and was refused)."""
    from textsieve.errors import NotFoundError
    from textsieve.registry.records import State

    try:
        info = registry.version(model, version)
    except NotFoundError:
        info = None
    if info is None:
        return START_OVER
    flags = (
        f"--version {version} --retired --resume" if info.state == State.RETIRED else f"--version {version} --resume"
    )
    return f"continue it with {flags}, or {START_OVER}"


def _combine(pool: Pool, futures: Sequence[tuple[slice, Future[Scored]]], count: int, classes: int) -> Scored:
    import numpy as np

    if not futures:
        return Scored(np.zeros(0, np.int64), np.zeros((0, classes), np.float64), [] if count == 0 else None)
    parts = [pool.result(f) for _, f in futures]
    spans = None
    if parts[0].spans is not None:
        spans = [s for p in parts for s in (p.spans or [])]
    return Scored(np.concatenate([p.best for p in parts]), np.concatenate([p.probabilities for p in parts]), spans)


def _other_separator(reader: formats.Reader) -> str | None:
    """What to do when a delimited file's header is one column holding another separator (a
    ';'-separated file named .csv, as spreadsheets write them where ',' is the decimal mark)."""
    if not isinstance(reader, formats.CsvReader) or len(reader.columns or []) != 1:
        return None
    header = (reader.columns or [""])[0]
    found = next((s for s in (";", "\t", "|", ",") if s in header and s != reader.delimiter), None)
    if found is None:
        return None
    if found == "\t":
        return "the header holds tabs: the file looks tab-separated; name it .tsv or pass --input-format tsv"
    return (
        f"the header holds {found!r}, not the {reader.kind} separator: textsieve reads CSV with ',' and TSV with "
        "tabs (RFC 4180 quoting); save the file with one of those"
    )


def _first_bytes(reader: formats.Reader, most: int = 24) -> str:
    """The input's first non-blank line's first ``most`` bytes, as a bytes literal (control bytes and
    non-ASCII escaped, so nothing in it reaches the terminal as it is), clipped with "…"."""
    path = getattr(reader, "path", None)
    if path is None:
        return "nothing readable"
    with open(path, "rb") as f:
        block = f.read(1 << 16)  # a compressed file may hold no line break for a long way
    line = next((raw for raw in block.split(b"\n") if raw.strip()), b"")
    shown = repr(line.strip()[:most])
    return shown + ("…" if len(line.strip()) > most else "")


def _layout_for(reader: formats.Reader, first: list[Any], opts: Options, resolved: Resolved, err: TextIO) -> Layout:
    if reader.columns is not None:
        if opts.text_field not in reader.columns:
            raise InputError(
                f"the input has no column {opts.text_field!r}; its columns: {', '.join(reader.columns[:20])}; "
                f"{_other_separator(reader) or 'pass --text-field NAME'}"
            )
        if reader.schema is not None:
            formats.check_text_column(reader.schema, opts.text_field)
        columns = reader.columns
    else:
        seen: dict[str, None] = {}
        for row in first:
            if isinstance(row, dict):
                seen.update(dict.fromkeys(row))
        if first and all(isinstance(row, Unreadable) and formats.LONE_SURROGATE not in row for row in first):
            # A gzip file, a CSV file named .jsonl: no field was seen because no line was JSON at all.
            where = getattr(reader, "path", "the input")
            which = (
                f"none of the first {len(first):,} lines of {where} is" if len(first) > 1 else f"{where}'s line is not"
            )
            raise InputError(
                f"{which} JSON "
                f"(the first starts with {_first_bytes(reader)}); JSON Lines holds one JSON object a line, "
                "in UTF-8: decompress a compressed file first, or name the format with --input-format"
            )
        if first and opts.text_field not in seen:
            shown = ", ".join(list(seen)[:20]) or "none"
            raise InputError(
                f"no row among the first {len(first):,} has the field {opts.text_field!r}; fields seen: {shown}; "
                "pass --text-field NAME"
            )
        columns = list(seen)
    keep = None if opts.keep is None else list(opts.keep)
    # A first chunk shorter than a chunk is the whole file: a field it lacks is in no row.
    complete = reader.columns is not None or len(first) < opts.chunk_rows
    if not complete and keep is not None:
        unseen = [c for c in keep if c not in columns]
        if unseen:
            print(
                f"textsieve: no row among the first {len(first):,} has the field(s) {', '.join(map(repr, unseen))}; "
                "--keep writes them empty where a row lacks them",
                file=err,
            )
    return plan(columns, keep, resolved.labels, spans=opts.spans > 0, complete=complete)


def score_file(
    registry: Registry,
    model: str,
    source: Path,
    output: Path,
    *,
    version: int | None = None,
    options: Options | None = None,
    resume: bool = False,
    stream: TextIO | None = None,
    retired: bool = False,
) -> Summary:
    """Score every row of ``source`` with ``model`` (its live version, or ``version``) into ``output``.

    Bad input (a missing file, a wrong text field, an unknown model or version, a folder as output)
    is an InputError or NotFoundError before anything is written; a tampered blob is an
    IntegrityError before the first row.
    """
    opts = options or Options()
    err = stream or sys.stderr
    started = time.monotonic()
    check_output(output)
    if output.exists() and source.exists() and os.path.samefile(output, source):
        # The finished output is renamed over OUTPUT: the input would be lost, replaced by its scores.
        raise InputError(f"{output}: --out names the input file itself; write the scores to another file")
    in_fmt = formats.detect(str(source), opts.input_format, "--input-format")
    out_fmt = formats.detect(str(output), opts.output_format, "--output-format")
    meta = sidecar(output)
    if out_fmt != "parquet" and meta.exists() and source.exists() and os.path.samefile(meta, source):
        # The metadata of a JSONL, CSV or TSV output is written to OUTPUT.meta.json, over the input.
        raise InputError(
            f"{output}: its metadata goes to {meta.name}, which is the input file; "
            "name the input or the output differently"
        )
    what = special_file(meta) if out_fmt != "parquet" else None
    if what is not None:
        raise InputError(
            f"--out {output}: its metadata goes to {meta}, which is {what}, which textsieve does not write over; "
            "remove it or name another output"
        )
    if opts.chunk_rows < 1:
        raise InputError(f"--chunk-rows must be 1 or more, not {opts.chunk_rows}")
    reader = formats.open_reader(source, in_fmt)
    try:
        if out_fmt == "parquet":
            formats._pyarrow()
        resolved = resolve(registry, model, version, retired=retired)
        expected = {
            "format": STATE_FORMAT,
            "input": _input_identity(source),
            "options": opts.fixed(),
            "output_format": out_fmt,
            **resolved.describe(),
        }
        work = work_dir(output)
        run = _Run(work, out_fmt)
        previous = None
        if work.is_dir():
            with _locked(work):
                previous = _resume_state(run, expected, output, registry, err) if resume else None
                if previous is None:
                    if not resume:
                        print(f"textsieve: discarding the unfinished run in {work} (--resume continues it)", file=err)
                    shutil.rmtree(work)
        elif resume:
            print(f"textsieve: nothing to resume for {output}; starting from the first row", file=err)
        skip = int(previous["rows"]) if previous else 0
        chunks = reader.chunks(opts.chunk_rows, skip=skip)
        first = next(chunks, [])
        if not first and not skip:
            # Scored all the same (an output with its columns and metadata, exit 0): a scheduled run on a
            # day with nothing new is not an error. Said, so an empty export upstream is not missed.
            print(f"textsieve: 0 rows scored: {source} is empty", file=err)
        if previous:
            layout = Layout(
                tuple(previous["layout"]["kept"]),
                dict(previous["layout"]["renamed"]),
                resolved.labels,
                opts.spans > 0,
            )
        else:
            layout = _layout_for(reader, first, opts, resolved, err)
            if opts.strict:
                split(first, opts.text_field, strict=True, first_row=0)
        # JSON Lines rows each name their fields: with every field kept, a field the first chunk
        # did not have would have no column (it was left out of every row, silently).
        fields = frozenset(layout.kept) if reader.columns is None and opts.keep is None else None
        work.mkdir(exist_ok=True)
        with _locked(work):
            return _stream(
                run, previous, expected, reader, first, chunks, layout, fields, resolved, opts, output, err, started
            )
    finally:
        reader.close()


def _stream(
    run: _Run,
    previous: dict[str, Any] | None,
    expected: dict[str, Any],
    reader: formats.Reader,
    first: list[Any],
    chunks: Iterator[list[Any]],
    layout: Layout,
    fields: frozenset[str] | None,
    resolved: Resolved,
    opts: Options,
    output: Path,
    err: TextIO,
    started: float,
) -> Summary:
    run.state = previous or {
        **expected,
        "layout": {"kept": list(layout.kept), "renamed": layout.renamed},
        "chunks": 0,
        "rows": 0,
        "errors": 0,
        "committed_bytes": 0,
        "committed_crc32": 0,
    }
    resumed = run.saved_rows = int(run.state["rows"])
    if previous is None:
        run.save()
    writer: formats.AppendWriter | None = None
    schema: pa.Schema | None = None
    if run.out_fmt == "parquet":
        run.parts.mkdir(exist_ok=True)
        if run.state["chunks"]:
            schema = formats._pyarrow().parquet.read_schema(run.part(0))
    else:
        kinds = {"jsonl": formats.JsonlWriter, "csv": formats.CsvWriter, "tsv": formats.TsvWriter}
        kind = kinds[run.out_fmt]
        writer = kind(
            run.work / "output.part",
            layout,
            start=int(run.state["committed_bytes"]),
            crc32=int(run.state["committed_crc32"]),
        )
    binary = formats.binary_columns(reader.schema, layout.kept) if writer is not None else []
    workers = default_workers() if opts.workers is None else opts.workers
    pool = Pool(resolved.folder, workers=workers)
    progress = Progress(
        f"scoring {output.name}", fraction=reader.fraction, stream=err, every=opts.progress_every, start_count=resumed
    )
    classes = len(resolved.labels)
    finished = False
    try:
        pending: deque[tuple[list[Any], Split, list[tuple[slice, Future[Scored]]], int]] = deque()
        row = resumed
        for chunk in _chain(first, chunks):
            # Only a row after the first chunk can hold a new field, so that chunk was full.
            check_fields(chunk, fields, first_row=row, sampled=opts.chunk_rows)
            formats.check_bytes(chunk, binary, first_row=row, out_fmt=run.out_fmt)
            part = split(chunk, opts.text_field, strict=opts.strict, first_row=row)
            futures = [(s, pool.submit(part.texts[s], opts.spans)) for s in pieces(part.texts, pool.parallel)]
            pending.append((chunk, part, futures, row))
            row += len(chunk)
            while len(pending) >= DEPTH:
                schema = _flush(run, pool, writer, schema, reader, layout, classes, opts, *pending.popleft())
                progress.update(int(run.state["rows"]))
        while pending:
            schema = _flush(run, pool, writer, schema, reader, layout, classes, opts, *pending.popleft())
            progress.update(int(run.state["rows"]))
        progress.update(int(run.state["rows"]), force=True)
        if writer is not None:
            writer.close()
            writer = None
        _finish(run, layout, resolved, opts, output, schema, reader)
        finished = True
    except InputError:
        # Bad input is not worth resuming: the input has to change. Leave nothing behind.
        pool.close(cancel=True)
        if writer is not None:
            writer.close()
        shutil.rmtree(run.work, ignore_errors=True)
        raise
    except KeyboardInterrupt as exc:
        pool.close(cancel=True)
        # The CLI's one line for Ctrl-C or SIGTERM carries it (textsieve/cli.py _stopped).
        exc.add_note(
            f"stopped after {run.saved_rows:,} rows; {output} was not written; "
            "run the same command with --resume to continue"
        )
        raise
    finally:
        progress.close()
        if writer is not None:
            writer.close()
        if finished:
            pool.close()
        else:
            pool.close(cancel=True)
    return Summary(
        output,
        int(run.state["rows"]),
        int(run.state["errors"]),
        resolved.model,
        resolved.version,
        resolved.bundle_sha256,
        time.monotonic() - started,
        resumed,
    )


def _chain(first: list[Any], rest: Iterator[list[Any]]) -> Iterator[list[Any]]:
    if first:
        yield first
    yield from rest


def _flush(
    run: _Run,
    pool: Pool,
    writer: formats.AppendWriter | None,
    schema: pa.Schema | None,
    reader: formats.Reader,
    layout: Layout,
    classes: int,
    opts: Options,
    chunk: list[Any],
    part: Split,
    futures: list[tuple[slice, Future[Scored]]],
    first_row: int,
) -> pa.Schema | None:
    scored = _combine(pool, futures, len(part.texts), classes)
    rows = output_rows(chunk, part, scored, layout)
    if writer is not None:
        writer.write(rows)
        run.state["committed_bytes"] = writer.commit()
        run.state["committed_crc32"] = writer.crc32
    else:
        if schema is None:
            schema = formats.output_schema(layout, rows, reader.schema)
        table = formats.to_table(rows, schema, first_row)
        run.state["committed_crc32"] = formats.write_part(
            run.part(int(run.state["chunks"])), table, int(run.state["committed_crc32"])
        )
    run.state["chunks"] = int(run.state["chunks"]) + 1
    run.state["rows"] = int(run.state["rows"]) + len(chunk)
    run.state["errors"] = int(run.state["errors"]) + len(part.problems)
    run.save()
    return schema


def metadata(resolved: Resolved, layout: Layout, opts: Options, rows: int, errors: int, source: str) -> dict[str, Any]:
    """What the output records once: the version that scored it, and how."""
    return {
        **resolved.describe(),
        "labels": list(resolved.labels),
        "text_field": opts.text_field,
        "spans": opts.spans,
        "rows": rows,
        "errors": errors,
        # A file name that is not UTF-8 (bytes Python keeps as lone surrogates) is written with
        # those bytes as \xNN, so the metadata stays UTF-8 JSON.
        "input": os.fsencode(source).decode("utf-8", "backslashreplace"),
        **layout.describe(),
        "scored_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "textsieve_version": __version__,
        "caution": CAUTION,
    }


def _finish(
    run: _Run,
    layout: Layout,
    resolved: Resolved,
    opts: Options,
    output: Path,
    schema: pa.Schema | None,
    reader: formats.Reader,
) -> None:
    meta = metadata(
        resolved, layout, opts, int(run.state["rows"]), int(run.state["errors"]), str(run.state["input"]["path"])
    )
    if run.out_fmt == "parquet":
        if schema is None:
            schema = formats.output_schema(layout, [], reader.schema)
        built = run.work / "output.parquet"
        parts = [run.part(i) for i in range(int(run.state["chunks"]))]
        formats.merge_parts(parts, built, schema, meta)
        os.replace(built, output)
    else:
        os.replace(run.work / "output.part", output)
        atomic_write_text(sidecar(output), json.dumps(meta, indent=2, ensure_ascii=False) + "\n")
    fsync_dir(output.parent)
    shutil.rmtree(run.work, ignore_errors=True)


__all__ = [
    "DEFAULT_CHUNK",
    "WORKERS_PER_CORE",
    "Options",
    "Summary",
    "check_output",
    "metadata",
    "most_workers",
    "score_file",
    "sidecar",
    "work_dir",
]
