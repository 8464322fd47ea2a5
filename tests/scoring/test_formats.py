"""Reading and writing JSONL lines: the fast parser and writer (orjson, when installed) must mean
exactly what Python's own json module means by every line, including the values orjson refuses or
would write another way; the reference is the standard library's ``json.loads`` and ``json.dumps``.
Reading CSV: well-formed files as the standard library's ``csv.DictReader`` reads them, and the
ways a file breaks RFC 4180 (§2: fields with commas, quotes or line breaks are quoted) said, not
guessed at."""

from __future__ import annotations

import csv
import datetime as dt
import decimal
import io
import json
import math
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from textsieve.scoring import formats, rows
from textsieve.scoring.rows import Unreadable

LINES = [
    b'{"text": "plain", "id": 1}',
    '{"text": "Crème brûlée — 12 € 谢谢", "n": [1, 2.5, -0.0, 1e-05]}'.encode(),
    b'{"text": "\\u00e9 escaped", "big": 123456789012345678901234567890}',  # over 64 bits
    b'{"text": "x", "score": NaN, "inf": -Infinity}',  # not JSON, but json.loads reads it
    b'{"text": "lone \\ud800 surrogate"}',
    b'\xef\xbb\xbf{"text": "after a byte-order mark"}',
    b'{"text": "dup", "text": "last one wins"}',
    b'{"text": "huge", "x": 1e400, "y": -1e400, "z": 9223372036854775807, "w": -9223372036854775809}',
    b'{"text": "long digits in a string 12345678901234567890"}',
    b'{"text": "tab\\tand newline\\n", "nested": {"a": [true, false, null]}}\n',
]


def _same(a: object, b: object) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a):
        return math.isnan(b)
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return type(a) is type(b) and a == b


@pytest.mark.parametrize("raw", LINES)
def test_json_loads_means_what_the_standard_module_means(raw: bytes) -> None:
    assert _same(formats.json_loads(raw), json.loads(raw))


@pytest.mark.parametrize("raw", [b'{"text": ', b"not json", b'{"text": "x"} trailing', b"\xff\xfe"])
def test_json_loads_refuses_what_the_standard_module_refuses(raw: bytes) -> None:
    with pytest.raises(ValueError):
        json.loads(raw)
    with pytest.raises(ValueError):
        formats.json_loads(raw)


def test_the_fast_parser_is_used_when_installed() -> None:
    pytest.importorskip("orjson")
    assert formats._orjson_loads is not None


# -- writing: json_line writes the value the standard module writes --------------------------------
class _Label(str):
    pass


WRITTEN = [
    {"id": 1, "label": "billing", "probabilities": {"billing": 0.9999679, "repair": 3.2e-05}},
    {"text": "Crème brûlée — 12 € 谢谢", "n": [1, 2.5, -0.0, 1e-05, 1e16, 5e-324, 1.7976931348623157e308]},
    {"missing": None, "flags": [True, False]},
    {"score": math.nan, "inf": -math.inf},  # orjson would write null
    {"big": 123456789012345678901234567890, "neg": -9223372036854775809},  # over 64 bits
    {"bytes": b"raw \xff", "when": dt.datetime(2026, 12, 2, 23, 0), "amount": decimal.Decimal("12.50")},
    {"label": _Label("billing"), "day": dt.date(2026, 12, 2)},
    {1: "a non-string key"},
    {"spans": [{"start": 0, "end": 5, "text": "hello", "weight": 0.123456789}]},
]


@pytest.mark.parametrize("value", WRITTEN)
def test_json_line_writes_what_the_standard_module_writes(value: dict[object, object]) -> None:
    line = formats.json_line(value)
    assert b"\n" not in line
    assert _same(json.loads(line), json.loads(formats._dumps(value)))


@settings(max_examples=400, deadline=None)
@given(
    st.recursive(
        st.none() | st.booleans() | st.integers() | st.floats() | st.text(alphabet=st.characters(codec="utf-8")),
        lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=5), inner, max_size=4),
        max_leaves=12,
    )
)
def test_json_line_reads_back_as_the_standard_module_wrote_it(value: object) -> None:
    assert _same(json.loads(formats.json_line({"v": value})), json.loads(formats._dumps({"v": value})))


def test_the_fast_writer_is_used_when_installed() -> None:
    pytest.importorskip("orjson")
    row = {"label": "repair", "p": 0.25}
    assert formats.json_line(row) == b'{"label":"repair","p":0.25}'


def _strict(line: bytes) -> object:
    """json.loads refusing NaN and ±Infinity, which RFC 8259 JSON does not have (§6)."""

    def refuse(word: str) -> None:
        raise ValueError(f"{word} is not JSON")

    return json.loads(line, parse_constant=refuse)


@pytest.mark.parametrize(
    ("value", "written"),
    [
        ({"x": math.inf, "error": None}, {"x": None, "error": None}),
        ({"t": "null pointer", "n": -math.inf, "error": None}, {"t": "null pointer", "n": None, "error": None}),
        # rows the standard module writes (an integer over 64 bits, a nested NaN): the same rule
        ({"big": 2**70, "x": math.nan}, {"big": 2**70, "x": None}),
        ({"big": 2**70, "deep": [1.5, {"y": math.nan}]}, {"big": 2**70, "deep": [1.5, {"y": None}]}),
    ],
)
def test_non_finite_numbers_are_written_as_null_so_every_line_is_json(
    value: dict[str, object], written: dict[str, object]
) -> None:
    """Input read as Python's json module reads it may hold NaN or Infinity; JSON has neither
    (RFC 8259 §6), so they are written as null, as orjson, pandas and JavaScript write them."""
    assert _strict(formats.json_line(value)) == written


@pytest.mark.parametrize("digits", [18, 19, 40])
def test_a_run_of_nineteen_digits_goes_to_the_standard_module(digits: int, monkeypatch: pytest.MonkeyPatch) -> None:
    pytest.importorskip("orjson")
    raw = b'{"n": ' + b"9" * digits + b', "s": "a' + b"1" * (digits - 1) + b'b"}'
    seen: list[bytes] = []
    monkeypatch.setattr(formats, "_orjson_loads", lambda b: seen.append(b) or json.loads(b))
    assert formats.json_loads(raw) == json.loads(raw)
    assert bool(seen) == (digits < 19)


@pytest.mark.parametrize("block", [1, 64, 1 << 20])
@pytest.mark.parametrize("skip", [0, 5])
def test_a_jsonl_file_reads_line_by_line_as_the_standard_module_reads_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, block: int, skip: int
) -> None:
    """Blocks with and without a long run of digits, blank lines, lines that are not JSON and lone
    surrogates, read in blocks of one line, a few lines and the whole file: each row is json.loads
    of its line, or the error row that says why it cannot be."""
    lines = [line.rstrip(b"\n") for line in LINES] + [b"", b"   ", b"not json", b'{"text": "after"}']
    lines = lines + lines[::-1] + [b'{"text": "plain", "id": %d}' % i for i in range(20)]
    lines += [b'{"text": "a pair \\ud83d\\ude00 is one character"}', b'{"text": "ok", "\\uDC00": 1}']
    lines += [b'{"text": "caf\xe9 in Latin-1"}', b'{"text": "a NUL \x00 unescaped"}']  # RFC 8259 §8.1, §7
    path = tmp_path / "in.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    expected: list[object] = []
    for number, raw in enumerate(lines, start=1):
        if raw.strip():
            try:
                row = json.loads(raw)
            except ValueError:
                try:
                    raw.decode("utf-8")  # the codec as the reference for "is UTF-8"
                except UnicodeDecodeError:
                    expected.append(f"line {number} is not UTF-8 (JSON Lines text is UTF-8, RFC 8259 §8.1)")
                else:
                    expected.append(f"line {number} is not valid JSON")
                continue
            try:  # a lone surrogate (in a value or a key) cannot be written as UTF-8: an error row
                json.dumps(row, ensure_ascii=False).encode("utf-8")
            except UnicodeEncodeError:
                expected.append(f"line {number} {formats.LONE_SURROGATE}")
            else:
                expected.append(row)
    monkeypatch.setattr(formats, "_BLOCK", block)
    reader = formats.open_reader(path, "jsonl")
    got = [row for chunk in reader.chunks(4, skip=skip) for row in chunk]
    assert reader.fraction() == 1.0
    reader.close()
    assert len(got) == len(expected) - skip
    for row, want in zip(got, expected[skip:], strict=True):
        if isinstance(want, str):
            assert isinstance(row, Unreadable) and str(row) == want
        else:
            assert _same(row, want)


def test_a_jsonl_file_whose_lines_end_in_a_lone_cr_stops_the_run(tmp_path: Path) -> None:
    """JSON Lines ends each line with \\n (jsonlines.org; \\r\\n too, the \\r being JSON whitespace,
    RFC 8259 §2). A file whose lines end in \\r alone was one line: "no row among the first 1 has
    the field 'text'; fields seen: none", or, after a first \\n line, one error row for all the rest."""
    path = tmp_path / "in.jsonl"
    path.write_bytes(b'{"text": "first"}\n{"text": "a"}\r{"text": "b"}\r{"text": "c"}\r')
    reader = formats.open_reader(path, "jsonl")
    with pytest.raises(formats.InputError) as caught:
        [row for chunk in reader.chunks(10) for row in chunk]
    reader.close()
    assert "line 2 holds several JSON values separated by a lone \\r" in caught.value.message


# -- CSV ------------------------------------------------------------------------------------------
def _read_csv(path: Path, size: int = 3, skip: int = 0) -> list[object]:
    reader = formats.open_reader(path, "csv")
    try:
        return [row for chunk in reader.chunks(size, skip=skip) for row in chunk]
    finally:
        reader.close()


WELL_FORMED = (
    "id,text,note\r\n"
    '1,"a comma, inside",x\r\n'
    '2,"a ""quoted"" word",\r\n'
    '3,"two\r\nlines",y\r\n'
    "\r\n"
    "4,plain,z\r\n"
    "5,caf\u00e9 \u2014 \u8c22\u8c22,\r\n"
)


@pytest.mark.parametrize("skip", [0, 2, 5])
def test_a_well_formed_csv_reads_as_the_csv_modules_dict_reader_reads_it(tmp_path: Path, skip: int) -> None:
    path = tmp_path / "in.csv"
    path.write_bytes(b"\xef\xbb\xbf" + WELL_FORMED.encode("utf-8"))  # with a byte-order mark, as Excel writes
    with open(path, newline="", encoding="utf-8-sig") as f:
        reference = list(csv.DictReader(f))  # blank lines skipped, as DictReader does
    assert len(reference) == 5
    assert _read_csv(path, skip=skip) == reference[skip:]


def test_a_row_whose_values_do_not_line_up_with_the_header_is_an_error_row_not_a_shifted_text(
    tmp_path: Path,
) -> None:
    from textsieve.scoring.rows import Misshapen, split

    path = tmp_path / "in.csv"
    path.write_text('id,text\n1,hello, world\n2,fine\n3\n4,"ok, quoted"\n', encoding="utf-8")
    rows = _read_csv(path)
    assert [type(r) for r in rows] == [Misshapen, dict, Misshapen, dict]
    assert rows[0] == {"id": "1", "text": "hello"} and rows[2] == {"id": "3"}  # the values kept for the output
    part = split(rows, "text", strict=False, first_row=0)
    assert part.texts == ["fine", "ok, quoted"]
    assert part.problems == {
        0: "line 2 has 3 values and the header 2 columns; quote a field that holds a comma",
        2: "line 4 has 1 values and the header 2 columns; quote a field that holds a comma",
    }
    with pytest.raises(formats.InputError, match="row 1: line 2 has 3 values"):
        split(rows, "text", strict=True, first_row=0)


# Texts that start with what split()'s shortcut looks at: ASCII letters, controls and whitespace
# (str.isspace's ASCII set includes \x1c-\x1f), non-ASCII spaces and format characters (U+00A0,
# U+200B, U+2028, U+FEFF), a NUL, and anything else hypothesis draws.
_EDGE = st.sampled_from(["a", " ", "\t", "\x1c", "\x1f", "\x00", "\x7f", "\u00a0", "\u200b", "\u2028", "\ufeff", "é"])
_TEXTS = st.one_of(st.lists(_EDGE, max_size=4).map("".join), st.text(max_size=6))
_VALUES = st.one_of(_TEXTS, st.none(), st.integers(), st.floats(allow_nan=True), st.lists(st.integers(), max_size=2))


@given(
    st.lists(
        st.one_of(
            st.builds(lambda v: {"text": v}, _VALUES),
            st.builds(lambda v: {"id": 1, "body": v}, _VALUES),
            st.builds(lambda v: rows.Misshapen({"text": v}, "line 4 has 3 values"), _TEXTS),
            st.builds(rows.Unreadable, st.just("line 3 is not JSON")),
            st.just([1, 2]),
        ),
        max_size=30,
    )
)
@settings(max_examples=300, deadline=None)
def test_split_takes_exactly_the_rows_text_problem_passes(chunk: list[object]) -> None:
    """split() takes most rows by a shortcut on the text's first character; every row must get the
    verdict text_problem gives it alone (the rule the error column and --strict report)."""
    part = rows.split(chunk, "text", strict=False, first_row=0)
    verdicts = [rows.text_problem(row, "text") for row in chunk]
    assert part.scored_rows == [i for i, v in enumerate(verdicts) if v is None]
    assert part.texts == [chunk[i]["text"] for i in part.scored_rows]  # type: ignore[index]
    assert part.problems == {i: v for i, v in enumerate(verdicts) if v is not None}


@pytest.mark.parametrize(
    ("content", "words"),
    [
        ('text\nhi\n"opened and\nnever closed\nhello\n', "the row that starts on line 3 (a quote opened there is"),
        ('text\n"closed" then more\nhello\n', "the row that starts on line 2 (',' expected after '\"')"),
        ("text,id,text\na,1,b\n", "the column 'text' twice (columns 1 and 3)"),
    ],
)
def test_a_csv_that_breaks_rfc_4180_stops_the_run_naming_the_line(tmp_path: Path, content: str, words: str) -> None:
    path = tmp_path / "in.csv"
    path.write_text(content, encoding="utf-8")
    with pytest.raises(formats.InputError) as caught:
        _read_csv(path)
    assert words in str(caught.value)


def test_blank_lines_before_the_header_are_skipped(tmp_path: Path) -> None:
    """An empty first line made the header no columns at all ("the input has no column 'text'; its
    columns: ;"). The reference: csv.DictReader on the same file without those lines."""
    path = tmp_path / "in.csv"
    path.write_bytes(b"\xef\xbb\xbf\r\n  \r\n" + WELL_FORMED.encode("utf-8"))
    with open(tmp_path / "reference.csv", "w", encoding="utf-8", newline="") as f:
        f.write(WELL_FORMED)
    with open(tmp_path / "reference.csv", newline="", encoding="utf-8") as f:
        reference = list(csv.DictReader(f))
    assert _read_csv(path) == reference


@pytest.mark.parametrize("newline", ["\r", "\n"], ids=["cr", "lf"])
def test_a_csv_with_other_line_ends_reads_as_the_csv_modules_dict_reader_reads_it(tmp_path: Path, newline: str) -> None:
    """A lone \\r ends a line in files from old spreadsheet programs; the csv module reads it as a line
    end (its documentation: open the file with newline=''), and so does `textsieve train`. Scoring
    stopped with the csv module's 'new-line character seen in unquoted field'."""
    path = tmp_path / "in.csv"
    path.write_bytes(WELL_FORMED.replace("\r\n", newline).encode("utf-8"))
    with open(path, newline="", encoding="utf-8") as f:
        reference = list(csv.DictReader(f))
    assert len(reference) == 5 and reference[2]["text"] == f"two{newline}lines"
    assert _read_csv(path) == reference


@pytest.mark.parametrize(
    ("content", "words"),
    [
        # Excel's "Unicode text" export: UTF-16 with a byte-order mark (the codec's own BOM)
        ("id\ttext\n1\tcaf\u00e9\n".encode("utf-16"), "is UTF-16 text"),
        (b"id,text\r1,ok\r2,caf\xe9\r", "line 3 is not UTF-8"),  # Latin-1 after lines ended by \r alone
        (b'id,text\r\n1,"two\r\nlines"\r\n2,caf\xe9\r\n', "line 4 is not UTF-8"),
    ],
    ids=["utf-16", "latin-1-cr", "latin-1-crlf"],
)
def test_a_csv_that_is_not_utf8_stops_the_run_naming_the_line(tmp_path: Path, content: bytes, words: str) -> None:
    path = tmp_path / "in.csv"
    path.write_bytes(content)
    with pytest.raises(formats.InputError) as caught:
        _read_csv(path)
    assert words in str(caught.value) and "save" in str(caught.value)


@pytest.mark.parametrize("writer", [formats.CsvWriter, formats.TsvWriter])
def test_a_non_finite_number_is_an_empty_cell_as_a_missing_value_is(tmp_path: Path, writer: type) -> None:
    # The JSON Lines output writes NaN and ±Infinity as null (RFC 8259 §6 has neither); a CSV cell
    # held "nan" or "inf" at the top level while the same value nested in a list became null (found by
    # an audit, 2026-12-05). The reference is the csv module reading the cells back.
    from textsieve.scoring.columns import plan

    layout = plan(["id", "score", "deep"], None, ["a"], spans=False)
    values = [
        {"id": 1, "score": math.nan, "deep": [math.inf]},
        {"id": 2, "score": -math.inf, "deep": None},
        {"id": 3, "score": 0.25, "deep": {"x": 1}},
    ]
    rows = [{**v, "label": "a", "probability:a": 1.0, "error": None} for v in values]
    w = writer(tmp_path / "out", layout, start=0)
    try:
        out = w.encode(rows).decode("utf-8")
    finally:
        w.close()
    read = list(csv.reader(io.StringIO(out), delimiter=writer.delimiter))
    assert [r[:3] for r in read] == [["1", "", "[null]"], ["2", "", ""], ["3", "0.25", '{"x": 1}']]
