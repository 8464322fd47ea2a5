"""Chunked readers and writers for JSONL, CSV and Parquet, so memory holds a few chunks whatever
the file's size.

JSONL and CSV are written by appending to one file whose committed length the resume state records;
Parquet is written as one small file per chunk and merged (one row group per chunk) at the end,
because a Parquet file is unreadable until its footer is written.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import os
import zlib
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from textsieve.errors import InputError
from textsieve.files import FILE_MODE, atomic_write_bytes
from textsieve.labelled import cr_line_ends, cr_separated, csv_reader
from textsieve.scoring.columns import ERROR, LABEL, SPANS, Layout, probability_column
from textsieve.scoring.rows import Misshapen, Row, Unreadable

_orjson_loads: Callable[[bytes], Any] | None
_orjson_dumps: Callable[..., bytes] | None
try:
    from orjson import OPT_PASSTHROUGH_DATACLASS, OPT_PASSTHROUGH_DATETIME, OPT_PASSTHROUGH_SUBCLASS
    from orjson import dumps as _orjson_dumps
    from orjson import loads as _orjson_loads

    # Types orjson would write its own way (dates as RFC 3339, dataclasses as objects, subclasses of
    # str and int as their base) are refused instead, and so go to the standard module.
    _ORJSON_STRICT = OPT_PASSTHROUGH_DATACLASS | OPT_PASSTHROUGH_DATETIME | OPT_PASSTHROUGH_SUBCLASS
except ImportError:  # a scoring install without the serve extras: the standard module does it all
    _orjson_loads = _orjson_dumps = None
    _ORJSON_STRICT = 0

if TYPE_CHECKING:
    import pyarrow as pa

FORMATS = ("jsonl", "csv", "tsv", "parquet")
_SUFFIXES = {
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".csv": "csv",
    ".tsv": "tsv",
    ".parquet": "parquet",
    ".pq": "parquet",
}
# The field separator of each delimited format (as ``textsieve train`` reads them, textsieve/labelled.py).
DELIMITERS = {"csv": ",", "tsv": "\t"}
PARQUET_EXTRA = "pip install 'textsieve[parquet]'"


def detect(path: str, given: str | None, flag: str) -> str:
    """The format named by ``flag`` or else by the file's suffix."""
    if given is not None:
        return given
    fmt = _SUFFIXES.get(Path(path.split("?")[0]).suffix.lower())
    if fmt is None:
        raise InputError(
            f"{path}: cannot tell the format from the name; use a .jsonl, .csv, .tsv or .parquet name or pass {flag}"
        )
    return fmt


def _pyarrow() -> Any:
    try:
        import pyarrow
        import pyarrow.parquet
    except ModuleNotFoundError as exc:
        raise InputError(f"Parquet needs pyarrow: {PARQUET_EXTRA}") from exc
    return pyarrow


# -- readers ------------------------------------------------------------------------------------
class Reader:
    """Rows of a file in chunks; ``columns`` is None when the format has no header (JSONL)."""

    columns: list[str] | None = None
    schema: pa.Schema | None = None
    total_rows: int | None = None

    def chunks(self, size: int, skip: int = 0) -> Iterator[list[Any]]:
        raise NotImplementedError

    def fraction(self) -> float | None:
        """How much of the input has been read, 0–1, for the ETA."""
        return None

    def close(self) -> None:
        pass


def _open_binary(path: Path) -> io.BufferedReader:
    if path.is_dir():
        raise InputError(f"{path}: is a folder; INPUT is one JSONL, CSV, TSV or Parquet file")
    try:
        return open(path, "rb")
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc


class _ByteCounted(Reader):
    def __init__(self, path: Path) -> None:
        self.path = path
        self.file = _open_binary(path)
        self.size = max(os.fstat(self.file.fileno()).st_size, 1)
        self.read = 0

    def fraction(self) -> float | None:
        return min(self.read / self.size, 1.0)

    def close(self) -> None:
        self.file.close()


class JsonlReader(_ByteCounted):
    """One JSON object a line; blank lines are skipped, a line that is not JSON becomes an error row."""

    def chunks(self, size: int, skip: int = 0) -> Iterator[list[Any]]:
        seen = number = 0
        chunk: list[Any] = []
        # Lines are read a block at a time, and a block without a long run of digits anywhere is
        # parsed by orjson with no check a line (what json_loads checks, once for the block): the
        # scoring process reads every row, so this is ~0.3 µs a row of its own CPU.
        while lines := self.file.readlines(_BLOCK):
            self.read += sum(map(len, lines))
            block = b"".join(lines)
            loads = _orjson_loads if _orjson_loads is not None and _plain_block(block) else json_loads
            # a \uD800–\uDFFF escape somewhere in the block (two scans, no lower-cased copy of it)
            escapes = _SURROGATE_ESCAPE in block or b"\\uD" in block
            for raw in lines:
                number += 1
                if not raw.strip():
                    continue
                seen += 1
                if seen <= skip:
                    continue
                try:
                    row = loads(raw)
                except ValueError:
                    row = Unreadable(f"line {number} is not valid JSON")
                    if loads is not json_loads:  # orjson refused it: the standard module's reading, as json_loads does
                        with contextlib.suppress(ValueError):
                            row = json.loads(raw)
                    if isinstance(row, Unreadable) and not _is_utf8(raw):
                        row = Unreadable(f"line {number} is not UTF-8 (JSON Lines text is UTF-8, RFC 8259 §8.1)")
                    elif isinstance(row, Unreadable) and cr_separated(raw):
                        raise cr_line_ends(f"{self.path}: line {number}") from None
                if escapes and lone_surrogate(row, raw):
                    row = Unreadable(f"line {number} {LONE_SURROGATE}")
                chunk.append(row)
                if len(chunk) >= size:
                    yield chunk
                    chunk = []
        if chunk:
            yield chunk


class CsvReader(_ByteCounted):
    """A header line, then rows; every value is a string, as the csv module reads them. Blank lines
    are skipped; a row with more or fewer values than the header is an error row (see
    :class:`Misshapen`); a quote out of place stops the run with the line it is on."""

    def __init__(self, path: Path, delimiter: str = ",") -> None:
        super().__init__(path)
        self.delimiter = delimiter
        self.kind = "TSV" if delimiter == "\t" else "CSV"
        try:
            self._start()
        except BaseException:
            self.close()  # a refused file is not left open
            raise

    def close(self) -> None:
        text = getattr(self, "_text", None)
        if text is not None:
            text.close()  # its text wrapper lets go of the file before the file closes
        super().close()

    def _start(self) -> None:
        path = self.path
        self._text = self._decoded()
        # strict: a quote that does not close where RFC 4180 says it must is an error, not a field
        # that silently runs on through the rows after it.
        self._reader = csv_reader(self._text, self.delimiter)
        try:
            # Blank lines before the header (an export's empty first line) are skipped, as
            # `textsieve train` skips them; the header was read as no columns at all.
            self.columns = next(row for row in self._reader if row and (len(row) > 1 or row[0].strip()))
        except StopIteration:
            # No header and no rows: 0 rows to score, as an empty JSONL or Parquet file has (columns
            # None: no column can be checked for, as in JSON Lines).
            self.columns = None
            return
        except csv.Error as exc:
            raise InputError(f"{path}: not {self.kind} ({exc})") from exc
        check_unique(path, self.columns, "the header")

    def _decoded(self) -> Iterator[str]:
        # newline="": a line ends at \n, \r\n or a lone \r (as old spreadsheet exports end them),
        # as the csv module asks for and as `textsieve train` reads the same file; a line break inside
        # a quoted field is kept as written. utf-8-sig: a leading byte-order mark is not a character.
        text = io.TextIOWrapper(self.file, encoding="utf-8-sig", newline="")
        try:
            # not `yield from`: closing this generator would close the text wrapper, and the file with it
            for line in text:  # noqa: UP028
                yield line
        except UnicodeDecodeError:
            raise InputError(_not_utf8(self.path)) from None
        finally:
            text.detach()  # the binary file stays open for close()

    def fraction(self) -> float | None:
        return min(self.file.tell() / self.size, 1.0)

    def chunks(self, size: int, skip: int = 0) -> Iterator[list[Any]]:
        names = self.columns or []
        width = len(names)
        chunk: list[Any] = []
        seen = 0
        begun = self._reader.line_num + 1  # the line the next row starts on
        try:
            for values in self._reader:
                row_line, begun = begun, self._reader.line_num + 1
                if not values:  # a blank line (the csv module reads it as no values): skipped, as in JSONL
                    continue
                seen += 1
                if seen <= skip:
                    continue
                row = dict(zip(names, values, strict=False))
                if len(values) != width:
                    # An unquoted comma inside a text shifts every value after it: scoring what lands
                    # in the text column would score the wrong words.
                    row = Misshapen(
                        row,
                        f"line {row_line} has {len(values)} values and the header {width} "
                        f"columns; quote a field that holds {_separator(self.delimiter)}",
                    )
                chunk.append(row)
                if len(chunk) >= size:
                    yield chunk
                    chunk = []
        except csv.Error as exc:
            why = "a quote opened there is never closed" if "end of data" in str(exc) else str(exc)
            raise InputError(
                f"{self.path}: not {self.kind} in the row that starts on line "
                f"{begun} ({why}); a field that holds {_separator(self.delimiter)}, a quote or a line break is quoted "
                "whole, and a quote inside it doubled (RFC 4180)"
            ) from exc
        if chunk:
            yield chunk


def _not_utf8(path: Path) -> str:
    """Where a text file stops being UTF-8, found again from the start (the decoder reads ahead)."""
    with open(path, "rb") as f:
        if f.read(2) in (b"\xff\xfe", b"\xfe\xff"):
            return (
                f"{path}: is UTF-16 text (as a spreadsheet's 'Unicode text' export writes it), not UTF-8; "
                "save it as CSV UTF-8"
            )
        f.seek(0)
        number = 1
        for raw in f:
            try:
                raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                return f"{path}: line {number + _lone_returns(raw[: exc.start])} is not UTF-8; save the file as UTF-8"
            number += 1 + _lone_returns(raw.rstrip(b"\r\n"))
    return f"{path}: is not UTF-8; save the file as UTF-8"


def _lone_returns(raw: bytes) -> int:
    """Line ends that are a \r alone in ``raw``."""
    return raw.replace(b"\r\n", b"").count(b"\r")


def check_unique(path: object, columns: Sequence[str], where: str) -> None:
    """InputError naming a column ``where`` names twice: a row is a dict, so one of the two would be
    lost without a word (a Parquet file may hold such columns; pyarrow reads them side by side)."""
    first: dict[str, int] = {}
    for number, name in enumerate(columns, start=1):
        if name in first:
            raise InputError(
                f"{path}: {where} names the column {name!r} twice (columns {first[name]} and {number}); "
                "give every column its own name"
            )
        first[name] = number


def _separator(delimiter: str) -> str:
    return "a tab" if delimiter == "\t" else "a comma" if delimiter == "," else repr(delimiter)


class ParquetReader(Reader):
    """Record batches of the requested size; the column types are kept for a Parquet output."""

    def __init__(self, path: Path) -> None:
        pa = _pyarrow()
        if path.is_dir():
            raise InputError(f"{path}: is a folder; INPUT is one JSONL, CSV, TSV or Parquet file")
        if not path.exists():
            raise InputError(f"{path}: no such file")
        try:
            self.file = pa.parquet.ParquetFile(path)
        except (OSError, pa.ArrowException) as exc:
            raise InputError(f"{path}: not a Parquet file ({exc})") from exc
        self.schema = self.file.schema_arrow
        self.columns = list(self.schema.names)
        try:
            check_unique(path, self.columns, "the schema")
        except InputError:
            self.file.close()
            raise
        self.total_rows = self.file.metadata.num_rows
        self.done = 0

    def fraction(self) -> float | None:
        return self.done / self.total_rows if self.total_rows else None

    def chunks(self, size: int, skip: int = 0) -> Iterator[list[Any]]:
        position = 0
        for batch in self.file.iter_batches(batch_size=size):
            n = batch.num_rows
            if position + n <= skip:
                position += n
                self.done = position
                continue
            if position < skip:
                batch = batch.slice(skip - position)
            position += n
            self.done = position
            yield batch.to_pylist()

    def close(self) -> None:
        self.file.close()


def check_text_column(schema: pa.Schema, name: str) -> None:
    """InputError unless Parquet column ``name`` holds strings (plain, large, view or dictionary
    encoded, or only nulls): a column of numbers or bytes made every row an error row, exit 0."""
    pa = _pyarrow()
    kind = schema.field(name).type
    value = kind.value_type if pa.types.is_dictionary(kind) else kind
    string_view = getattr(pa.types, "is_string_view", lambda _: False)
    if pa.types.is_string(value) or pa.types.is_large_string(value) or string_view(value) or pa.types.is_null(value):
        return
    raise InputError(
        f"the text column {name!r} holds {kind} values; --text-field names a column of strings "
        "(Parquet string, large_string or dictionary-encoded strings, UTF-8)"
    )


def open_reader(path: Path, fmt: str) -> Reader:
    if fmt == "jsonl":
        return JsonlReader(path)
    if fmt in DELIMITERS:
        return CsvReader(path, DELIMITERS[fmt])
    return ParquetReader(path)


# -- values -------------------------------------------------------------------------------------
# orjson reads an integer of more than 64 bits as a float, silently; a line with a run of 19 or more
# digits anywhere (even inside a string) is left to the standard module. Found by mapping every
# digit to "0" and every other byte to "x" and looking for nineteen "0"s in a row: two passes at C
# speed, several times faster than a regular expression that tries every position.
_DIGITS_TO_ZERO = bytes(0x30 if 0x30 <= b <= 0x39 else 0x78 for b in range(256))
_LONG_RUN = b"0" * 19


# JSONL is read in blocks of about this many bytes (whole lines).
_BLOCK = 1 << 20


def _is_utf8(raw: bytes) -> bool:
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True


def _plain_block(block: bytes) -> bool:
    """Whether no line of the block holds a run of 19 or more digits (see :func:`json_loads`)."""
    return _LONG_RUN not in block.translate(_DIGITS_TO_ZERO)


# JSON can write a UTF-16 surrogate as an escape (\ud800) without its pair; Python reads it into a
# string that no UTF-8 file (the output, the service, the tokenizer's offsets) can hold. Such a row
# is an error row, as the service answers such a text with 422, rather than a crash at write time.
_SURROGATE_ESCAPE = b"\\ud"
LONE_SURROGATE = (
    "holds a lone surrogate (a \\uD800–\\uDFFF escape without its pair), which UTF-8 cannot hold; the row is not scored"
)


def lone_surrogate(row: Any, raw: bytes) -> bool:
    """Whether a parsed JSON ``row`` holds a lone surrogate anywhere (a key or a value)."""
    if _SURROGATE_ESCAPE not in raw.lower():
        return False
    try:
        json.dumps(row, ensure_ascii=False).encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


def json_loads(raw: bytes) -> Any:
    """``json.loads(raw)``, through orjson when it is installed (the ``serve`` extras have it) and the
    line is plain UTF-8 JSON: several times faster, and on the 2-core bench the standard module's
    parsing was a third of the scoring process's CPU. Anything orjson refuses (NaN, integers over 64
    bits, lone surrogates, a byte-order mark, other encodings) or might read differently (an integer
    too long for 64 bits, which it turns into a float) is parsed by the standard module, so
    what a line means never depends on whether orjson is there."""
    if _orjson_loads is not None and _LONG_RUN not in raw.translate(_DIGITS_TO_ZERO):
        try:
            return _orjson_loads(raw)
        except ValueError:
            pass
    return json.loads(raw)


def _json_default(value: object) -> object:
    if isinstance(value, bytes):
        # A kept column of bytes is checked first (check_bytes); bytes nested in a list or struct are not.
        return value.decode("utf-8", "replace")
    return str(value)


def binary_columns(schema: pa.Schema | None, kept: Sequence[str]) -> list[str]:
    """The kept columns of a Parquet input that hold bytes (binary, large or fixed-size)."""
    if schema is None:
        return []
    pa = _pyarrow()
    is_bytes = (pa.types.is_binary, pa.types.is_large_binary, pa.types.is_fixed_size_binary)
    return [c for c in kept if c in schema.names and any(t(schema.field(c).type) for t in is_bytes)]


def check_bytes(rows: Sequence[Any], columns: Sequence[str], *, first_row: int, out_fmt: str) -> None:
    """InputError naming the first value of ``columns`` that is bytes but not UTF-8: a JSONL, CSV or
    TSV file holds text, and such a value was written with U+FFFD in place of its bytes."""
    for name in columns:
        for i, row in enumerate(rows):
            value = row.get(name) if isinstance(row, dict) else None
            if isinstance(value, bytes):
                try:
                    value.decode("utf-8")
                except UnicodeDecodeError:
                    raise InputError(
                        f"row {first_row + i + 1:,}: column {name!r} holds bytes that are not UTF-8 text, which a "
                        f"{out_fmt.upper()} file cannot hold; write Parquet (an OUTPUT ending .parquet) or leave the "
                        "column out with --keep"
                    ) from None


def _dumps(value: object) -> str:
    """``value`` as JSON text. JSON has no NaN or ±Infinity (RFC 8259 §6): a non-finite number
    (which the input may carry, as Python's json module reads ``NaN``) is written as null, as
    orjson, pandas and JavaScript write it, so every line parses with any JSON reader."""
    try:
        return json.dumps(value, ensure_ascii=False, default=_json_default, allow_nan=False)
    except ValueError:
        return json.dumps(_finite(value), ensure_ascii=False, default=_json_default, allow_nan=False)


def _finite(value: object) -> object:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


def json_line(value: object) -> bytes:
    """One row as a line of JSON (no newline): the same value :func:`_dumps` writes, faster.

    orjson writes it when installed: without spaces, and floats in their shortest form either way
    (3.2e-05 may read 0.000032), the same numbers when read back; NaN and ±Infinity as null, as
    :func:`_dumps` does. orjson refuses integers over 64 bits, keys that are not strings, lone
    surrogates and types it does not know or would write its own way (dates, decimals, bytes,
    NumPy scalars, subclasses): those rows go to the standard module. On the 2-core bench the
    standard module's writing was a third of the scoring process's CPU.
    """
    if _orjson_dumps is not None:
        try:
            return _orjson_dumps(value, option=_ORJSON_STRICT)
        except TypeError:
            pass
    return _dumps(value).encode("utf-8")


# -- JSONL and CSV: one file, appended chunk by chunk --------------------------------------------
class AppendWriter:
    """Appends chunks to ``path``; :meth:`commit` makes them durable and returns the committed length.

    ``crc32`` is the CRC-32 of every byte written so far (``start`` bytes of it checked by
    :func:`committed_crc32` on resume), so a resumed run can tell a file that is no longer what it
    wrote (deleted, cut short, overwritten) from its own output."""

    def __init__(self, path: Path, layout: Layout, *, start: int, crc32: int = 0) -> None:
        self.path = path
        self.layout = layout
        self.crc32 = crc32
        fd = os.open(path, os.O_RDWR | os.O_CREAT, FILE_MODE)
        self.file = os.fdopen(fd, "r+b")
        # A chunk written after the last committed state is thrown away: the state says where it ended.
        self.file.truncate(start)
        self.file.seek(start)
        if start == 0:
            self._put(self.header())

    def header(self) -> bytes:
        return b""

    def encode(self, rows: Sequence[Row]) -> bytes:
        raise NotImplementedError

    def write(self, rows: Sequence[Row]) -> None:
        self._put(self.encode(rows))

    def _put(self, data: bytes) -> None:
        self.file.write(data)
        self.crc32 = zlib.crc32(data, self.crc32)

    def commit(self) -> int:
        self.file.flush()
        os.fsync(self.file.fileno())
        return self.file.tell()

    def close(self) -> None:
        self.file.close()


class JsonlWriter(AppendWriter):
    def encode(self, rows: Sequence[Row]) -> bytes:
        return b"".join(json_line(r) + b"\n" for r in rows)


class CsvWriter(AppendWriter):
    """Spans are a JSON array in their cell; a missing value is an empty cell."""

    delimiter = ","

    def header(self) -> bytes:
        buf = io.StringIO()
        csv.writer(buf, delimiter=self.delimiter).writerow(self.layout.columns)
        return buf.getvalue().encode("utf-8")

    def encode(self, rows: Sequence[Row]) -> bytes:
        buf = io.StringIO()
        w = csv.writer(buf, delimiter=self.delimiter)
        cols = self.layout.columns
        for r in rows:
            w.writerow([_cell(r[c]) for c in cols])
        return buf.getvalue().encode("utf-8")


class TsvWriter(CsvWriter):
    """CSV's rules with a tab between fields (a field holding a tab, a quote or a line break is quoted)."""

    delimiter = "\t"


def _cell(value: object) -> object:
    """A value as its CSV cell: a missing value and a non-finite number (NaN, ±Infinity, which the
    JSON Lines output writes as null) are an empty cell; lists and objects their JSON."""
    if value is None:
        return ""
    if isinstance(value, str | int):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else ""  # the csv module wrote "nan" and "inf"
    return _dumps(value)


# -- Parquet: one file per chunk, merged at the end ------------------------------------------------
def span_type() -> pa.DataType:
    pa = _pyarrow()
    return pa.list_(
        pa.struct(
            [
                ("start", pa.int64()),
                ("end", pa.int64()),
                ("text", pa.string()),
                ("label", pa.string()),
                ("weight", pa.float64()),
                ("width", pa.int64()),
            ]
        )
    )


def result_fields(layout: Layout) -> list[pa.Field]:
    pa = _pyarrow()
    fields = [pa.field(LABEL, pa.string())]
    fields += [pa.field(probability_column(x), pa.float64()) for x in layout.labels]
    if layout.spans:
        fields.append(pa.field(SPANS, span_type()))
    fields.append(pa.field(ERROR, pa.string()))
    return fields


def output_schema(layout: Layout, rows: Sequence[Row], input_schema: pa.Schema | None) -> pa.Schema:
    """Kept columns keep a Parquet input's types; from JSONL or CSV they take the first chunk's."""
    pa = _pyarrow()
    fields = []
    for name in layout.kept:
        out = layout.renamed[name]
        if input_schema is not None and name in input_schema.names:
            fields.append(pa.field(out, input_schema.field(name).type))
            continue
        try:
            kind = pa.array([r[out] for r in rows]).type
        except (pa.ArrowException, ValueError, TypeError) as exc:
            raise InputError(f"column {name!r} mixes value types; drop it with --keep ({exc})") from exc
        fields.append(pa.field(out, pa.string() if pa.types.is_null(kind) else kind))
    return pa.schema(fields + result_fields(layout))


def to_table(rows: Sequence[Row], schema: pa.Schema, first_row: int) -> pa.Table:
    pa = _pyarrow()
    arrays = []
    for field in schema:
        values = [r[field.name] for r in rows]
        try:
            arrays.append(pa.array(values, type=field.type))
        except (pa.ArrowException, ValueError, TypeError, OverflowError) as exc:
            raise InputError(
                f"rows {first_row + 1}–{first_row + len(rows)}: column {field.name!r} does not hold "
                f"{field.type} values as in the first rows; drop it with --keep ({exc})"
            ) from exc
    return pa.Table.from_arrays(arrays, schema=schema)


def write_part(path: Path, table: pa.Table, crc32: int = 0) -> int:
    """One chunk's rows as a complete Parquet file, in place only once it is whole; returns the
    CRC-32 of the parts before it (``crc32``) and this one's bytes (see :class:`AppendWriter`)."""
    pa = _pyarrow()
    sink = pa.BufferOutputStream()
    pa.parquet.write_table(table, sink)
    data = sink.getvalue().to_pybytes()
    atomic_write_bytes(path, data)
    return zlib.crc32(data, crc32)


def committed_crc32(paths: Sequence[Path], length: int | None = None) -> int | None:
    """The CRC-32 of the files' bytes one after the other (of the first ``length`` bytes of one
    file), or None when a file is missing or shorter than ``length``: what a resumed run checks
    against the CRC-32 its state recorded as it wrote them."""
    crc = 0
    for path in paths:
        try:
            with open(path, "rb") as f:
                left = length
                while left is None or left > 0:
                    block = f.read(_BLOCK if left is None else min(left, _BLOCK))
                    if not block:
                        break
                    crc = zlib.crc32(block, crc)
                    if left is not None:
                        left -= len(block)
        except FileNotFoundError:
            return None
        if left:
            return None
    return crc


def merge_parts(parts: Sequence[Path], target: Path, schema: pa.Schema, metadata: dict[str, object]) -> None:
    """The parts' rows, in order, as one Parquet file (a row group per part) carrying ``metadata``."""
    pa = _pyarrow()
    schema = schema.with_metadata({b"textsieve": json.dumps(metadata).encode("utf-8")})
    with pa.parquet.ParquetWriter(target, schema) as writer:
        for part in parts:
            writer.write_table(pa.parquet.read_table(part).cast(schema))
    with open(target, "rb") as f:
        os.fsync(f.fileno())


def read_metadata(path: Path) -> dict[str, Any]:
    """The textsieve metadata of a Parquet file this module wrote."""
    pa = _pyarrow()
    meta = pa.parquet.read_schema(path).metadata or {}
    result: dict[str, Any] = json.loads(meta[b"textsieve"])
    return result


def remove_quietly(path: Path) -> None:
    with contextlib.suppress(FileNotFoundError):
        os.unlink(path)


__all__ = [
    "FORMATS",
    "AppendWriter",
    "CsvReader",
    "CsvWriter",
    "TsvWriter",
    "JsonlReader",
    "JsonlWriter",
    "json_line",
    "ParquetReader",
    "Reader",
    "binary_columns",
    "check_bytes",
    "check_unique",
    "check_text_column",
    "committed_crc32",
    "detect",
    "merge_parts",
    "open_reader",
    "output_schema",
    "read_metadata",
    "result_fields",
    "span_type",
    "to_table",
    "write_part",
]
