"""The JSON array read an item at a time, held to the standard library's ``json`` module (the reference:
Python's own parser, RFC 8259) on the items it gives and on where and why it refuses a text."""

from __future__ import annotations

import io
import json
import math
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from textsieve import jsonarray

# JSON values as the json module reads them back equal: no NaN (NaN != NaN), finite floats.
_scalars = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(10**30), max_value=10**30)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=40)
)
_values = st.recursive(
    _scalars,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)
# Small chunks put chunk boundaries inside numbers, escapes, multi-byte characters and literals.
_chunks = st.sampled_from([1, 2, 3, 5, 7, 16, 64, 1 << 16])


def _dump(items: list[Any], indent: int | None, ensure_ascii: bool, bom: bool) -> bytes:
    text = json.dumps(items, indent=indent, ensure_ascii=ensure_ascii)
    return (("\ufeff" if bom else "") + text).encode("utf-8")


def _read(data: bytes, chunk: int) -> list[Any]:
    return list(jsonarray.items(io.BytesIO(data), chunk_bytes=chunk))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    items=st.lists(_values, max_size=8),
    indent=st.sampled_from([None, 0, 2]),
    ensure_ascii=st.booleans(),
    bom=st.booleans(),
    chunk=_chunks,
)
def test_items_equal_json_load(items: list[Any], indent: int | None, ensure_ascii: bool, bom: bool, chunk: int) -> None:
    data = _dump(items, indent, ensure_ascii, bom)
    reference = json.loads(data.decode("utf-8").removeprefix("\ufeff"))
    assert _read(data, chunk) == reference
    seen: list[int] = []
    list(jsonarray.items(io.BytesIO(data), progress=seen.append, chunk_bytes=chunk))
    assert sum(seen) == len(data), "progress covers every byte"


def _reference_error(text: str) -> json.JSONDecodeError | None:
    try:
        json.loads(text)
    except json.JSONDecodeError as exc:
        return exc
    except RecursionError:
        pytest.skip("nested deeper than the reference parses")  # pragma: no cover - not generated
    return None


@settings(max_examples=400, deadline=None)
@given(
    items=st.lists(_values, min_size=1, max_size=6),
    indent=st.sampled_from([None, 2]),
    data=st.data(),
    chunk=_chunks,
)
def test_a_broken_array_is_refused_where_and_as_json_refuses_it(
    items: list[Any], indent: int | None, data: st.DataObject, chunk: int
) -> None:
    # A valid array with one cut, one deleted character or one inserted character: wherever json.loads
    # refuses the text, the streaming reader refuses it with the same message at the same line and column.
    text = json.dumps(items, indent=indent)
    at = data.draw(st.integers(min_value=1, max_value=len(text)), label="at")
    edit = data.draw(st.sampled_from(["cut", "delete", "insert"]), label="edit")
    if edit == "cut":
        broken = text[:at]
    elif edit == "delete":
        broken = text[: at - 1] + text[at:]
    else:
        broken = text[:at] + data.draw(st.sampled_from(list('[]{},:"\\ 1e-.tn\x01x')), label="char") + text[at:]
    expected = _reference_error(broken)
    if not broken.lstrip(" \t\n\r").startswith("["):
        return  # not an array any more: the labelled reader reads it as JSON Lines
    if expected is None:
        assert _read(broken.encode("utf-8"), chunk) == json.loads(broken)
        return
    with pytest.raises(jsonarray.ArraySyntaxError) as info:
        _read(broken.encode("utf-8"), chunk)
    assert (info.value.msg, info.value.lineno, info.value.colno) == (expected.msg, expected.lineno, expected.colno)


# Written out by hand: the text, json.loads's message, line and column (Python 3.11's json module).
@pytest.mark.parametrize(
    ("text", "expected"),
    [
        pytest.param("[", ("Expecting value", 1, 2), id="nothing after the bracket"),
        pytest.param('[{"a": 1}', ("Expecting ',' delimiter", 1, 10), id="no closing bracket"),
        pytest.param('[{"a": 1} {"a": 2}]', ("Expecting ',' delimiter", 1, 11), id="no comma between items"),
        pytest.param('[{"a": 1},]', ("Expecting value", 1, 11), id="a trailing comma"),
        pytest.param('[{"a": 1}]\n]', ("Extra data", 2, 1), id="a second closing bracket"),
        pytest.param('[\n {"a": 1},\n {"a" 2}\n]', ("Expecting ':' delimiter", 3, 7), id="a missing colon, line 3"),
        pytest.param('[{"a": "x\ny"}]', ("Invalid control character at", 1, 10), id="a raw line break in a string"),
        pytest.param('[{"a": "abc', ("Unterminated string starting at", 1, 8), id="the file ends in a string"),
        pytest.param('[{"a": tru}]', ("Expecting value", 1, 8), id="a misspelt literal"),
        pytest.param('[{"a": "\\u12"}]', ("Invalid \\uXXXX escape", 1, 10), id="a short escape"),
    ],
)
@pytest.mark.parametrize("chunk", [1, 4, 1 << 16])
def test_refusals_name_json_s_message_line_and_column(text: str, expected: tuple[str, int, int], chunk: int) -> None:
    reference = _reference_error(text)
    assert reference is not None and (reference.msg, reference.lineno, reference.colno) == expected
    with pytest.raises(jsonarray.ArraySyntaxError) as info:
        _read(text.encode("utf-8"), chunk)
    assert (info.value.msg, info.value.lineno, info.value.colno) == expected


@pytest.mark.parametrize("chunk", [1, 2, 1 << 16])
def test_a_number_cut_by_a_chunk_is_read_whole(chunk: int) -> None:
    # "[12345.5e-3, -Infinity, NaN]" read a byte at a time: never 1, 12 or 12345 and then a refusal.
    items = _read(b"[12345.5e-3, -Infinity, 7]", chunk)
    assert items[0] == 12.3455 and math.isinf(items[1]) and items[2] == 7


def test_bytes_that_are_not_utf8_are_named_by_line_and_offset() -> None:
    data = b'[{"text": "ok"},\n{"text": "caf' + b"\xe9" + b'"}]'
    for chunk in (1, 3, 1 << 16):
        with pytest.raises(jsonarray.ArrayEncodingError) as info:
            _read(data, chunk)
        assert (info.value.line, info.value.offset, info.value.byte) == (2, data.index(b"\xe9"), 0xE9)
    cut = '["é'.encode()[:-1]  # the file ends inside a two-byte character
    with pytest.raises(jsonarray.ArrayEncodingError) as info:
        _read(cut, 1)
    assert (info.value.line, info.value.offset) == (1, len(cut) - 1)


def test_an_item_longer_than_many_chunks_is_read_in_doubling_chunks() -> None:
    long_text = "word " * 50_000
    data = json.dumps([{"text": long_text}, {"text": "short"}]).encode()
    reads: list[int] = []
    assert _read(data, 1 << 10) == [{"text": long_text}, {"text": "short"}]
    list(jsonarray.items(io.BytesIO(data), progress=reads.append, chunk_bytes=1 << 10))
    assert len(reads) < 20, f"{len(reads)} reads for {len(data):,} bytes: the chunks did not double"


def test_memory_is_an_item_and_a_chunk_not_the_file() -> None:
    # The window never holds much more than one item and one chunk, however long the array.
    row = json.dumps({"text": "the dock is broken again", "label": "repair"})
    data = ("[" + ",\n".join([row] * 20_000) + "]").encode()
    window_sizes: list[int] = []
    reader = jsonarray.items(io.BytesIO(data), chunk_bytes=4096)
    frame = reader.gi_frame
    for _ in reader:
        window = (frame.f_locals if frame is not None else {}).get("window")
        if window is not None:
            window_sizes.append(len(window.text))
    assert len(window_sizes) == 20_000
    assert max(window_sizes) < 2 * 4096 + len(row), max(window_sizes)
