"""Loading labelled examples: both formats, and a precise one-line error for each bad input."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from textsieve.errors import InputError
from textsieve.labelled import Example, check_labels, load_examples

DATA = Path(__file__).parent / "data"


def _write(path: Path, content: str | bytes) -> Path:
    if isinstance(content, str):
        content = content.encode("utf-8")
    path.write_bytes(content)
    return path


def _error(path: Path, **kwargs: str) -> str:
    with pytest.raises(InputError) as info:
        load_examples(path, **kwargs)
    message = info.value.message
    assert "\n" not in message, "errors are one line"
    assert str(path) in message, "errors name the file"
    return message


def test_jsonl_loads(tmp_path: Path) -> None:
    f = _write(
        tmp_path / "d.jsonl",
        '{"text": "the dock is broken", "label": "repair"}\n'
        "\n"  # blank lines are allowed
        '{"text": "charged twice", "label": "billing", "extra": 1}\r\n',
    )
    assert load_examples(f) == [Example("the dock is broken", "repair"), Example("charged twice", "billing")]


def test_jsonl_keeps_unicode_line_separators_inside_strings(tmp_path: Path) -> None:
    # U+2028 may appear unescaped in a JSON string (RFC 8259 section 7 only requires escaping
    # U+0000-U+001F); it must not split the line.
    f = _write(tmp_path / "d.jsonl", '{"text": "a\u2028b", "label": "x"}\n')
    assert load_examples(f) == [Example("a\u2028b", "x")]


def test_integer_and_boolean_labels_become_their_json_text(tmp_path: Path) -> None:
    f = _write(tmp_path / "d.jsonl", '{"text": "a", "label": 0}\n{"text": "b", "label": true}\n')
    assert [e.label for e in load_examples(f)] == ["0", "true"]


def test_csv_and_tsv_load_with_quotes_and_bom(tmp_path: Path) -> None:
    # RFC 4180: quoted fields may hold the delimiter, line breaks and doubled quotes.
    f = _write(
        tmp_path / "d.csv", '\ufeffid,label,body\r\n1,repair,"broken, again"\r\n2,billing,"two\nlines ""quoted"""\r\n'
    )
    assert load_examples(f, text_field="body") == [
        Example("broken, again", "repair"),
        Example('two\nlines "quoted"', "billing"),
    ]
    t = _write(tmp_path / "d.tsv", "text\tlabel\nhello there\tpraise\n")
    assert load_examples(t) == [Example("hello there", "praise")]


def test_json_array_of_the_published_sentiment_set_loads() -> None:
    # UCI Sentiment Labelled Sentences (Kotzias et al., KDD 2015) as shipped in the npm package
    # `sentiment` 5.0.2: 1,000 labelled sentences, 500 per class, then a {"text": "", "class": null}
    # sentinel as item 1,001 (tests/data/sentiment_labelled/README.md). The sentinel is bad input.
    path = DATA / "sentiment_labelled" / "amazon.json"
    with pytest.raises(InputError, match=r"item 1001: the 'text' field is empty"):
        load_examples(path, label_field="class")


def test_missing_file(tmp_path: Path) -> None:
    assert "no such file" in _error(tmp_path / "nope.jsonl")


def test_folder_instead_of_file(tmp_path: Path) -> None:
    (tmp_path / "d.csv").mkdir()
    assert "is a folder" in _error(tmp_path / "d.csv")


@pytest.mark.parametrize("content", ["", "\n\n  \n"])
def test_empty_file(tmp_path: Path, content: str) -> None:
    assert "empty" in _error(_write(tmp_path / "d.jsonl", content))


def test_csv_with_header_only(tmp_path: Path) -> None:
    assert "no labelled rows" in _error(_write(tmp_path / "d.csv", "text,label\n"))


def test_non_utf8_names_line_and_byte_offset(tmp_path: Path) -> None:
    data = b'{"text": "ok", "label": "a"}\n' + b'{"text": "caf\xe9", "label": "b"}\n'
    message = _error(_write(tmp_path / "d.jsonl", data))
    offset = data.index(b"\xe9")
    assert f"line 2: byte offset {offset} is not valid UTF-8" in message
    assert "0xe9" in message and "UTF-8" in message


def test_invalid_json_line(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.jsonl", '{"text": "a", "label": "x"}\n{"text": "b", label: "y"}\n'))
    assert "line 2: not valid JSON" in message and "one JSON object" in message


def test_json_line_that_is_not_an_object(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.jsonl", '["a", "x"]\n'))
    assert "line 1: is an array" in message


def test_missing_field_names_fields_found(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.jsonl", '{"body": "a", "label": "x"}\n'))
    assert "line 1: no 'text' field" in message
    assert "fields found: 'body', 'label'" in message and "--text-field" in message


def test_missing_field_in_csv_header(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.csv", "body,category\na,x\n"))
    assert "line 1 (header): no 'text' and 'label' field" in message
    assert "'body', 'category'" in message


def test_other_field_names_are_used(tmp_path: Path) -> None:
    f = _write(tmp_path / "d.jsonl", '{"body": "a", "category": "x"}\n')
    assert load_examples(f, text_field="body", label_field="category") == [Example("a", "x")]


@pytest.mark.parametrize("text", ["", "   \t "])
def test_empty_text(tmp_path: Path, text: str) -> None:
    rows = [{"text": "fine", "label": "a"}, {"text": text, "label": "b"}]
    message = _error(_write(tmp_path / "d.jsonl", "".join(json.dumps(r) + "\n" for r in rows)))
    assert "line 2: the 'text' field is empty" in message


@pytest.mark.parametrize(("value", "kind"), [(3, "a number"), (None, "null"), (["a"], "an array")])
def test_non_string_text(tmp_path: Path, value: object, kind: str) -> None:
    message = _error(_write(tmp_path / "d.jsonl", json.dumps({"text": value, "label": "a"}) + "\n"))
    assert f"line 1: the 'text' field is {kind}; it must be a string" in message


@pytest.mark.parametrize(("value", "expected"), [(None, "is null"), (1.5, "is a number"), ("  ", "is empty")])
def test_bad_labels(tmp_path: Path, value: object, expected: str) -> None:
    message = _error(_write(tmp_path / "d.jsonl", json.dumps({"text": "a", "label": value}) + "\n"))
    assert f"the 'label' field {expected}" in message


def test_unsupported_extension(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.xlsx", "whatever"))
    assert "unsupported file type '.xlsx'" in message and ".jsonl" in message and ".csv" in message


def test_ragged_csv_row(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.csv", "text,label\na,x\nb,y,z\n"))
    assert "line 3: has 3 columns but the header has 2" in message


def test_csv_line_numbers_count_quoted_line_breaks(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.csv", 'text,label\n"two\nlines",x\n"",y\n'))
    assert "line 4: the 'text' field is empty" in message


def test_malformed_csv(tmp_path: Path) -> None:
    message = _error(_write(tmp_path / "d.csv", 'text,label\n"a"b,x\n'))
    assert "line 2: malformed CSV" in message


def test_duplicate_header(tmp_path: Path) -> None:
    assert "names 'text' twice" in _error(_write(tmp_path / "d.csv", "text,text,label\na,b,c\n"))


def test_check_labels_returns_sorted_names() -> None:
    train = [Example("a", "z"), Example("b", "m"), Example("c", "z")]
    assert check_labels(train, [Example("d", "m")]) == ["m", "z"]


def test_check_labels_needs_two() -> None:
    with pytest.raises(InputError, match=r"1 distinct label \('only'\); a classifier needs at least 2"):
        check_labels([Example("a", "only"), Example("b", "only")], [])


def test_check_labels_names_unseen_validation_labels() -> None:
    train = [Example("a", "x"), Example("b", "y")]
    with pytest.raises(InputError, match=r"labels not in .*: 'q', 'w'; allowed .* \('x', 'y'\)"):
        check_labels(train, [Example("c", "w"), Example("d", "x"), Example("e", "q")])


def test_data_module_does_not_import_torch() -> None:
    import subprocess
    import sys

    code = "import sys, textsieve.labelled, textsieve.exporter.vectors; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
