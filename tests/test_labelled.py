"""Loading labelled examples: both formats, and a precise one-line error for each bad input."""

from __future__ import annotations

import json
import unicodedata
from collections.abc import Callable
from pathlib import Path

import pytest

from tests.helpers.printable import JOINED
from textsieve.errors import InputError
from textsieve.labelled import (
    LABEL_CHARACTERS,
    Example,
    case_twins,
    check_labels,
    label_problem,
    load_examples,
    name_unknown,
)

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


@pytest.mark.parametrize("suffix", [".csv", ".tsv"])
def test_a_field_longer_than_the_csv_modules_default_limit_loads_as_in_jsonl(tmp_path: Path, suffix: str) -> None:
    # Python's csv module refuses a field over 131,072 characters unless csv.field_size_limit is raised;
    # the same text as a JSON Lines line loaded.
    long_text = "the chain is broken " * 10_000
    delimiter = "," if suffix == ".csv" else "\t"
    f = _write(tmp_path / f"d{suffix}", f"text{delimiter}label\n{long_text}{delimiter}repair\nhi{delimiter}praise\n")
    j = _write(
        tmp_path / "d.jsonl",
        "".join(json.dumps({"text": t, "label": x}) + "\n" for t, x in [(long_text, "repair"), ("hi", "praise")]),
    )
    assert load_examples(f) == load_examples(j) == [Example(long_text, "repair"), Example("hi", "praise")]


def test_json_array_of_the_published_sentiment_set_loads() -> None:
    # UCI Sentiment Labelled Sentences (Kotzias et al., KDD 2015) as shipped in the npm package
    # `sentiment` 5.0.2: 1,000 labelled sentences, 500 per class, then a {"text": "", "class": null}
    # sentinel as item 1,001 (tests/data/sentiment_labelled/README.md). The sentinel is bad input.
    path = DATA / "sentiment_labelled" / "amazon.json"
    with pytest.raises(InputError, match=r"item 1001: the 'text' field is empty"):
        load_examples(path, label_field="class")


def test_other_field_names_are_used(tmp_path: Path) -> None:
    f = _write(tmp_path / "d.jsonl", '{"body": "a", "category": "x"}\n')
    assert load_examples(f, text_field="body", label_field="category") == [Example("a", "x")]


@pytest.mark.parametrize(
    ("make", "expected_msg"),
    [
        pytest.param(lambda path: None, "no such file", id="missing file"),
        pytest.param(lambda path: path.mkdir(), "is a folder", id="a folder"),
    ],
)
@pytest.mark.parametrize("name", ["d.csv", "data", "data.txt"])
def test_a_path_that_is_not_a_file(tmp_path: Path, make: Callable[[Path], None], expected_msg: str, name: str) -> None:
    # `textsieve train data/` named a folder without a suffix "unsupported file type '(no extension)'".
    path = tmp_path / name
    make(path)
    message = _error(path)
    assert expected_msg in message and "unsupported file type" not in message


_NON_UTF8 = b'{"text": "ok", "label": "a"}\n' + b'{"text": "caf\xe9", "label": "b"}\n'
_NON_UTF8_AT = _NON_UTF8.index(b"\xe9")  # the byte offset the message must name


def _jsonl(*rows: object) -> str:
    return "".join(json.dumps(r) + "\n" for r in rows)


# file name, content -> words the one-line message must contain (besides the file's path)
@pytest.mark.parametrize(
    ("name", "content", "expected_msg"),
    [
        pytest.param("d.jsonl", "", ["empty"], id="empty file"),
        pytest.param("d.jsonl", "\n\n  \n", ["empty"], id="blank lines only"),
        pytest.param("d.csv", "text,label\n", ["no labelled rows"], id="CSV header only"),
        pytest.param(
            "d.jsonl",
            _NON_UTF8,
            [f"line 2: byte offset {_NON_UTF8_AT} is not valid UTF-8", "0xe9", "UTF-8"],
            id="not UTF-8",
        ),
        pytest.param(
            "d.jsonl",
            '{"text": "a", "label": "x"}\n{"text": "b", label: "y"}\n',
            ["line 2: not valid JSON", "one JSON object"],
            id="a line not JSON",
        ),
        pytest.param("d.jsonl", '["a", "x"]\n', ["line 1: is an array"], id="a line not an object"),
        pytest.param(
            "d.jsonl",
            '{"body": "a", "label": "x"}\n',
            ["line 1: no 'text' field", "fields found: 'body', 'label'", "--text-field"],
            id="no text field",
        ),
        pytest.param(
            "d.csv",
            "body,category\na,x\n",
            ["line 1 (header): no 'text' and 'label' field", "'body', 'category'"],
            id="CSV header without the fields",
        ),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": "fine", "label": "a"}, {"text": "", "label": "b"}),
            ["line 2: the 'text' field is empty"],
            id="empty text",
        ),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": "fine", "label": "a"}, {"text": "   \t ", "label": "b"}),
            ["line 2: the 'text' field is empty"],
            id="whitespace text",
        ),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": 3, "label": "a"}),
            ["line 1: the 'text' field is a number; it must be a string"],
            id="text a number",
        ),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": None, "label": "a"}),
            ["line 1: the 'text' field is null; it must be a string"],
            id="text null",
        ),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": ["a"], "label": "a"}),
            ["line 1: the 'text' field is an array; it must be a string"],
            id="text an array",
        ),
        # Old Mac line ends: the whole file is one line of JSON values with a raw \r between them (RFC 8259
        # section 2: \r is whitespace between tokens), which json reported as "Extra data at column 30".
        pytest.param(
            "d.jsonl",
            '{"text": "a", "label": "x"}\r{"text": "b", "label": "y"}\r',
            ["line 1 holds several JSON values separated by a lone \\r (old Mac line ends)", "convert the line ends"],
            id="JSONL with lone CR line ends",
        ),
        pytest.param("d.jsonl", _jsonl({"text": "a", "label": None}), ["the 'label' field is null"], id="label null"),
        pytest.param(
            "d.jsonl", _jsonl({"text": "a", "label": 1.5}), ["the 'label' field is a number"], id="label a fraction"
        ),
        pytest.param("d.jsonl", _jsonl({"text": "a", "label": "  "}), ["the 'label' field is empty"], id="label blank"),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": "a", "label": "ok"}, {"text": "b", "label": "two\nlines"}),
            ["line 2: the label 'two\\nlines' holds U+000A control character (category Cc: a control character)"],
            id="label with a line break",
        ),
        pytest.param(
            "d.csv",
            'text,label\na,"tab\there"\n',
            ["line 2: the label 'tab\\there' holds U+0009 control character (category Cc: a control character)"],
            id="label with a tab",
        ),
        pytest.param(
            "d.jsonl",
            _jsonl({"text": "a", "label": "billing "}),
            ["line 1: the label 'billing ' begins or ends with spaces"],
            id="label with a trailing space",
        ),
        # A label is recorded with each reviewer's verdict (at most 200 characters there): a longer
        # one trained and published, and no verdict on its class could be recorded.
        pytest.param(
            "d.jsonl",
            _jsonl({"text": "a", "label": "x" * 201}),
            ["line 1: the label 'xxx", "is 201 characters long; a label holds at most 200"],
            id="label too long",
        ),
        pytest.param(
            "d.xlsx", "whatever", ["unsupported file type '.xlsx'", ".jsonl", ".csv"], id="unsupported extension"
        ),
        pytest.param(
            "d.csv", "text,label\na,x\nb,y,z\n", ["line 3: has 3 columns but the header has 2"], id="ragged CSV row"
        ),
        pytest.param(
            "d.csv",
            'text,label\n"two\nlines",x\n"",y\n',
            ["line 4: the 'text' field is empty"],
            id="CSV line numbers count quoted line breaks",
        ),
        pytest.param("d.csv", 'text,label\n"a"b,x\n', ["line 2: malformed CSV"], id="malformed CSV"),
        pytest.param("d.csv", "text,text,label\na,b,c\n", ["names 'text' twice"], id="duplicate header"),
        # RFC 8259 §8.2: an escaped lone surrogate is legal JSON no UTF-8 text can hold; it was a
        # UnicodeEncodeError traceback from train (after training), evaluate and evalset add.
        pytest.param(
            "d.jsonl",
            '{"text": "ok", "label": "a"}\n{"text": "half \\ud800 a pair", "label": "b"}\n',
            ["line 2: the 'text' field holds a lone surrogate"],
            id="text with a lone surrogate",
        ),
        pytest.param(
            "d.jsonl",
            '{"text": "ok", "label": "\\udc00"}\n',
            ["line 1: the label '\\udc00' holds a lone surrogate"],
            id="label with a lone surrogate",
        ),
        # What the service refuses to classify (textsieve/texts.py) was trained and judged on: a NUL, and
        # a text of only zero-width characters (U+200B ZERO WIDTH SPACE, U+2060 WORD JOINER: category Cf in
        # the Unicode Character Database, so no tokenizer spec finds a token in them).
        pytest.param(
            "d.jsonl",
            '{"text": "ok", "label": "a"}\n{"text": "bad\\u0000text", "label": "b"}\n',
            ["line 2: the 'text' field contains a NUL character (U+0000) at character 3; remove it"],
            id="text with a NUL",
        ),
        pytest.param(
            "d.jsonl",
            '{"text": "ok", "label": "a"}\n{"text": "\\u200b \\u2060", "label": "b"}\n',
            ["line 2: the 'text' field has only whitespace and invisible characters (such as U+200B), no words"],
            id="text of zero-width characters",
        ),
        pytest.param(
            "d.csv",
            "text,label\nok,a\n\u2060\u200b,b\n",
            ["line 3: the 'text' field has only whitespace and invisible characters (such as U+2060)"],
            id="CSV text of zero-width characters",
        ),
        pytest.param(
            "d.json",
            '[{"text": "ok", "label": "a"}, {"text": "x\\u0000", "label": "b"}]',
            ["item 2: the 'text' field contains a NUL character (U+0000) at character 1"],
            id="JSON array text with a NUL",
        ),
    ],
)
def test_bad_data_file_is_one_line_naming_the_file(
    tmp_path: Path, name: str, content: str | bytes, expected_msg: list[str]
) -> None:
    message = _error(_write(tmp_path / name, content))
    for words in expected_msg:
        assert words in message, (words, message)


# Names and general categories of the characters as the Unicode Character Database gives them
# (UnicodeData.txt, read through Python's unicodedata); the Trojan Source case is Boucher and
# Anderson 2021 (CVE-2021-42574). The kinds refused are those of PRECIS's FreeformClass (RFC 8264,
# section 4.3), which actors' and reviewers' names obey too (registry/names.py).
@pytest.mark.parametrize(
    ("label", "shown"),
    [
        pytest.param(
            "refund\u202e", "U+202E RIGHT-TO-LEFT OVERRIDE (category Cf: a format character", id="Cf bidi override"
        ),
        pytest.param(
            "\u2066refund\u2069", "U+2066 LEFT-TO-RIGHT ISOLATE (category Cf: a format character", id="Cf isolate"
        ),
        pytest.param(
            "re\u200bfund", "U+200B ZERO WIDTH SPACE (category Cf: a format character", id="Cf zero width space"
        ),
        pytest.param("re\u00adfund", "U+00AD SOFT HYPHEN (category Cf: a format character", id="Cf soft hyphen"),
        pytest.param(
            "refund\u200d", "U+200D ZERO WIDTH JOINER (category Cf: a format character", id="Cf joiner at the end"
        ),
        pytest.param("re\u2028fund", "U+2028 LINE SEPARATOR (category Zl: a line separator)", id="Zl"),
        pytest.param("re\u2029fund", "U+2029 PARAGRAPH SEPARATOR (category Zp: a paragraph separator)", id="Zp"),
        pytest.param("refund\ue000", "U+E000 private-use character (category Co: a private-use character)", id="Co"),
        pytest.param("refund\U000e0fff", "U+E0FFF unassigned (category Cn: an unassigned code point)", id="Cn"),
        pytest.param("refund\ufdd0", "U+FDD0 unassigned (category Cn: an unassigned code point)", id="noncharacter"),
        pytest.param("re\x85fund", "U+0085 control character (category Cc: a control character)", id="Cc C1"),
    ],
)
def test_labels_refuse_what_names_refuse(tmp_path: Path, label: str, shown: str) -> None:
    """A label is shown in replies, the reviewer page and the CLI's tables as a person's name is, so it
    obeys the same rule: only control characters were refused (a U+202E label trained, exported and
    was published, and the page showed the text after it reversed)."""
    code = int(shown.split()[0][2:], 16)
    assert f"(category {unicodedata.category(chr(code))}" in shown, "the category the database gives"
    f = _write(tmp_path / "d.jsonl", _jsonl({"text": "a", "label": "ok"}, {"text": "b", "label": label}))
    message = _error(f)
    assert f"line 2: the label {label!r} holds {shown}" in message
    assert message.endswith(LABEL_CHARACTERS)


@pytest.mark.parametrize(
    "label",
    [
        *JOINED,
        pytest.param("Zoë's refund", id="Latin with a mark and an apostrophe"),
        pytest.param("退款", id="CJK"),
    ],
)
def test_labels_in_any_script_are_kept_as_written(tmp_path: Path, label: str) -> None:
    f = _write(tmp_path / "d.jsonl", _jsonl({"text": "a", "label": label}))
    assert load_examples(f) == [Example("a", label)]
    assert label_problem(label) is None


def test_an_evaluation_set_may_name_labels_published_before_the_rule(tmp_path: Path) -> None:
    """An evaluation set names labels of versions already published: held to the stored rule."""
    f = _write(tmp_path / "d.jsonl", _jsonl({"text": "a", "label": "re\u200bfund"}))
    assert "U+200B ZERO WIDTH SPACE" in _error(f)
    assert load_examples(f, stored_labels=True) == [Example("a", "re\u200bfund")]
    still = _write(tmp_path / "e.jsonl", _jsonl({"text": "a", "label": "two\nlines"}))
    with pytest.raises(InputError, match="U\\+000A"):
        load_examples(still, stored_labels=True)


def test_a_stored_label_is_held_to_the_rule_of_its_day() -> None:
    """A manifest read back (a version published before the rule) refuses only what was refused then."""
    assert label_problem("refund\u202e") is not None
    assert label_problem("refund\u202e", stored=True) is None
    assert label_problem("re\u200bfund", stored=True) is None
    assert label_problem("two\nlines", stored=True) is not None


def test_check_labels_returns_sorted_names() -> None:
    train = [Example("a", "z"), Example("b", "m"), Example("c", "z")]
    assert check_labels(train, [Example("d", "m")]) == ["m", "z"]


@pytest.mark.parametrize(
    ("train", "valid", "expected_msg"),
    [
        pytest.param(
            [Example("a", "only"), Example("b", "only")],
            [],
            r"1 distinct label \('only'\); a classifier needs at least 2",
            id="one label",
        ),
        pytest.param(
            [Example("a", "x"), Example("b", "y")],
            [Example("c", "w"), Example("d", "x"), Example("e", "q")],
            r"labels not in .*: 'q', 'w'; allowed .* \('x', 'y'\)",
            id="validation labels unseen in training",
        ),
        # Canonical equivalence (Unicode Standard Annex #15, section 1.1): U+00E9 and e + U+0301 are
        # one text to a reader; unicodedata (the Unicode Character Database) says so, not this project.
        pytest.param(
            [Example("a", "caf\u00e9"), Example("b", "cafe\u0301"), Example("c", "repair")],
            [],
            "same text in different Unicode forms: 'cafe\u0301' \\(cafe<U\\+0301>, 1 row\\) and 'caf\u00e9' "
            r"\(caf<U\+00E9>, 1 row\); they would train as separate classes",
            id="one label in two Unicode forms",
        ),
        pytest.param(
            [Example("a", "caf\u00e9"), Example("b", "repair")],
            [Example("c", "cafe\u0301")],
            "the label 'cafe\u0301' \\(cafe<U\\+0301>\\), which .* writes in another Unicode form \\(caf<U\\+00E9>\\)",
            id="validation label in another Unicode form",
        ),
    ],
)
def test_check_labels_refusals(train: list[Example], valid: list[Example], expected_msg: str) -> None:
    with pytest.raises(InputError, match=expected_msg):
        check_labels(train, valid)


def test_unicode_forms_of_one_label_are_canonically_equivalent() -> None:
    # The premise of the refusal above, held to the Unicode Character Database (unicodedata).
    assert "caf\u00e9" != "cafe\u0301"
    assert unicodedata.normalize("NFC", "cafe\u0301") == "caf\u00e9"


def test_case_twins_are_labels_equal_after_nfkc_and_case_folding() -> None:
    # Full-width letters fold to ASCII under NFKC (compatibility decomposition, UAX #15).
    labels = ["Billing", "billing", "\uff42illing", "repair", "Repair", "other"]
    assert case_twins(labels) == [["Billing", "billing", "\uff42illing"], ["repair", "Repair"]]
    assert case_twins(["a", "b"]) == []


def test_an_unknown_label_in_another_unicode_form_shows_both_forms() -> None:
    # U+00E9 and e + U+0301 are canonically equivalent (UAX #15), as unicodedata.normalize confirms above.
    known = ["caf\u00e9", "repair"]
    assert name_unknown("cafe\u0301", known) == (
        "'cafe\u0301' (cafe<U+0301>; the model's is caf<U+00E9>, another Unicode form)"
    )
    assert name_unknown("kitchen", known) == "'kitchen'"


def test_data_module_does_not_import_torch() -> None:
    import subprocess
    import sys

    code = "import sys, textsieve.labelled, textsieve.exporter.vectors; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


@pytest.mark.parametrize(
    "text",
    [
        pytest.param("nul\x00inside", id="NUL"),
        pytest.param("\u200b\u200c\u200d", id="zero-width only"),
        pytest.param("\ufeff ", id="BOM and space"),
        pytest.param("half \udfff", id="lone surrogate"),
    ],
)
def test_a_labelled_file_refuses_what_the_service_refuses(tmp_path: Path, text: str) -> None:
    """Every reader of labelled files (train, evaluate, evalset add, publish --evalset) and the HTTP API
    agree: a row the service would refuse (textsieve.texts.text_refusal) is an error naming the row."""
    from textsieve.service.web.schemas import PredictRequest
    from textsieve.texts import text_refusal

    with pytest.raises(ValueError, match="texts"):
        PredictRequest.model_validate({"texts": [text]})  # the service's own refusal (HTTP 422)
    why = text_refusal(text)
    assert why is not None
    path = tmp_path / "d.jsonl"
    path.write_text(_jsonl({"text": "fine", "label": "a"}, {"text": text, "label": "b"}), encoding="utf-8")
    message = _error(path)
    assert message.startswith(f"{path}: line 2: the 'text' field "), message
    if "surrogate" not in why:  # the reader names a lone surrogate in its own (older) words
        assert message.endswith(why), message


def _read_traced(path: Path) -> tuple[list[Example], int, int, list[int]]:
    """``load_examples(path)``, the bytes its examples keep and the peak while reading (tracemalloc,
    Python's own allocation tracer), and the byte counts it reported as progress."""
    import tracemalloc

    reported: list[int] = []
    tracemalloc.start()
    try:
        examples = load_examples(path, progress=reported.append)
        kept, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return examples, kept, peak, reported


def test_json_lines_are_read_a_line_at_a_time(tmp_path: Path) -> None:
    """A 50 MB JSONL file held its bytes, its decoded text and its list of lines at once while being
    read (+430 MB peak; found by measuring). Read a line at a time, what is allocated beyond the
    examples kept is about one line, not the file (tracemalloc, Python's own allocation tracer)."""
    path = tmp_path / "big.jsonl"
    rows = [
        {"text": f"invented message {i} about a borrowed drill — please help", "label": "ab"[i % 2]}
        for i in range(20000)
    ]
    path.write_text(_jsonl(*rows), encoding="utf-8")
    size = path.stat().st_size
    examples, kept, peak, reported = _read_traced(path)
    beyond = peak - kept
    assert [e.text for e in examples] == [r["text"] for r in rows]
    assert beyond < size // 4, (beyond, size)
    assert sum(reported) == size and len(reported) == -(-size // (1 << 20))  # a call a MiB, the rest at the end


@pytest.mark.parametrize("suffix", [".csv", ".tsv"])
def test_csv_and_tsv_are_read_a_line_at_a_time(tmp_path: Path, suffix: str) -> None:
    """A 50 MB CSV file held its bytes, its text and a StringIO of it (four bytes a character) at once:
    543 MB peak for load_examples alone (/usr/bin/time -v, found by measuring). Read a line at a time,
    what is allocated beyond the examples kept is about one line (tracemalloc, Python's own tracer)."""
    import csv

    path = tmp_path / f"big{suffix}"
    rows = [
        (f'invented message {i} about a borrowed drill, "quoted" — please\nhelp', "ab"[i % 2]) for i in range(20000)
    ]
    with path.open("w", encoding="utf-8", newline="") as f:
        writer = csv.writer(f, delimiter="," if suffix == ".csv" else "\t")
        writer.writerow(["text", "label"])
        writer.writerows(rows)
    size = path.stat().st_size
    examples, kept, peak, reported = _read_traced(path)
    beyond = peak - kept
    assert [(e.text, e.label) for e in examples] == rows  # Python's csv module wrote them
    assert beyond < size // 4, (beyond, size)
    assert sum(reported) == size and len(reported) == -(-size // (1 << 20))  # a call a MiB, the rest at the end


# Line ends the csv module meets in a file opened with newline="" (Python's csv documentation says to):
# \n, \r\n and a lone \r (old Mac), mixed, inside quoted fields, with a BOM and without a last line end.
_LINE_ENDS = [
    "\ufefftext,label\r\na,x\r\nb,y",
    "text,label\ra,x\rb,y\r",
    'text,label\n\r\n\ra,x\r"two\rlines",y\n"two\r\nmore",x\r\r\n',
    'text,label\n"a\n\n",x\n  \n"b",y\n',
]


@pytest.mark.parametrize("content", _LINE_ENDS)
def test_csv_read_a_line_at_a_time_reads_what_the_whole_text_read(tmp_path: Path, content: str) -> None:
    """Python's csv module over io.StringIO(text, newline="") (how the whole file was read) is the
    reference: the same rows and the same line numbers, lone \r line ends included."""
    import csv
    import io

    from textsieve.labelled import _csv_lines

    path = _write(tmp_path / "d.csv", content)
    reference = io.StringIO(content.removeprefix("\ufeff"), newline="")
    assert list(_csv_lines(path, None)) == list(reference)
    whole = csv.reader(io.StringIO(content.removeprefix("\ufeff"), newline=""))
    kept = [row for row in whole if len(row) == 2][1:]  # blank lines skipped, the header first
    assert load_examples(path) == [Example(text, label) for text, label in kept]
    # A bad row after them is named by the line the whole text's reader gave it.
    bad = content + ("\n" if not content.endswith(("\n", "\r")) else "") + ",z\n"
    reader = csv.reader(io.StringIO(bad.removeprefix("\ufeff"), newline=""))
    line = next(reader.line_num for row in reader if row == ["", "z"])
    assert f"line {line}: the 'text' field is empty" in _error(_write(tmp_path / "bad.csv", bad))


def test_csv_not_utf8_names_its_line_and_byte_offset(tmp_path: Path) -> None:
    content = b'text,label\r\n"two\nlines",a\r\ncaf\xe9,b\r\n'
    at = content.index(b"\xe9")
    message = _error(_write(tmp_path / "d.csv", content))
    assert f"line 4: byte offset {at} is not valid UTF-8 (byte 0xe9)" in message  # lines end at \n, as before


def test_progress_covers_every_byte_whatever_the_format(tmp_path: Path) -> None:
    csv_path = tmp_path / "d.csv"
    csv_path.write_text("text,label\nfine,a\nalso fine,b\n", encoding="utf-8")
    array = tmp_path / "d.json"
    array.write_text('\ufeff  [{"text": "fine", "label": "a"}]', encoding="utf-8")
    for path, rows in ((csv_path, 2), (array, 1)):
        reported: list[int] = []
        assert len(load_examples(path, progress=reported.append)) == rows
        assert sum(reported) == path.stat().st_size


def test_a_json_array_is_read_an_item_at_a_time(tmp_path: Path) -> None:
    # Read whole, a JSON array was held three times over besides its examples (bytes, text, the
    # parsed list): tracemalloc's peak was 2.9× what the examples keep. Streamed, the peak is the
    # examples plus a window of one chunk.
    rows = [{"text": f"the dock at station {i} is broken again", "label": "ab"[i % 2], "id": i} for i in range(20_000)]
    path = _write(tmp_path / "d.json", json.dumps(rows, indent=1))
    examples, kept, peak, reported = _read_traced(path)
    assert examples == [Example(r["text"], r["label"]) for r in rows]
    assert peak < 1.3 * kept, f"peak {peak:,} bytes against {kept:,} kept"
    assert len(reported) > 1 and sum(reported) == path.stat().st_size, "the bar moves as the file is read"


def test_a_json_array_names_the_first_bad_item_before_reading_on(tmp_path: Path) -> None:
    # Item 2 is not an object and the text breaks further on: streaming meets item 2 first.
    content = '[{"text": "fine", "label": "a"},\n 7,\n {"text": "x", "label": "b"} {]'
    assert "item 2: is a number; each array item must be a JSON object" in _error(_write(tmp_path / "d.json", content))
    broken = '[{"text": "fine", "label": "a"},\n {"text": "x" "label": "b"}]'
    message = _error(_write(tmp_path / "e.json", broken))
    assert "line 2: not valid JSON (Expecting ',' delimiter at column 15)" in message
