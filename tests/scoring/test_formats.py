"""Reading JSONL lines: the fast parser (orjson, when installed) must mean exactly what Python's
own json module means by every line, including the lines orjson refuses; the reference is the
standard library's ``json.loads``."""

from __future__ import annotations

import json
import math

import pytest

from textsieve.scoring import formats

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
