"""The CLI's tables (registry/tables.py): fitted to the terminal, safe to print, aligned by display width.

Widths are measured with rich's ``cell_len`` (``rich.cells``, a terminal-rendering library in the lock
through import-linter and schemathesis): an implementation of terminal cell widths independent of ours,
both following Unicode UAX #11 (East Asian Wide and Fullwidth characters take two cells, combining marks
none). Control characters are those of ECMA-48 (C0 and C1, Unicode category Cc).
"""

from __future__ import annotations

import fcntl
import io
import os
import struct
import termios
import unicodedata
from pathlib import Path

import pytest
from rich.cells import cell_len

from tests.registry.test_cli import run
from textsieve.registry.tables import key_values, one_line, table, terminal_width, wrap

WORD = "w" * 500  # one 500-character word: can only be split inside itself
REASON = f"before\x1b[2Jafter\rreturn\nnewline\ttab {WORD} 汉字の理由を書きます、長い説明 end"


def _starts(header: str, names: list[str]) -> list[int]:
    """The terminal column where each named header begins."""
    return [cell_len(header[: header.index(name)]) for name in names]


def _cut(line: str, start: int, end: int | None) -> str:
    """The part of ``line`` between two terminal columns, which no character may straddle."""
    col, out = 0, []
    for c in line:
        if end is not None and col >= end:
            break
        if col >= start:
            out.append(c)
        col += cell_len(c)
        assert col <= start or col - cell_len(c) >= start, f"a character straddles column {start}: {line!r}"
    return "".join(out).strip()


def _no_controls(text: str) -> bool:
    return not any(unicodedata.category(c) == "Cc" for c in text.replace("\n", ""))


def test_a_long_reason_wraps_within_the_width_and_keeps_every_character() -> None:
    """Before: one 1,000-column line. Escape sequence, carriage return and line feed are shown, the
    500-character word is split, CJK text counts two cells a character, and the columns stay in line."""
    text = table(
        ["EVENT", "ACTOR", "REASON", "BY"],
        [[1, "王小明", REASON, "李四"], [22, "ana", "short", "bo"]],
        right=(0,),
        wrap_columns=(2,),
        width=60,
    )
    lines = text.splitlines()
    assert all(cell_len(line) <= 60 for line in lines), [cell_len(line) for line in lines]
    assert _no_controls(text)
    reason_at, by_at = _starts(lines[0], ["REASON", "BY"])
    row = lines[1 : 1 + sum(1 for ln in lines[1:] if not ln.lstrip().startswith("22"))]
    assert _cut(row[0], 0, reason_at).split() == ["1", "王小明"]
    assert _cut(row[0], by_at, None) == "李四"
    pieces = [_cut(line, reason_at, by_at) for line in row]
    shown = "".join("".join(p.split()) for p in pieces)
    expected = one_line(REASON)
    assert expected.startswith(r"before\x1b[2Jafter ↵ return ↵ newline tab www")  # ESC as \x1b, CR and LF as ↵
    assert shown == "".join(expected.split())  # nothing cut (spaces aside: lines break at them)
    assert max(cell_len(p) for p in pieces) <= by_at - reason_at - 2
    assert lines[-1].split() == ["22", "ana", "short", "bo"]


def test_a_list_without_spaces_breaks_after_its_commas_not_inside_its_words() -> None:
    """A bundle's labels are shown comma-joined ("account,billing,praise,repair"); at 80 columns the
    history table split them as "account,bill" / "ing,praise,r" / "epair". Breaking after a list
    separator rather than inside a word is common practice for lists in narrow columns (not UAX #14,
    which keeps a comma with the letter after it, as in "e.g.")."""
    labels = "account,billing,praise,repair"
    assert wrap(labels, 12) == ["account,", "billing,", "praise,", "repair"]
    assert wrap(labels, 16) == ["account,billing,", "praise,repair"]
    assert wrap("a;b/c|d e", 4) == ["a;b/", "c|d", "e"]
    assert wrap("unbroken" * 3, 10) == ["unbrokenun", "brokenunbr", "oken"]  # no separator: inside the word


def test_without_a_width_each_row_is_one_line_holding_its_whole_text() -> None:
    """Output to a pipe: one record a line for grep and awk, the whole reason in it, still made safe."""
    text = table(["EVENT", "REASON"], [[1, REASON], [2, "ok"]], wrap_columns=(1,), width=None)
    lines = text.splitlines()
    assert len(lines) == 3 and lines[1].endswith(one_line(REASON)) and _no_controls(text)


def test_only_the_free_text_columns_are_wrapped() -> None:
    """A time or a number split over two lines would misread; the named free-text column takes the cut."""
    stamp = "2026-12-05 01:31:21Z"
    text = table(["TIME", "REASON"], [[stamp, "x " * 60]], wrap_columns=(1,), width=40)
    assert all(line.startswith((stamp, " " * len(stamp))) for line in text.splitlines()[1:])
    assert all(cell_len(line) <= 40 for line in text.splitlines())


def test_times_fold_date_over_time_only_when_the_free_text_cannot_fit() -> None:
    """`versions` at 80 columns was wider than the terminal by its two 20-column times alone. When the
    free text cannot fit at its usual narrowest, a time column folds at its space (the date over the
    time, neither ever split: common practice for narrow tables) and the free text gets the room."""
    stamp, labels = "2026-12-05 01:31:21Z", "account,billing,praise,repair"
    headers, row = ["V", "LABELS", "PUBLISHED", "LIVE SINCE"], [[1, labels, stamp, None]]
    roomy = table(headers, row, wrap_columns=(1,), width=60)
    assert stamp in roomy  # the labels fit at 12 columns or more: the time stays whole
    narrow = table(headers, row, wrap_columns=(1,), width=40).splitlines()
    assert all(cell_len(line) <= 40 for line in narrow)
    cells = [line[_starts(narrow[0], ["PUBLISHED"])[0] :].split()[0] for line in narrow[1:3]]
    assert cells == ["2026-12-05", "01:31:21Z"]
    assert "".join(_cut(line, 3, _starts(narrow[0], ["PUBLISHED"])[0]) for line in narrow[1:]) == labels
    assert table(headers, row, wrap_columns=(1,), width=None).count("\n") == 1  # no width: one line a row


def test_a_list_keeps_its_words_whole_when_no_width_would_make_the_table_fit() -> None:
    """`versions` at 80 columns showed its labels in a 6-column LABELS as "accoun" / "t," / "billin" /
    "g,": the table overflowed the terminal anyway, so splitting words gained nothing. A wrapped column
    now narrows to its longest word (here "account,") before it splits words, and splits them only
    when that makes the table fit."""
    labels = "account,billing,praise,repair"
    fixed = ["registered", "2026-12-05 01:31:21Z", "0.9317", "0.9304", "passed"]
    headers = ["STATE", "PUBLISHED", "ACCURACY", "MACRO-F1", "PARITY", "LABELS"]
    # 10 + 10 (the time folded) + 8 + 8 + 6 + 8 + 5 gaps × 2 = 60 columns with whole words; 58 with
    # 6-column labels; 64 with 12.
    for width in (40, 50, 57, 60, 63):
        lines = table(headers, [[*fixed, labels]], wrap_columns=(5,), width=width).splitlines()
        at = _starts(lines[0], ["LABELS"])[0]
        assert [line[at:].strip() for line in lines[1:]] == ["account,", "billing,", "praise,", "repair"], width
    lines = table(headers, [[*fixed, labels]], wrap_columns=(5,), width=58).splitlines()
    assert all(cell_len(line) <= 58 for line in lines)  # where splitting words makes it fit, it does
    at = _starts(lines[0], ["LABELS"])[0]
    assert "".join(line[at:].strip() for line in lines[1:]) == labels


def test_optional_columns_are_left_out_in_order_only_when_the_table_cannot_fit_whole_words() -> None:
    headers = ["ID", "STATE", "CHECK", "NOTE", "WHEN"]
    row = [["7", "registered", "passed", "account,billing", "2026-12-05 01:31:21Z"]]
    kwargs = {"wrap_columns": (3,), "optional": (2, 4), "shown_by": "'show' has them"}
    assert "left out" not in table(headers, row, width=None, **kwargs)  # no terminal: nothing left out
    assert "left out" not in table(headers, row, width=80, **kwargs)  # it fits whole
    # 2 + 10 + 6 + 8 ("account,") + 10 (the time folded) + 4 gaps × 2 = 44 columns with whole words.
    lines = table(headers, row, width=43, **kwargs).splitlines()
    assert lines[0].split() == ["ID", "STATE", "NOTE", "WHEN"]
    assert " ".join(lines[-2:]) == "(CHECK left out to fit 43 columns; 'show' has them)"
    assert all(cell_len(ln) <= 43 for ln in lines)
    lines = table(headers, row, width=30, **kwargs).splitlines()
    assert lines[0].split() == ["ID", "STATE", "NOTE"] and "account," in lines[1] and "billing" in lines[2]
    note = " ".join(lines[next(i for i, ln in enumerate(lines) if ln.startswith("(")) :])
    assert note == "(CHECK, WHEN left out to fit 30 columns; 'show' has them)"
    assert all(cell_len(ln) <= 30 for ln in lines)


@pytest.mark.parametrize("width", [80, 60])
def test_versions_fits_80_and_60_columns_and_says_where_the_left_out_columns_are(
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    width: int,
) -> None:
    """Before: at 80 columns `versions` printed lines 87–94 wide (nine columns that could not wrap
    below their headers), which the terminal wrapped again, every row out of line."""
    r = ["--registry", str(tmp_path / "reg")]
    for key in ("a", "b"):
        assert run(capsys, "publish", str(tiny_bundles[key]), "--model", "m", "--actor", "release-bot", *r)[0] == 0
    assert run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", "--force", *r)[0] == 0
    capsys.readouterr()
    monkeypatch.setenv("COLUMNS", str(width))
    code, out, err = run(capsys, "versions", "m", *r)
    lines = out.splitlines()
    assert code == 0 and all(cell_len(line) <= width for line in lines), out
    assert " ".join(err.split()) == "* measured on the validation split (exported without --test)"  # both are
    # What a user picks a version by stays: number, state, the gates' metric, labels, when and by whom.
    assert {"VERSION", "STATE", "MACRO-F1", "LABELS", "PUBLISHED", "BY"} <= set(lines[0].split())
    states = [line.split()[1] for line in lines[1:] if line[:7].strip().isdigit()]
    assert states == ["live", "registered"]
    labels_at = _starts(lines[0], ["LABELS"])[0]
    body = "".join(_cut(line, labels_at, None) for line in lines[1:])
    assert all(label in body for label in ("account", "billing", "praise", "repair"))
    # ... and what is left out is named, with the command that shows it.
    left_out = next(line for line in lines if "left out" in line)
    note = " ".join(lines[lines.index(left_out) :])
    assert f"left out to fit {width} columns; 'textsieve show m VERSION' shows every field)" in note
    assert "PARITY" in note and "PARITY" not in lines[0]
    if width == 80:
        assert "ACCURACY" in lines[0] and "release-bot" in out  # no word cut in two at 80
    monkeypatch.delenv("COLUMNS")  # captured output is no terminal: every column, one line a row
    code, out, err = run(capsys, "versions", "m", *r)
    assert "PARITY" in out.splitlines()[0] and "left out" not in out and len(out.splitlines()) == 3
    assert err == "* measured on the validation split (exported without --test)\n"  # whole when not a terminal


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        pytest.param("a\u202eb", "a\\u202eb", id="right-to-left override (UAX #9) escaped"),
        pytest.param("a\u2066b\u2069", "a\\u2066b\\u2069", id="bidi isolates (UAX #9) escaped"),
        pytest.param("a\u2028b", "a ↵ b", id="line separator (Zl) as a line break"),
        pytest.param("a\x85b", "a ↵ b", id="next line, C1 NEL, as a line break"),
        pytest.param("a\udcffb", "a\\udcffb", id="lone surrogate (bytes not UTF-8) escaped"),
        pytest.param("e\u0301 👍 王", "e\u0301 👍 王", id="combining mark, emoji and CJK kept"),
        # The characters a label may not hold (textsieve/printable.py, PRECIS RFC 8264 §4.3): before, they
        # were printed as they are, so "re\u200bfund" showed as "refund".
        pytest.param("re\u200bfund", "re\\u200bfund", id="zero width space (Cf) escaped"),
        pytest.param("re\u00adfund", "re\\xadfund", id="soft hyphen (Cf) escaped"),
        pytest.param("a\ufeffb\u2060c", "a\\ufeffb\\u2060c", id="BOM and word joiner (Cf) escaped"),
        pytest.param("a\ue000b", "a\\ue000b", id="private use (Co) escaped"),
        pytest.param("a\U000f0000b", "a\\U000f0000b", id="supplementary private use (Co) escaped"),
        pytest.param("a\u0378b\ufffe", "a\\u0378b\\ufffe", id="unassigned and noncharacter (Cn) escaped"),
        # ZWNJ and ZWJ spell Persian and Indic words and join emoji (RFC 5892 appendix A): kept between
        # two visible characters, escaped elsewhere, as printable.refused_character decides.
        pytest.param("می\u200cخواهم", "می\u200cخواهم", id="ZWNJ inside a Persian word kept"),
        pytest.param("👩\u200d💻", "👩\u200d💻", id="ZWJ in an emoji sequence kept"),
        pytest.param("\u200dab \u200cc\u200d", "\\u200dab \\u200cc\\u200d", id="joiners at ends escaped"),
    ],
)
def test_characters_a_terminal_acts_on_are_shown_not_obeyed(text: str, expected: str) -> None:
    assert one_line(text) == expected
    io.TextIOWrapper(io.BytesIO(), encoding="utf-8", errors="strict").write(one_line(text))  # no UnicodeEncodeError


def test_wrapping_counts_wide_characters_as_two_cells() -> None:
    """Ten CJK characters in a column of 7 cells: three a line (6 cells), never 7 characters (14 cells)."""
    lines = wrap("汉" * 10, 7)
    assert lines == ["汉汉汉", "汉汉汉", "汉汉汉", "汉"]
    assert wrap(r"ab" + "\x1b" * 3, 6) == ["ab\\x1b", "\\x1b", "\\x1b"]  # an escape is never split


def test_columns_honoured_else_a_terminal_s_own_width_else_no_limit(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "77")
    assert terminal_width(io.StringIO()) == 77  # COLUMNS wins, as shutil.get_terminal_size documents
    monkeypatch.delenv("COLUMNS")
    assert terminal_width(io.StringIO()) is None  # a pipe or a file: not fitted
    main_fd, tty_fd = os.openpty()
    try:
        with open(tty_fd, "w", closefd=False) as tty:
            fcntl.ioctl(tty_fd, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 52, 0, 0))
            assert terminal_width(tty) == 52  # the terminal's own size (tty_ioctl(4): TIOCGWINSZ)
            fcntl.ioctl(tty_fd, termios.TIOCSWINSZ, struct.pack("HHHH", 0, 0, 0, 0))
            assert terminal_width(tty) == 80  # a terminal that reports no size: the classic 80 (common practice)
    finally:
        os.close(main_fd)
        os.close(tty_fd)


def test_history_gates_and_show_fit_columns_and_keep_the_whole_reason(
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
) -> None:
    """Before: a 500-character --reason made history, gates and show print lines of 500+ columns."""
    r = ["--registry", str(tmp_path / "reg")]
    reason = f"第一行\nline two\twith a tab {WORD} 结束"
    assert run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--reason", reason, *r)[0] == 0
    assert run(capsys, "gates", "m", "--set", "mcnemar=on", "--reason", reason, *r)[0] == 0
    whole = "".join(one_line(reason).split())
    # The gates table's fixed columns (key, value, default, source, time) take 73 of 80 columns.
    for argv, column, width in (
        (["history", "m"], ("REASON", "DETAIL"), 80),
        (["gates", "m"], ("WHY", "ALLOWED"), 100),
    ):
        monkeypatch.setenv("COLUMNS", str(width))
        code, out, _ = run(capsys, *argv, *r)
        lines = out.splitlines()  # gates' line of gates in force after its table too
        table_lines = lines[: next((i for i, ln in enumerate(lines) if ln.startswith("gates on")), None)]
        assert code == 0 and all(cell_len(line) <= width for line in lines), argv
        assert _no_controls(out)
        start, end = _starts(table_lines[0], list(column))
        assert whole in "".join("".join(_cut(line, start, end).split()) for line in table_lines[1:]), argv
    monkeypatch.setenv("COLUMNS", "80")
    code, out, _ = run(capsys, "show", "m", "1", *r)
    assert code == 0 and all(cell_len(line) <= 80 for line in out.splitlines())
    assert whole in "".join(out.split()) and _no_controls(out)

    monkeypatch.delenv("COLUMNS")  # captured output is no terminal: rows are lines, whole
    code, out, _ = run(capsys, "history", "m", *r)
    assert code == 0 and len(out.splitlines()) == 3 and one_line(reason) in out.splitlines()[1]


def test_a_number_with_thousands_separators_is_never_split() -> None:
    # "a whole number from 1 to 1,000,000,000" wrapped after each comma as if it ended a list item:
    # "1," over "000," over "000,000" (the gates table's ALLOWED column at 80 columns).
    text = table(["KEY", "ALLOWED"], [["k", "a whole number from 1 to 1,000,000,000"]], wrap_columns=(1,), width=20)
    lines = text.splitlines()
    assert any(line.endswith("1,000,000,000") for line in lines) and all(cell_len(ln) <= 20 for ln in lines), text
    assert wrap("account,billing,1,000", 9) == ["account,", "billing,", "1,000"]  # a list still breaks


def test_gates_fits_80_columns_leaving_out_what_other_columns_say(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """Before: at 80 columns every line of `gates` was 81-87 wide and ALLOWED split 1,000,000,000 in three."""
    r = ["--registry", str(tmp_path / "reg")]
    assert run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)[0] == 0
    assert run(capsys, "gates", "m", "--set", "mcnemar=on", "--reason", "600 texts: judge by significance", *r)[0] == 0
    capsys.readouterr()
    monkeypatch.setenv("COLUMNS", "80")
    code, out, _ = run(capsys, "gates", "m", *r)
    lines = out.splitlines()  # the line of gates in force after the table too (it was 225 columns)
    assert code == 0 and all(cell_len(line) <= 80 for line in lines), out
    note = lines[next(i for i, ln in enumerate(lines) if ln.startswith("gates on promotion to live: ")) :]
    assert len(note) > 1 and " ".join(note).endswith("of at least 50 texts and 5 per label"), out
    assert lines[0].split() == ["SETTING", "VALUE", "SET", "(UTC)", "BY", "WHY", "ALLOWED"]
    assert sum(line.endswith("1,000,000,000") for line in lines) == 3, out
    assert "(SOURCE, DEFAULT left out to fit 80 columns; COLUMNS=100 or a pipe shows every column)" in " ".join(lines)
    monkeypatch.setenv("COLUMNS", "100")
    code, out, _ = run(capsys, "gates", "m", *r)
    assert "DEFAULT" in out.splitlines()[0] and "SOURCE" in out.splitlines()[0] and "left out" not in out


def test_show_never_splits_a_sha256_and_keeps_it_beside_its_key_when_it_fits(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """Before: at 80 columns `show` split the 64-character manifest sha256 over two lines (62 + 2)."""
    r = ["--registry", str(tmp_path / "reg")]
    assert run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)[0] == 0
    capsys.readouterr()
    monkeypatch.delenv("COLUMNS", raising=False)  # captured output is no terminal: key and value on one line
    code, out, _ = run(capsys, "show", "m", "1", *r)
    wide = out.splitlines()
    digest = next(ln.split()[-1] for ln in wide if ln.startswith("manifest sha256 "))
    assert code == 0 and len(digest) == 64 and all(c in "0123456789abcdef" for c in digest), out
    for columns_ in (80, 70):
        monkeypatch.setenv("COLUMNS", str(columns_))
        code, out, _ = run(capsys, "show", "m", "1", *r)
        lines = out.splitlines()
        assert code == 0 and all(cell_len(line) <= columns_ for line in lines), out
        at = lines.index("manifest sha256")  # the key alone, the digest whole on the next line
        assert lines[at + 1].strip() == digest, out
        value_at = len("held-out metrics  ")  # the other values still start in one column (the longest key)
        assert lines[at - 1][value_at - 1 : value_at + 1] == " -" and lines[at + 2][value_at - 1 : value_at + 1] == " v"
    monkeypatch.setenv("COLUMNS", "120")  # room beside the key: as wide output
    code, out, _ = run(capsys, "show", "m", "1", *r)
    assert out.splitlines() == wide


def test_key_values_puts_a_value_with_no_space_that_would_be_split_on_its_own_line() -> None:
    digest = "0123456789abcdef" * 4
    rows = [("manifest sha256", digest), ("reason", "a few words that wrap " * 3)]
    text = key_values(rows, width=70)
    lines = text.splitlines()
    assert lines[:2] == ["manifest sha256", "  " + digest] and all(cell_len(ln) <= 70 for ln in lines), text
    assert lines[2].startswith("reason           a few") and lines[3].startswith(" " * 17), text
    assert key_values(rows, width=None).splitlines()[0] == "manifest sha256  " + digest
    assert key_values([("k", digest)], width=65).splitlines() == ["k", digest]  # no room to indent: not split


def test_a_stored_label_with_an_invisible_character_is_shown_escaped_in_every_table(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """Before: a version published before the label rule with "re\u200bfund" showed it as "refund" in
    `show` and `versions`, the same as a label without it (PRECIS, RFC 8264: such names must not pass)."""
    import shutil

    from tests.helpers.registries import edit_manifest, publish_unchecked_labels
    from textsieve.registry import open_registry

    bundle = Path(shutil.copytree(tiny_bundles["a"], tmp_path / "old"))
    labels = ["re\u200bfund", "bill\u00ading", "pr\ue000aise", "repair"]
    edit_manifest(bundle, {"labels": labels})
    with open_registry(tmp_path / "reg", create=True) as reg:
        assert publish_unchecked_labels(reg, bundle, "m") == 1
    r = ["--registry", str(tmp_path / "reg")]
    code, out, _ = run(capsys, "show", "m", "1", *r)
    assert code == 0 and "re\\u200bfund, bill\\xading, pr\\ue000aise, repair" in out, out
    assert not any(c in out for c in "\u200b\u00ad\ue000")


@pytest.mark.parametrize("width", [12, 16, 20])
def test_a_column_is_never_narrower_than_the_longest_escape_it_holds(width: int) -> None:
    """Before: a wrapped column fitted to 6 columns held the 10-column escape of a supplementary
    private-use character (``\\U000f0000``) whole on its line, and the column after it moved 4 to the right."""
    text = table(["N", "NOTE", "Z"], [["1", "\U000f0000\U000f0000 ab cd ef", "z"]], wrap_columns=(1,), width=width)
    lines = text.splitlines()
    z_at = _starts(lines[0], ["Z"])[0]
    assert _cut(lines[1], z_at, None) == "z", text  # Z's cell where its header is
    assert all(cell_len(_cut(line, 3, z_at).rstrip()) <= z_at - 5 for line in lines), text  # NOTE within its column
    noted = "".join("".join(_cut(line, 3, z_at).split()) for line in lines[1:])
    assert noted == "\\U000f0000\\U000f0000abcdef", text  # each escape whole, nothing cut


@pytest.mark.parametrize("width", [78, 66, 64, 63, 40])
def test_show_fits_its_files_to_the_terminal_each_digest_below_its_file(
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    width: int,
) -> None:
    """Before: below 79 columns every line of show's files table was 79 wide (FILE, then a 64-character
    sha256), which the terminal wrapped again. Now each digest goes below its file's name: whole where it
    fits (indented from 66 columns), in two halves of 32 below 64, as a word wider than its column."""
    r = ["--registry", str(tmp_path / "reg")]
    assert run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)[0] == 0
    capsys.readouterr()
    monkeypatch.delenv("COLUMNS", raising=False)  # captured output is no terminal: the table as it was
    code, out, _ = run(capsys, "show", "m", "1", *r)
    wide = out.splitlines()
    head = wide.index("files") + 1
    assert wide[head].split() == ["FILE", "SHA256"]
    files = dict(line.split() for line in wide[head + 1 : wide.index("", head) if "" in wide[head:] else None])
    assert {"manifest.json", "model.onnx", "vocab.txt"} <= set(files), out
    monkeypatch.setenv("COLUMNS", str(width))
    code, out, _ = run(capsys, "show", "m", "1", *r)
    lines = out.splitlines()
    assert code == 0 and all(cell_len(line) <= width for line in lines), out
    body = lines[lines.index("files") + 1 :]
    for name, digest in files.items():
        at = body.index(name)
        pieces = 1 if width >= 64 else 2
        assert "".join(line.strip() for line in body[at + 1 : at + 1 + pieces]) == digest, out


ACTOR = "admin-api@127.0.0.1"  # the actor every HTTP admin action records (service/web: admin-api@ADDRESS)
GATES = "registered → live; parity:pass labels:pass cautions:pass macro_f1:pass ece:pass"


def _column(lines: list[str], header: str) -> list[str]:
    """The cells of the column under ``header`` (to the next header), one a line of the table."""
    names = lines[0].split("  ")
    names = [n.strip() for n in names if n.strip()]
    at = names.index(header)
    start = _starts(lines[0], [header])[0]
    end = _starts(lines[0], [names[at + 1]])[0] if at + 1 < len(names) else None
    return [_cut(line, start, end) for line in lines[1:]]


def _whole(cells: list[str], token: str) -> bool:
    """Whether ``token`` shows whole in a cell and no cell ends with a piece of it cut off."""
    words = [w for cell in cells for w in cell.split()]
    return token in words and not any(token.startswith(w) and w != token for w in words if len(w) > 2)


@pytest.mark.parametrize("width", [80, 100])
def test_a_column_keeps_its_longest_word_while_the_free_text_can_give_way(width: int) -> None:
    """Before: at 80 columns history showed its actor as "admin-api@12" over "7.0.0.1" (at 100 as
    "admin-api@127.0." over "0.1") while REASON, free text, had room to give: every wrapped column took
    an equal share whatever its words."""
    headers = ["EVENT", "TIME (UTC)", "KIND", "VERSION", "ACTOR", "REASON", "DETAIL"]
    rows = [[3, "2026-12-05 21:29:45Z", "promote", 1, ACTOR, "better on the held-out set", GATES]]
    text = table(headers, rows, right=(0, 3), wrap_columns=(4, 5, 6), prose=(5,), width=width)
    lines = text.splitlines()
    assert all(cell_len(line) <= width for line in lines), text
    assert ACTOR in lines[1], text
    for token in ("parity:pass", "cautions:pass", "macro_f1:pass", "registered"):
        assert any(token in line.split() for line in lines), (token, text)


def test_a_word_that_must_be_split_is_split_after_an_escape_or_an_at_sign() -> None:
    """Only when nothing else fits is a word split, and then where it reads best (common practice for
    addresses): after the escape of a bidi override or the at sign of an actor, not one letter before."""
    assert wrap("my bike\u202eoverride is broken", 16) == ["my", "bike\\u202e", "override is", "broken"]
    assert wrap(ACTOR, 14) == ["admin-api@", "127.0.0.1"]
    assert wrap("unbroken" * 3, 10) == ["unbrokenun", "brokenunbr", "oken"]  # nothing to split after: as before


@pytest.mark.parametrize("width", [64, 70, 80, 100, 200])
def test_history_verdicts_versions_and_show_keep_actors_gate_results_and_escapes_whole(
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    width: int,
) -> None:
    """The fresh-eyes audit: at COLUMNS=80 history split the actor (`admin-api@12` / `7.0.0.1`), at 70
    its DETAIL `parity:pas` / `s`, and verdicts a text's `\\u202eoverri` / `de`, while other columns had
    room. Now every line fits, and a word is split only when no width would keep it whole, after its
    at sign or escape."""
    from textsieve.registry import open_registry

    r = ["--registry", str(tmp_path / "reg")]
    assert run(capsys, "publish", str(tiny_bundles["a"]), "--model", "helpdesk", "--actor", ACTOR, *r)[0] == 0
    promote = ["promote", "helpdesk", "1", "--to", "live", "--reason", "better on the held-out set"]
    assert run(capsys, *promote, "--actor", ACTOR, *r)[0] == 0
    with open_registry(tmp_path / "reg") as reg:
        for text in ("my bike\u202eoverride is broken", "charged twice for the same rental"):
            reg.verdicts.record(
                "helpdesk",
                1,
                text=text,
                predicted_label="repair",
                predicted_probability=0.8,
                verdict_label="repair",
                reviewer="Renée",
            )
    capsys.readouterr()
    monkeypatch.setenv("COLUMNS", str(width))
    outs = {}
    for verb in ("history", "versions", "verdicts", "show"):
        code, out, err = run(capsys, verb, "helpdesk", *r)
        assert code == 0 and (err == "" or verb == "versions"), (verb, err)  # versions' legend on stderr
        # verdicts' columns that never wrap and its headers take 66 columns before its text: below 72 it
        # overflows (as before), its text in the narrowest column a table makes (6).
        fits = verb != "verdicts" or width >= 72
        assert not fits or all(cell_len(line) <= width for line in out.splitlines()), (verb, out)
        outs[verb] = out.splitlines()
    history = outs["history"][: outs["history"].index("") if "" in outs["history"] else None]
    # DETAIL's gate results: whole from 70 columns (below, no width keeps every word whole)
    if width >= 70:
        detail = _column(history, "DETAIL")
        assert all(_whole(detail, t) for t in ("parity:pass", "cautions:pass", "macro_f1:pass")), history
    # The actor: whole from 80 columns; below, if split, after its at sign (and hyphen, in 9 columns).
    notes = [i for i, ln in enumerate(outs["versions"]) if ln.startswith("(")]  # the left-out note
    versions = outs["versions"][: notes[0] if notes else None]
    for lines, header in ((history, "ACTOR"), (versions, "BY")):
        cells = _column(lines, header)
        split_after_at = "127.0.0.1" in cells and any(c.endswith("api@") for c in cells)  # "admin-api@" or "api@"
        assert _whole(cells, ACTOR) or (width < 80 and split_after_at), lines
    # The bidi override's escape never split, and the word around it split only after it.
    verdicts = outs["verdicts"]
    assert all("\\u202" not in line or "\\u202e" in line for line in verdicts), verdicts
    text = [w for cell in _column(verdicts[: verdicts.index("")], "TEXT") for w in cell.split()]
    if width >= 72:  # where it fits (below, its text column is as narrow as the escape)
        assert "bike\\u202eoverride" in text or ("bike\\u202e" in text and "override" in text), verdicts
    assert ACTOR in "".join(outs["show"]), outs["show"]


def test_versions_marks_the_figures_measured_on_the_validation_split(
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    tiny_runs: dict[str, Path],
    tiny_data: Path,
) -> None:
    """Before: ACCURACY and MACRO-F1 showed one version's test-file figures beside another's validation
    figures (export without --test) with nothing to tell them apart; only `show` named the split."""
    from textsieve.exporter.export import export

    tested = tmp_path / "tested"
    export(tiny_runs["b"], tested, test=tiny_data / "test.jsonl", log=lambda *_: None)
    r = ["--registry", str(tmp_path / "reg")]
    for bundle in (tiny_bundles["a"], tested):
        assert run(capsys, "publish", str(bundle), "--model", "m", *r)[0] == 0
    capsys.readouterr()
    splits = {}
    for version in ("1", "2"):
        _, out, _ = run(capsys, "show", "m", version, *r)
        splits[version] = next(ln.split()[2] for ln in out.splitlines() if ln.startswith("held-out metrics"))
    assert splits == {"1": "validation,", "2": "test:test.jsonl,"}  # what the manifests say
    legend = (
        "* measured on the validation split (exported without --test), the others on the file given to export --test"
    )
    for width in (None, 80, 64):
        if width is None:
            monkeypatch.delenv("COLUMNS", raising=False)
        else:
            monkeypatch.setenv("COLUMNS", str(width))
        code, out, err = run(capsys, "versions", "m", *r)
        lines = out.splitlines()
        assert code == 0 and all(cell_len(line) <= (width or 999) for line in [*lines, *err.splitlines()]), out
        rows = {line.split()[0]: line.split() for line in lines[1:] if line[:7].strip().isdigit()}
        f1 = lines[0].split().index("MACRO-F1")
        assert rows["1"][f1].endswith("*") and not rows["2"][f1].endswith("*"), out
        # The legend on stderr, as history's note: piped, stdout stays the table's rows.
        assert " ".join(err.split()) == legend, err
