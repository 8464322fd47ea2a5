"""Labelled examples from JSONL or CSV files, with one-line errors a person can act on.

Kept free of torch and below both sides: the exporter trains on these files and the registry
reads evaluation sets with :func:`load_examples`. A row's text obeys the rules the service's
(textsieve/texts.py), so no model is trained or judged on a text no caller could send.
"""

from __future__ import annotations

import contextlib
import csv
import json
import stat
import sys
import unicodedata
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

from textsieve import jsonarray
from textsieve.errors import InputError
from textsieve.printable import KINDS, character_name, refused_character
from textsieve.texts import text_refusal

JSON_SUFFIXES = (".jsonl", ".ndjson", ".json")
CSV_SUFFIXES = {".csv": ",", ".tsv": "\t"}
_ALLOWED = "use .jsonl, .ndjson, .json (one JSON object a line, or one JSON array), .csv or .tsv (header row)"
# The help line of every verb's labelled-file argument (train, evalset add).
FILE_HELP = "labelled .jsonl or .ndjson (one JSON object a line), .json (that, or one JSON array), .csv or .tsv file"
_BOM = "\ufeff"

# The longest label: reviewers' verdicts record it (service/web/schemas.py VerdictRequest).
MAX_LABEL_CHARS = 200


@dataclass(frozen=True, slots=True)
class Example:
    text: str
    label: str


def load_examples(
    path: Path,
    text_field: str = "text",
    label_field: str = "label",
    *,
    progress: Callable[[int], None] | None = None,
    stored_labels: bool = False,
) -> list[Example]:
    """Every example of a labelled file; any problem is an :class:`InputError` naming file and line.

    ``stored_labels``: the labels name classes of versions already published (an evaluation set), so
    they are held to the rule a manifest read back obeys (``label_problem(stored=True)``): a version
    published before labels were held to the whole rule can still be evaluated and judged. Training,
    which makes new labels, applies the whole rule.

    JSON Lines, CSV and TSV are read a line at a time, and a JSON array an item at a time
    (textsieve/jsonarray.py), so only the examples stay in memory, not the file's bytes, its text and
    its list of lines or parsed items besides (a 50 MB file held all three at once; a CSV file's text a
    fourth time, as the four bytes a character of the StringIO the csv module read).
    ``progress`` is called with the number of bytes read since its last call."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in JSON_SUFFIXES and suffix not in CSV_SUFFIXES:
        # A folder (`train data/`) or a mistyped name is named as such, not as a file type to change.
        with _opened(path):
            pass
        raise InputError(f"{path}: unsupported file type {suffix or '(no extension)'!r}; {_ALLOWED}")
    fields = _Fields(path, text_field, label_field, stored_labels=stored_labels)
    if suffix in CSV_SUFFIXES:
        examples = list(_csv_rows(path, _csv_lines(path, progress), CSV_SUFFIXES[suffix], fields))
    elif not (suffix == ".json" and _json_array(path)):
        examples = list(_jsonl_rows(path, fields, progress))
    else:
        examples = list(_json_array_rows(path, fields, progress))
    if not examples:
        raise InputError(f"{path}: no labelled rows found; {_ALLOWED}")
    return examples


def _empty(path: Path) -> InputError:
    return InputError(f"{path}: the file is empty; it needs labelled rows ({_ALLOWED})")


def check_labels(
    train: Sequence[Example],
    valid: Sequence[Example],
    *,
    train_name: str = "training data",
    valid_name: str = "validation data",
) -> list[str]:
    """The sorted label names, after checking there are two or more and validation adds none."""
    counts = Counter(e.label for e in train)
    _refuse_look_alikes(counts, {e.label for e in valid}, train_name, valid_name)
    if len(counts) < 2:
        found = ", ".join(repr(label) for label in sorted(counts)) or "none"
        raise InputError(
            f"{train_name} has {len(counts)} distinct label ({found}); a classifier needs at least 2 labels"
        )
    unseen = sorted({e.label for e in valid} - counts.keys())
    if unseen:
        shown = ", ".join(repr(label) for label in unseen[:10]) + (" …" if len(unseen) > 10 else "")
        known = ", ".join(repr(label) for label in sorted(counts)[:10])
        raise InputError(
            f"{valid_name} has labels not in {train_name}: {shown}; allowed are the training labels ({known})"
        )
    return sorted(counts)


def _refuse_look_alikes(train: Counter[str], valid: set[str], train_name: str, valid_name: str) -> None:
    """Two labels that are one text in two Unicode forms (NFC: a precomposed \u00e9 against e with a
    combining \u0301) look the same to every person, yet would train as two classes whose names print
    alike: 'labels 3: café, café, repair'. A validation label in one form against a training label
    in the other was "not in the training data", quoting both as 'café'."""
    by_form: dict[str, list[str]] = {}
    for label in sorted(train):
        by_form.setdefault(unicodedata.normalize("NFC", label), []).append(label)
    for form, labels in by_form.items():
        if len(labels) > 1:
            shown = " and ".join(
                f"{label!r} ({_code_points(label)}, {train[label]} row{'s' if train[label] != 1 else ''})"
                for label in labels[:3]
            )
            raise InputError(
                f"{train_name} has labels that are the same text in different Unicode forms: {shown}; "
                f"they would train as separate classes: write each label one way, e.g. {_code_points(form)} (NFC)"
            )
    for label in sorted(valid - train.keys()):
        twins = by_form.get(unicodedata.normalize("NFC", label), [])
        if twins:
            raise InputError(
                f"{valid_name} has the label {label!r} ({_code_points(label)}), which {train_name} writes "
                f"in another Unicode form ({_code_points(twins[0])}); labels are compared exactly: "
                f"write it as in {train_name}"
            )


def case_twins(labels: Sequence[str]) -> list[list[str]]:
    """Groups of labels that differ only in case or compatibility form ('Billing', 'billing'): legal,
    since labels are compared exactly, but more often two spellings of one class than two classes."""
    groups: dict[str, list[str]] = {}
    for label in labels:
        groups.setdefault(unicodedata.normalize("NFKC", label).casefold(), []).append(label)
    return [group for group in groups.values() if len(group) > 1]


def name_unknown(label: str, known: Sequence[str]) -> str:
    """``label`` quoted for an error about labels a model does not know, with the code points of it and
    of a known label it equals under NFC: both print as 'café', and only the code points tell why."""
    form = unicodedata.normalize("NFC", label)
    twin = next((k for k in known if unicodedata.normalize("NFC", k) == form), None)
    if twin is None:
        return repr(label)
    return f"{label!r} ({_code_points(label)}; the model's is {_code_points(twin)}, another Unicode form)"


def _code_points(text: str) -> str:
    """A label's characters past ASCII as code points, so two look-alikes can be told apart."""
    return "".join(c if " " <= c <= "~" else f"<U+{ord(c):04X}>" for c in text)


@contextlib.contextmanager
def _opened(path: Path) -> Iterator[BinaryIO]:
    """The file opened for reading, with the one-line refusals of what cannot be read."""
    try:
        mode = path.stat().st_mode
        if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) or stat.S_ISSOCK(mode):
            # /dev/zero under a .jsonl name read until memory ran out (a MemoryError traceback).
            raise InputError(f"{path}: is a device or socket, not a file; expected a labelled data file ({_ALLOWED})")
        file = path.open("rb")
    except FileNotFoundError:
        raise InputError(f"{path}: no such file; expected a labelled data file ({_ALLOWED})") from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a folder; expected a labelled data file ({_ALLOWED})") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc
    with file:
        try:
            yield file
        except OSError as exc:
            raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc


def _not_utf8(path: Path, line: int, offset: int, byte: int) -> InputError:
    return InputError(
        f"{path}: line {line}: byte offset {offset} is not valid UTF-8 (byte 0x{byte:02x}); save the file as UTF-8"
    )


def _json_array(path: Path) -> bool:
    """Whether a .json file holds one JSON array (its first character past a BOM and whitespace is '[')."""
    with _opened(path) as file:
        head = file.read(4096).removeprefix(_BOM.encode("utf-8")).lstrip()
        while not head and (chunk := file.read(1 << 16)):
            head = chunk.lstrip()
    return head.startswith(b"[")


class _Fields:
    """Turns one parsed record into an Example, or says precisely what is wrong with it."""

    def __init__(self, path: Path, text_field: str, label_field: str, *, stored_labels: bool = False) -> None:
        self.path = path
        self.text_field = text_field
        self.label_field = label_field
        self.stored_labels = stored_labels

    def _fail(self, where: str, problem: str) -> InputError:
        return InputError(f"{self.path}: {where}: {problem}")

    def missing(self, where: str, found: Sequence[str]) -> InputError | None:
        absent = [f for f in (self.text_field, self.label_field) if f not in found]
        if not absent:
            return None
        names = ", ".join(repr(f) for f in list(found)[:20]) or "none"
        which = " and ".join(repr(f) for f in absent)
        return self._fail(
            where, f"no {which} field (fields found: {names}); name the fields with --text-field and --label-field"
        )

    def example(self, where: str, record: dict[str, Any]) -> Example:
        problem = self.missing(where, list(record))
        if problem:
            raise problem
        text = record[self.text_field]
        if not isinstance(text, str):
            raise self._fail(where, f"the {self.text_field!r} field is {json_kind(text)}; it must be a string")
        if not text.strip():
            raise self._fail(where, f"the {self.text_field!r} field is empty; every row needs some text")
        if _lone_surrogate(text):
            raise self._fail(where, f"the {self.text_field!r} field {_LONE_SURROGATE}")
        # What the service refuses to classify (only invisible characters, a NUL) is refused here too,
        # in its words: training on such a row, or judging a version on it, used texts no caller can send.
        why = text_refusal(text)
        if why is not None:
            raise self._fail(where, f"the {self.text_field!r} field {why}")
        label = record[self.label_field]
        if isinstance(label, bool | int):
            label = json.dumps(label)  # 1 → "1", true → "true": the label as written
        elif not isinstance(label, str):
            raise self._fail(
                where, f"the {self.label_field!r} field is {json_kind(label)}; labels must be strings or integers"
            )
        if not label.strip():
            raise self._fail(where, f"the {self.label_field!r} field is empty; every row needs a label")
        why = label_problem(label, stored=self.stored_labels)
        if why:
            raise self._fail(where, f"the label {label!r} {why}")
        return Example(text, label)


# JSON may escape one half of a UTF-16 pair alone (\ud800); Python reads it into a string that no
# UTF-8 file can hold: the run folder, the vocabulary and the evaluation set's blob each failed to
# be written with a UnicodeEncodeError traceback, after the training or scoring.
_LONE_SURROGATE = (
    "holds a lone surrogate (a \\uD800–\\uDFFF escape without its pair), which UTF-8 cannot hold; "
    "write the character whole or drop it"
)


def _lone_surrogate(value: str) -> bool:
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


# What a label may hold, said after the character a label is refused for.
LABEL_CHARACTERS = (
    "labels are one line of visible text: no control, format (invisible or bidi), line or paragraph "
    "separator, private-use or unassigned characters (a zero width joiner only between two visible characters)"
)


def label_problem(label: str, *, stored: bool = False) -> str | None:
    """Why a label cannot name a class, or None. A label becomes a JSON key, a CSV and Parquet column
    name (``probability:LABEL``), a line of the CLI's tables and of the reviewer page, and labels are
    compared exactly, so it holds no spaces at its ends and only the characters a person's name may
    (textsieve/printable.py: no control, format, separator, private-use or unassigned characters). It
    is recorded with each reviewer's verdict, which holds at most ``MAX_LABEL_CHARS``; and it holds
    no lone surrogate (a ``\\ud800`` escape in JSON), which no UTF-8 reply can carry.

    ``stored=True`` is the rule a manifest read back obeys: versions published before the rule on
    format, separator, private-use and unassigned characters keep loading and serving, so only control
    characters are refused there, as they were then."""
    if len(label) > MAX_LABEL_CHARS:
        return f"is {len(label):,} characters long; a label holds at most {MAX_LABEL_CHARS}"
    if _lone_surrogate(label):
        return _LONE_SURROGATE
    if stored:
        bad = next((c for c in label if unicodedata.category(c) == "Cc"), None)
    else:
        bad = refused_character(label)
    if bad is not None:
        category = unicodedata.category(bad)
        return f"holds {character_name(bad)} (category {category}: {KINDS[category]}); {LABEL_CHARACTERS}"
    if label != label.strip():
        return "begins or ends with spaces; write it without them (labels are compared exactly)"
    return None


def json_kind(value: object) -> str:
    """What a value read from JSON (or a Parquet cell) is, in JSON's own words (RFC 8259 §3)."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int | float):
        return "a number"
    if isinstance(value, list | tuple):
        return "an array"
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, str):
        return "a string"
    return f"a value of type {type(value).__name__}"  # a Parquet cell: bytes, a date, a decimal


def _decoded_lines(path: Path, progress: Callable[[int], None] | None) -> Iterator[tuple[int, str]]:
    """(line number, text with its \\n) of every line, decoded one at a time; an empty file is refused."""
    offset = unreported = 0
    blank = True
    with _opened(path) as file:
        # Lines end at b"\n" only, as split("\n") on the text would: U+2028 and friends may sit
        # unescaped inside JSON strings, and no UTF-8 sequence holds the byte 0x0a.
        for number, raw in enumerate(file, start=1):
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise _not_utf8(path, number, offset + exc.start, raw[exc.start]) from None
            if number == 1:
                line = line.removeprefix(_BOM)  # spreadsheet programs often start UTF-8 files with one
            offset += len(raw)
            unreported += len(raw)
            if progress is not None and unreported >= _PROGRESS_BYTES:
                progress(unreported)
                unreported = 0
            if blank and line.strip():
                blank = False
            yield number, line
    if progress is not None and unreported:
        progress(unreported)
    if blank:
        raise _empty(path)


def _jsonl_lines(path: Path, progress: Callable[[int], None] | None) -> Iterator[tuple[int, str]]:
    """(line number, text) of each line that is not blank, without its line end."""
    for number, line in _decoded_lines(path, progress):
        line = line[:-1] if line.endswith("\n") else line
        if line.strip():
            yield number, line


def _csv_lines(path: Path, progress: Callable[[int], None] | None) -> Iterator[str]:
    """The file's lines as a StringIO with ``newline=""`` gave them to the csv module, one at a time:
    with their ends, and split at a lone \\r too (old Mac line ends), so line numbers stay the same."""
    for _, line in _decoded_lines(path, progress):
        start = 0
        while (cr := line.find("\r", start)) != -1 and line[cr + 1 : cr + 2] != "\n":
            yield line[start : cr + 1]
            start = cr + 1
        if start < len(line):
            yield line[start:]


_PROGRESS_BYTES = 1 << 20


def _jsonl_rows(path: Path, fields: _Fields, progress: Callable[[int], None] | None = None) -> Iterator[Example]:
    for number, line in _jsonl_lines(path, progress):
        try:
            record = json.loads(line)
        except json.JSONDecodeError as exc:
            if cr_separated(line):
                raise cr_line_ends(f"{path}: line {number}") from None
            raise InputError(
                f"{path}: line {number}: not valid JSON ({exc.msg} at column {exc.colno}); "
                "each line must be one JSON object"
            ) from None
        if not isinstance(record, dict):
            raise InputError(
                f"{path}: line {number}: is {json_kind(record)}; "
                f"each line must be one JSON object with {fields.text_field!r} "
                f"and {fields.label_field!r} fields"
            )
        yield fields.example(f"line {number}", record)


def cr_line_ends(where: str) -> InputError:
    """The refusal of a JSONL file whose lines end in a lone \\r, at ``where`` ("FILE: line N"): the
    labelled-file reader's and the scorer's (scoring/formats.py, scoring/cluster.py)."""
    return InputError(
        f"{where} holds several JSON values separated by a lone \\r (old Mac line ends); JSON Lines ends "
        "each line with \\n or \\r\\n: convert the line ends"
    )


def cr_separated(line: str | bytes) -> bool:
    """Whether a line that is not JSON is JSON values with a lone \\r between them: a raw \\r can only be
    whitespace in JSON (RFC 8259 §2, §7), so it is a file whose lines end in \\r alone."""
    text = line.decode("utf-8", "surrogateescape") if isinstance(line, bytes) else line
    pieces = [p for p in text.split("\r") if p.strip()]
    if len(pieces) < 2:
        return False
    try:
        json.loads(pieces[0])
    except ValueError:
        return False
    return True


def _json_array_rows(path: Path, fields: _Fields, progress: Callable[[int], None] | None) -> Iterator[Example]:
    with _opened(path) as file:
        try:
            for number, record in enumerate(jsonarray.items(file, progress=progress), start=1):
                if not isinstance(record, dict):
                    raise InputError(
                        f"{path}: item {number}: is {json_kind(record)}; each array item must be a JSON object"
                    )
                yield fields.example(f"item {number}", record)
        except jsonarray.ArraySyntaxError as exc:
            raise InputError(
                f"{path}: line {exc.lineno}: not valid JSON ({exc.msg} at column {exc.colno}); "
                "a .json file holds one JSON array of objects, or one object a line"
            ) from None
        except jsonarray.ArrayEncodingError as exc:
            raise _not_utf8(path, exc.line, exc.offset, exc.byte) from None


# The longest CSV or TSV field read, in characters. Python's csv module refuses a field over 131,072
# by default (csv.field_size_limit), calling the row malformed; a JSON Lines line, the same text in the
# other format, has no bound but memory, and neither has a delimited field now.
CSV_FIELD_LIMIT = sys.maxsize


def csv_reader(lines: Iterator[str], delimiter: str) -> Any:
    """``csv.reader`` as every delimited file is read (labelled files, ``textsieve score``): RFC 4180
    quoting, strict (a quote out of place is an error), and fields as long as :data:`CSV_FIELD_LIMIT`.
    The limit is the csv module's, for the whole process: set here, before each reader, so that no
    other code's setting decides what this one reads."""
    csv.field_size_limit(CSV_FIELD_LIMIT)
    return csv.reader(lines, delimiter=delimiter, strict=True)


def _csv_rows(path: Path, lines: Iterator[str], delimiter: str, fields: _Fields) -> Iterator[Example]:
    reader = csv_reader(lines, delimiter)
    header: list[str] | None = None
    last_line = 0
    try:
        for row in reader:
            start, last_line = last_line + 1, reader.line_num
            if not row or (len(row) == 1 and not row[0].strip()):
                continue
            if header is None:
                header = row
                duplicates = sorted(name for name, n in Counter(row).items() if n > 1)
                if duplicates:
                    raise InputError(
                        f"{path}: line {start}: the header names {duplicates[0]!r} twice; column names must be unique"
                    )
                problem = fields.missing(f"line {start} (header)", header)
                if problem:
                    raise problem
                continue
            if len(row) != len(header):
                raise InputError(
                    f"{path}: line {start}: has {len(row)} columns but the header has "
                    f"{len(header)}; quote values that contain {_show(delimiter)}"
                )
            yield fields.example(f"line {start}", dict(zip(header, row, strict=True)))
    except csv.Error as exc:
        raise InputError(
            f"{path}: line {reader.line_num}: malformed {'TSV' if delimiter == chr(9) else 'CSV'} "
            f"({exc}); quote fields with double quotes"
        ) from None


def _show(delimiter: str) -> str:
    return "tabs" if delimiter == "\t" else repr(delimiter)


__all__ = [
    "CSV_SUFFIXES",
    "FILE_HELP",
    "JSON_SUFFIXES",
    "LABEL_CHARACTERS",
    "MAX_LABEL_CHARS",
    "json_kind",
    "Example",
    "case_twins",
    "check_labels",
    "csv_reader",
    "cr_line_ends",
    "cr_separated",
    "LABEL_CHARACTERS",
    "label_problem",
    "load_examples",
    "name_unknown",
]
