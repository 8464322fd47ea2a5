"""The CLI's plain-text tables: cells made safe for a terminal, measured in terminal columns, and free-text
columns wrapped to the terminal's width.

Every verb that prints a table goes through :func:`table` (the registry verbs, ``shadow``, ``evaluate``,
``predict``), and the command's error line through :func:`one_line`, so what a table can hold is decided
here once:

- **Safe cells.** Reasons, labels, reviewer names and texts sent by clients are stored as written. A line
  break or tab would split a row; a C0 or C1 control character (ECMA-48: ESC starting a sequence that
  clears the screen or recolours what follows, BEL, CSI) would act on the operator's terminal; a bidi
  override (Unicode UAX #9) would reorder the rest of the line; a zero-width space, soft hyphen, private-use
  or unassigned character would show nothing a reader can name, so "re\\u200bfund" would pass for "refund"
  (what ``textsieve/printable.py`` keeps out of labels and names; ZWNJ and ZWJ between visible characters
  stay). Line breaks are shown as ↵, a tab as a space, every other such character as a visible escape
  (``\\x1b``, ``\\u202e``, ``\\u200b``).
- **Widths** are terminal columns, not code points: East Asian Wide and Fullwidth characters take two,
  combining marks and zero-width format characters none (Unicode UAX #11), so CJK text stays aligned.
- **Wrapping.** A table wider than the terminal wraps the columns its verb names as free text, at spaces
  or after a comma, semicolon, slash or bar where it can (never the comma in ``1,000``), within words
  where it must. Each wrapped column keeps at least its longest word while the width allows it (an
  actor ``admin-api@127.0.0.1``, a gate's ``parity:pass``), the verb's prose columns giving way first;
  a word that must be split is split after an escape, an at sign or a colon where it has one. Numbers
  and states are never split, and times only at their space (date over time)
  when the free text alone cannot make the table fit. Nothing is cut: the whole text stays in the table.
  A verb may name columns to leave out (in its order) when even that would split words or overflow; the
  table then ends with a line naming them and where they are shown.
- **Where the width comes from.** ``COLUMNS`` when set (``shutil.get_terminal_size`` honours it), else
  the terminal's own width when the output is a terminal. Output that is not a terminal (a pipe, a
  file) with no ``COLUMNS`` is not wrapped: each row stays one line holding its whole text, so
  ``grep``, ``sort`` and ``awk`` see one record a line, and a pager can scroll sideways.
"""

from __future__ import annotations

import os
import re
import shutil
import sys
import unicodedata
from collections.abc import Sequence
from typing import Literal, TextIO

from textsieve.printable import JOINERS, REFUSED_CATEGORIES

NONE = "-"
# A wrapped column is never made narrower than this (or its header): narrower, a reason reads as a
# column of syllables, and a line slightly wider than the terminal is the lesser harm.
MIN_WRAPPED = 12
# ... unless the terminal is too narrow for that; never below a BMP escape (``\u202e``), nor below the
# widest escape its cells hold (``\U000f0000``, which a wrap keeps whole on its own line).
MIN_NARROW = 6
# A terminal that reports no size (0 columns: some containers' pseudo-terminals) is taken as the
# classic 80 (common practice).
DEFAULT_COLUMNS = 80

# Bidirectional formatting characters (Unicode UAX #9, section 2): they reorder what follows them on the line.
_BIDI = frozenset("\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069")
# Where a word may end a wrapped line besides a space: after list separators (common practice).
_AFTER = frozenset(",;/|")
_BREAKS = {"\r\n", "\n", "\r", "\x0b", "\x0c", "\x85", "\u2028", "\u2029"}


def _escape(c: str) -> str:
    n = ord(c)
    return f"\\x{n:02x}" if n < 0x100 else f"\\u{n:04x}" if n < 0x10000 else f"\\U{n:08x}"


def _unsafe(c: str) -> bool:
    """A character a terminal acts on instead of showing, or that shows nothing a reader can name: C0 and
    C1 controls (ECMA-48, category Cc), line and paragraph separators, lone surrogates (bytes that were
    not UTF-8, which cannot even be written to a UTF-8 stream), and what a label may not hold
    (``textsieve/printable.py``): format characters (Cf: bidi controls, U+200B ZERO WIDTH SPACE, U+00AD
    SOFT HYPHEN), private use (Co) and unassigned code points (Cn)."""
    return c in _BIDI or unicodedata.category(c) in REFUSED_CATEGORIES


def _joining(text: str, at: int) -> bool:
    """Whether ``text[at]`` is a ZWNJ or ZWJ between two visible characters, which a label may hold
    (``textsieve/printable.py``: Persian and Indic words, emoji sequences) and is shown as it is."""
    if text[at] not in JOINERS or at == 0 or at + 1 >= len(text):
        return False
    return not any(c.isspace() or unicodedata.category(c) == "Cf" for c in (text[at - 1], text[at + 1]))


def _units(text: str, start: int = 0, end: int | None = None) -> list[tuple[str, int]]:
    """``text[start:end]`` as the pieces a terminal shows, each with the columns it takes: a character with
    the combining marks after it, a line break as ↵, any other unsafe character as its escape. A joiner is
    judged by its neighbours in the whole ``text``, also at the ends of the part."""
    units: list[tuple[str, int]] = []
    end = len(text) if end is None else end
    i = start
    while i < end:
        c = text[i]
        pair = text[i : min(i + 2, end)]
        if pair == "\r\n" or c in _BREAKS:
            units += [(" ", 1), ("↵", 1), (" ", 1)]
            i += 2 if pair == "\r\n" else 1
            continue
        i += 1
        if c == "\t":
            units.append((" ", 1))
        elif _unsafe(c) and not _joining(text, i - 1):
            shown = _escape(c)
            units.append((shown, len(shown)))
        elif units and _zero_width(c) and units[-1][0] not in (" ", "↵"):
            units[-1] = (units[-1][0] + c, units[-1][1])
        else:
            units.append((c, _char_columns(c)))
    return units


def _zero_width(c: str) -> bool:
    return unicodedata.combining(c) != 0 or unicodedata.category(c) in ("Mn", "Me", "Cf")


def _char_columns(c: str) -> int:
    if _zero_width(c):
        return 0
    return 2 if unicodedata.east_asian_width(c) in ("W", "F") else 1


def one_line(text: str) -> str:
    """``text`` on one line and harmless to a terminal (line breaks as ↵, tabs as spaces, other control,
    separator, format, private-use and unassigned characters as escapes, joiners in words kept)."""
    if text.isprintable():  # no Cc, Cf, Cs, Zl, Zp: nothing to replace
        return text
    return "".join(u for u, _ in _units(text))


def one_line_part(text: str, start: int, end: int) -> str:
    """``text[start:end]`` as :func:`one_line` shows it within the whole ``text``: a ZWNJ or ZWJ at an end of
    the part stays when it joins two visible characters of ``text`` (a span's edge inside a Persian word or
    an emoji sequence), where ``one_line(text[start:end])`` would see it leading or trailing."""
    return "".join(u for u, _ in _units(text, start, end))


def clip(text: str, limit: int) -> str:
    """``text`` as :func:`one_line` shows it, cut to at most ``limit`` columns with "…" when longer: between
    whole pieces, never inside an escape (``\\u202e``) nor between a character and its combining marks."""
    units = _units(text)
    if sum(w for _, w in units) <= limit:
        return "".join(u for u, _ in units)
    kept, used = [], 0
    for piece, w in units:
        if used + w > limit - 1:
            break
        kept.append(piece)
        used += w
    return "".join(kept).rstrip(" ") + "…"


def columns(text: str) -> int:
    """The terminal columns ``text`` (already made safe by :func:`one_line`) takes (Unicode UAX #11)."""
    if text.isascii():
        return len(text)
    return sum(_char_columns(c) for c in text)


def terminal_width(stream: TextIO | None = None) -> int | None:
    """The width to fit tables to, or None for no limit: ``COLUMNS`` when it holds a positive number,
    else the width of ``stream`` (stdout) when it is a terminal; output to a pipe or file is not fitted."""
    stream = stream or sys.stdout
    env = os.environ.get("COLUMNS", "").strip()
    if env.isdigit() and int(env) > 0:
        return shutil.get_terminal_size().columns  # reads COLUMNS itself
    try:
        if not stream.isatty():
            return None
        width = os.get_terminal_size(stream.fileno()).columns
    except (AttributeError, ValueError, OSError):  # a stream with no file behind it (captured output)
        return None
    return width or DEFAULT_COLUMNS


def wrap(text: str, width: int) -> list[str]:
    """``text`` made safe and broken into lines of at most ``width`` columns: at spaces or after a comma,
    semicolon, slash or bar, and inside a word only when the word alone is wider, then after an escape,
    an at sign or a colon where it can (see _SPLIT_AFTER; an escape such as ``\\x1b`` is never split)."""
    lines: list[list[tuple[str, int]]] = []
    line: list[tuple[str, int]] = []
    used = 0
    for unit in _units(text):
        piece, w = unit
        if piece == " " and not line:
            continue  # a wrapped line does not start with the space it broke at
        if used + w > width and line:
            if piece == " ":
                lines.append(line)
                line, used = [], 0
                continue
            cut = max((i for i in range(len(line)) if _breaks_after(line, i, piece)), default=-1)
            if cut >= 0 and line[cut][0] == " ":
                lines.append(line[:cut])
                line = line[cut + 1 :]
            elif cut >= 0:  # after a comma or the like of a list with no spaces ("account,billing,praise")
                lines.append(line[: cut + 1])
                line = line[cut + 1 :]
            elif (soft := _split_point(line)) >= 0:  # a word wider than the column: split where it reads best
                lines.append(line[: soft + 1])
                line = line[soft + 1 :]
            else:
                lines.append(line)
                line = []
            used = sum(uw for _, uw in line)
            if used + w > width and line:
                lines.append(line)
                line, used = [], 0
        line.append(unit)
        used += w
    if line or not lines:
        lines.append(line)
    return ["".join(p for p, _ in ln).rstrip(" ") for ln in lines]


# Where a word wider than its column is split when it must be, best first (common practice, as in URLs
# and addresses): after an escape (``bike\\u202e`` over ``override``), an at sign or a colon
# (``admin-api@`` over ``127.0.0.1``, ``parity:`` over ``pass``); else after a hyphen, underscore, equals
# sign or dot; else wherever the column ends.
_SPLIT_AFTER = (frozenset("@:"), frozenset("-_=."))


def _split_point(line: list[tuple[str, int]]) -> int:
    """The unit of ``line`` (the start of a word too wide for its column) after which to split it, or -1."""
    for marks in _SPLIT_AFTER:
        at = [i for i, (p, _) in enumerate(line) if p in marks or (marks is _SPLIT_AFTER[0] and _is_escape(p))]
        if at:
            return at[-1]
    return -1


def _is_escape(piece: str) -> bool:
    return len(piece) > 1 and piece.startswith("\\")


def _breaks_after(line: list[tuple[str, int]], i: int, following: str) -> bool:
    """Whether a wrapped line may end after unit ``i``: at a space, or after a list separator, but not
    after the comma of a number's thousands (``1,000,000``: numbers are never split)."""
    piece = line[i][0]
    if piece == " ":
        return True
    if piece not in _AFTER:
        return False
    after = line[i + 1][0] if i + 1 < len(line) else following
    return not (piece == "," and i > 0 and line[i - 1][0][-1:].isdigit() and after[:1].isdigit())


Width = int | None | Literal["terminal"]


def table(
    headers: Sequence[str],
    rows: Sequence[Sequence[object]],
    *,
    right: Sequence[int] = (),
    wrap_columns: Sequence[int] = (),
    prose: Sequence[int] = (),
    width: Width = "terminal",
    optional: Sequence[int] = (),
    shown_by: str = "",
) -> str:
    """Columns padded to their widest cell, two spaces apart; ``right`` lists right-aligned columns.

    ``wrap_columns`` lists the columns that may wrap: when the table is wider than ``width`` (the
    terminal's, see :func:`terminal_width`; None: no limit), they are narrowed, the widest first, and
    their cells wrapped onto more lines of the same row, never narrower than their longest word while
    the width allows it (see :func:`_fit`); of them, ``prose`` lists those holding sentences people
    typed, whose words are split first when some must be. When that is not enough, columns of times
    (``2026-12-05 01:32:30Z``) fold at their space, the date over the time, and the free text is
    fitted again to the room that leaves. When even that is not enough, the ``optional`` columns are
    left out, in the order given, until the table fits, and a last line names them and where they
    are shown (``shown_by``): a line wider than the terminal wraps and breaks every row's alignment."""
    limit = terminal_width() if width == "terminal" else width
    keep = list(range(len(headers)))
    text, split = _table(headers, rows, keep, right, (wrap_columns, prose), limit)
    left_out: list[str] = []
    for i in optional:
        # A column less reads better than words cut in two ("accoun" over "t,"), and far better than
        # lines that wrap on the terminal.
        if limit is None or (not split and max(columns(line) for line in text.splitlines()) <= limit):
            break
        keep.remove(i)
        left_out.append(str(headers[i]))
        text, split = _table(headers, rows, keep, right, (wrap_columns, prose), limit)
    if not left_out or limit is None:
        return text
    note = f"({', '.join(left_out)} left out to fit {limit} columns{'; ' + shown_by if shown_by else ''})"
    return text + "\n" + "\n".join(wrap(note, limit))


def _table(
    all_headers: Sequence[str],
    all_rows: Sequence[Sequence[object]],
    keep: list[int],
    all_right: Sequence[int],
    all_wrap: tuple[Sequence[int], Sequence[int]],
    limit: int | None,
) -> tuple[str, bool]:
    """:func:`table` of the columns in ``keep``, and whether it had to split a word to fit."""
    headers = [all_headers[i] for i in keep]
    rows = [[row[i] for i in keep] for row in all_rows]
    right = [keep.index(i) for i in all_right if i in keep]
    wrap_columns = [keep.index(i) for i in all_wrap[0] if i in keep]
    prose = [keep.index(i) for i in all_wrap[1] if i in keep]
    raw = [[str(h) for h in headers]] + [[NONE if c is None else str(c) for c in row] for row in rows]
    natural = [max(columns(one_line(row[i])) for row in raw) for i in range(len(headers))]
    words = {i: max(_longest_word(row[i]) for row in raw[1:]) if len(raw) > 1 else 0 for i in wrap_columns}
    # A wrapped column is never narrower than its widest escape (``\U000f0000``, 10 columns), which wrap()
    # keeps whole: narrower, the escape would push the columns after it out of line.
    least = [max([columns(one_line(h)), *(_widest_unit(row[i]) for row in raw[1:])]) for i, h in enumerate(raw[0])]
    widths = _fit(natural, least, wrap_columns, limit, words=words, roomy_only=True)
    folding = _time_columns(raw[1:]) if limit is not None and _total(widths) > limit else []
    narrowed = list(natural)
    for i in folding:
        narrowed[i] = max(least[i], *(columns(p) for row in raw[1:] for p in row[i].split(" ")))
    if limit is not None and _total(widths) > limit:
        widths = _fit(narrowed, least, wrap_columns, limit, words=words, prose=prose)
    wrapped = set(wrap_columns) | set(folding)
    lines = []
    for row in raw:
        cells = [
            wrap(c, widths[i]) if i in wrapped and widths[i] < natural[i] else [one_line(c)] for i, c in enumerate(row)
        ]
        for k in range(max(len(c) for c in cells)):
            parts = []
            for i, (cell, w) in enumerate(zip(cells, widths, strict=True)):
                text = cell[k] if k < len(cell) else ""
                pad = " " * (w - columns(text))
                parts.append(pad + text if i in right else text + pad)
            lines.append("  ".join(parts).rstrip())
    split = any(widths[i] < natural[i] and widths[i] < words[i] for i in wrap_columns)
    return "\n".join(lines), split


_TIME = re.compile(r"\d{4}-\d\d-\d\d \d\d:\d\d(:\d\d)?Z")


def _time_columns(rows: list[list[str]]) -> list[int]:
    """The columns whose every cell is a time as the CLI shows it (or NONE), with at least one time."""
    if not rows:
        return []
    return [
        i
        for i in range(len(rows[0]))
        if all(row[i] == NONE or _TIME.fullmatch(row[i]) for row in rows) and any(row[i] != NONE for row in rows)
    ]


_WORD_ENDS = re.compile(r" |(?<=[;/|])|(?<=,)(?<!\d,)|(?<=,)(?!\d)")  # as _breaks_after


def _longest_word(text: str) -> int:
    """The columns of the widest piece :func:`wrap` never splits when it has room: a word, or a list
    item with its separator (``account,``)."""
    return max(columns(w) for w in _WORD_ENDS.split(one_line(text)))


def _widest_unit(text: str) -> int:
    """The columns of the widest piece :func:`wrap` never splits, even where a word must be: an escape or a
    wide character."""
    if text.isascii() and text.isprintable():
        return min(len(text), 1)
    return max((w for _, w in _units(text)), default=0)


def _total(widths: list[int]) -> int:
    return sum(widths) + 2 * (len(widths) - 1)


def _fit(
    natural: list[int],
    least: list[int],
    wrap_columns: Sequence[int],
    limit: int | None,
    *,
    words: dict[int, int],
    prose: Sequence[int] = (),
    roomy_only: bool = False,
) -> list[int]:
    """Column widths within ``limit``: the wrapped columns share what the others leave, each at least the
    floor of the first of these ways that fits, and all widened together above their floors (a column
    stops at its natural width, the rest shared again among the wider ones):

    1. each at least its longest word and :data:`MIN_WRAPPED` (narrower, a reason reads as a column of
       syllables); ``roomy_only`` stops here (the caller then folds its times and asks again);
    2. each at least its longest word, so that no word is split: an actor (``admin-api@127.0.0.1``), a
       gate's ``parity:pass``, a word holding an escape;
    3. the words of one column after another may be split: first the ``prose`` columns (sentences people
       typed, which read on across a split), then the others, the widest word first; a column whose
       words may be split is never narrower than its header, its widest escape and :data:`MIN_NARROW`.

    When none fits, words up to :data:`MIN_WRAPPED` are kept whole: splitting them would not stop the line
    from overflowing."""
    total = _total(natural)
    if limit is None or total <= limit or not wrap_columns:
        return natural
    free = list(dict.fromkeys(wrap_columns))
    budget = limit - (total - sum(natural[i] for i in free))
    whole = {i: min(natural[i], max(least[i], words.get(i, 0))) for i in free}
    tiers = [{i: max(whole[i], min(natural[i], MIN_WRAPPED)) for i in free}]
    if not roomy_only:
        tiers.append(whole)
        giving = [i for i in free if i in prose] + sorted((i for i in free if i not in prose), key=lambda i: -whole[i])
        floors = dict(whole)
        for i in giving:
            floors = {**floors, i: min(whole[i], max(least[i], MIN_NARROW))}
            tiers.append(floors)
    for floors in tiers:
        if sum(floors.values()) <= budget:
            # A column whose words must be split that is not prose gets the spare room first, up to its
            # longest word: "admin-api@" over "127.0.0.1" rather than "admin-ap" over "i@127.0." over "0.1".
            short = {i: f for i, f in floors.items() if i not in prose and f < whole[i]}
            if short:
                capped = [min(n, whole.get(i, n)) for i, n in enumerate(natural)]
                raised = _widen(capped, short, budget - sum(floors.values()) + sum(short.values()))
                floors = {**floors, **{i: raised[i] for i in short}}
            return _widen(natural, floors, budget)
    if roomy_only:
        return _widen(natural, tiers[0], 0)
    return _widen(natural, {i: min(whole[i], max(least[i], MIN_WRAPPED)) for i in free}, 0)


def _widen(natural: list[int], floors: dict[int, int], budget: int) -> list[int]:
    """``natural`` with each column of ``floors`` at the highest common level (never below its floor, never
    above its natural width) that keeps their sum within ``budget``; spare columns go to the widest."""

    def at(level: int, i: int) -> int:
        return min(natural[i], max(floors[i], level))

    level = 0
    while level < max(natural[i] for i in floors) and sum(at(level + 1, i) for i in floors) <= budget:
        level += 1
    widths = list(natural)
    for i in floors:
        widths[i] = at(level, i)
    spare = budget - sum(widths[i] for i in floors)
    for i in sorted(floors, key=lambda i: -natural[i]):
        if spare > 0 and floors[i] <= level < natural[i]:
            widths[i] += 1
            spare -= 1
    return widths


def note(text: str, *, width: Width = "terminal") -> str:
    """A line said after a table, wrapped to the terminal as the table's own notes are (whole when piped)."""
    limit = terminal_width() if width == "terminal" else width
    return one_line(text) if limit is None else "\n".join(wrap(text, limit))


# A value moved under its key (see key_values) is indented this much when that still fits.
BELOW_INDENT = 2


def key_values(rows: Sequence[tuple[str, object]], *, width: Width = "terminal") -> str:
    """``key  value`` lines, keys padded to the longest; a long value wraps under its own start.

    A value with no space in it (a sha256, a path) that would be split beside its key goes on the line
    below the key instead, indented when that fits, whole: a digest cut in two cannot be copied or
    compared. With room beside the key, or with no width to fit, it stays there. Only a value wider than
    the terminal itself is split, as a table splits a word wider than its column: in equal pieces (a
    sha256 in two halves of 32 below 64 columns), one under the other."""
    limit = terminal_width() if width == "terminal" else width
    shown = [(one_line(str(k)), NONE if v is None else str(v)) for k, v in rows]
    key_width = max((columns(k) for k, _ in shown), default=0)
    lines: list[str] = []
    run: list[tuple[str, object]] = []
    for key, value in shown:
        alone = one_line(value)
        if limit is not None and " " not in alone and key_width + 2 + columns(alone) > limit:
            if run:
                lines += _key_value_lines(run, key_width, limit)
                run = []
            lines += [key, *_below(value, limit)]
        else:
            run.append((key, value))
    if run:
        lines += _key_value_lines(run, key_width, limit)
    return "\n".join(lines)


def _below(value: str, limit: int) -> list[str]:
    """The lines of a value with no space put below its key: whole, indented when that fits; else in equal
    pieces that fit (indented too when the terminal leaves room for a piece of at least MIN_WRAPPED)."""
    alone = one_line(value)
    if BELOW_INDENT + columns(alone) <= limit:
        return [" " * BELOW_INDENT + alone]
    if columns(alone) <= limit:
        return [alone]
    indent = BELOW_INDENT if limit - BELOW_INDENT >= MIN_WRAPPED else 0
    room = max(limit - indent, 1)
    pieces = -(-columns(alone) // room)
    return [" " * indent + line for line in wrap(value, -(-columns(alone) // pieces))]


def _key_value_lines(rows: list[tuple[str, object]], key_width: int, limit: int | None) -> list[str]:
    # Keys padded to the widest of all rows, so that values line up across the rows moved below.
    padded = [(key + " " * (key_width - columns(key)), value) for key, value in rows]
    return table(["", ""], padded, wrap_columns=(1,), width=limit).split("\n")[1:]


__all__ = [
    "NONE",
    "clip",
    "columns",
    "key_values",
    "note",
    "one_line",
    "one_line_part",
    "table",
    "terminal_width",
    "wrap",
]
