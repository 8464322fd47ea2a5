"""One JSON array read an item at a time, in bounded memory, with ``json``'s own verdict on each item.

``json.load`` parses a document only whole: a 50 MB array of labelled rows was held as its bytes, as
its text and as a list of dicts before the first row became an example. Here the file is decoded a
chunk at a time into a sliding window of text, the array's brackets and commas are read here, and
each item is handed to ``json.JSONDecoder.raw_decode``, so an item is exactly what ``json.load``
would have made of it. Memory is the item being read plus a chunk (a single item longer than a chunk
is read in doubling chunks, so it costs as a whole file would).

A decoder given a window that stops inside an item cannot tell "this is wrong" from "the rest has not
been read": ``[12`` cut after ``1`` reads as the number 1, ``"ab`` as an unterminated string, ``tr`` as
no value. So a result counts only when the decoder's end (or the error's position) lies more than
:data:`_LOOKAHEAD` characters before the window's end, or the file has ended; otherwise more is read
and the item decoded again. An unterminated string is only ever settled by the end of the file.
Errors name the line and column ``json.loads`` of the whole text would name, with its message.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable, Iterator
from typing import Any, BinaryIO

CHUNK_BYTES = 1 << 16
# The furthest the standard library's scanner looks past where it stops or fails: a number's
# exponent ("1e+" then a digit), a \uXXXX escape, "-Infinity" (9 characters); 16 leaves room.
_LOOKAHEAD = 16
_WHITESPACE = re.compile(r"[ \t\n\r]*")  # JSON's four (RFC 8259 §2), as the json module skips them
_BOM = "\ufeff"


class ArraySyntaxError(ValueError):
    """The text is not one JSON array: ``json``'s message, at the line and column it would give."""

    def __init__(self, msg: str, lineno: int, colno: int) -> None:
        super().__init__(f"{msg}: line {lineno} column {colno}")
        self.msg = msg
        self.lineno = lineno
        self.colno = colno


class ArrayEncodingError(ValueError):
    """A byte that is not UTF-8: its line, its offset in the file and its value."""

    def __init__(self, line: int, offset: int, byte: int) -> None:
        super().__init__(f"line {line}: byte offset {offset} is not valid UTF-8 (byte 0x{byte:02x})")
        self.line = line
        self.offset = offset
        self.byte = byte


class _Window:
    """The file's text from some point on (``text``), read on demand, with what is needed to name a
    line and column of the whole text after the part before it was dropped."""

    def __init__(self, file: BinaryIO, progress: Callable[[int], None] | None, chunk_bytes: int) -> None:
        self.file = file
        self.progress = progress
        self.chunk_bytes = chunk_bytes
        self.text = ""
        self.ended = False
        self._pending = b""  # the start of a UTF-8 sequence a chunk cut in two
        self._offset = 0  # bytes decoded before _pending
        self._byte_lines = 0  # newlines in them
        self._lines = 0  # newlines in the text dropped from the window
        self._column = 0  # characters after the last dropped newline
        self._started = False

    def read(self, keep: int, size: int) -> None:
        """Drop the text before ``keep`` and append at least one character, or mark the end."""
        dropped = self.text[:keep]
        newlines = dropped.count("\n")
        if newlines:
            self._lines += newlines
            self._column = len(dropped) - dropped.rfind("\n") - 1
        else:
            self._column += len(dropped)
        self.text = self.text[keep:]
        while not self.ended:
            raw = self.file.read(size)
            if self.progress is not None and raw:
                self.progress(len(raw))
            if self._decode(raw):
                return

    def _decode(self, raw: bytes) -> bool:
        """Append ``raw``'s text; whether any was appended (False at the end of the file, which ends it)."""
        data = self._pending + raw
        if not raw:
            self.ended = True
            if data:  # the file ends inside a UTF-8 sequence
                raise self._not_utf8(data, 0)
            return False
        try:
            text = data.decode("utf-8")
            self._pending = b""
        except UnicodeDecodeError as exc:
            if exc.reason != "unexpected end of data" or exc.end != len(data):
                raise self._not_utf8(data, exc.start) from None
            text = data[: exc.start].decode("utf-8")
            self._pending = data[exc.start :]
        done = len(data) - len(self._pending)
        self._byte_lines += data.count(b"\n", 0, done)
        self._offset += done
        if not self._started and text:
            self._started = True
            text = text.removeprefix(_BOM)  # as labelled files are read everywhere
        self.text += text
        return bool(text)

    def _not_utf8(self, data: bytes, at: int) -> ArrayEncodingError:
        return ArrayEncodingError(self._byte_lines + data.count(b"\n", 0, at) + 1, self._offset + at, data[at])

    def skip(self, at: int) -> int:
        """The index of the first character from ``at`` on that is not whitespace, reading on as needed
        (the window's length at the end of the file)."""
        while True:
            at = _WHITESPACE.match(self.text, at).end()  # type: ignore[union-attr]  # * always matches
            if at < len(self.text) or self.ended:
                return at
            self.read(at, self.chunk_bytes)
            at = 0

    def char(self, at: int) -> str:
        return self.text[at] if at < len(self.text) else ""

    def error(self, msg: str, at: int) -> ArraySyntaxError:
        lineno = self._lines + self.text.count("\n", 0, at) + 1
        last = self.text.rfind("\n", 0, at)
        colno = at - last if last != -1 else self._column + at + 1
        return ArraySyntaxError(msg, lineno, colno)


def items(
    file: BinaryIO, *, progress: Callable[[int], None] | None = None, chunk_bytes: int = CHUNK_BYTES
) -> Iterator[Any]:
    """Each item of the JSON array that is the whole of ``file`` (UTF-8, a byte-order mark skipped), as
    ``json.load`` would give it, one at a time. ``progress`` is called with the bytes of each chunk read.
    Raises :class:`ArraySyntaxError` or :class:`ArrayEncodingError` where the text goes wrong; the
    items before it have been yielded."""
    window = _Window(file, progress, chunk_bytes)
    decoder = json.JSONDecoder()
    at = window.skip(0)
    if window.char(at) != "[":
        raise window.error("Expecting '['", at)
    at = window.skip(at + 1)
    if window.char(at) != "]":
        while True:
            at, item = _item(window, decoder, at)
            yield item
            at = window.skip(at)
            mark = window.char(at)
            if mark == "]":
                break
            if mark != ",":
                raise window.error("Expecting ',' delimiter", at)
            at = window.skip(at + 1)
    at = window.skip(at + 1)
    if at < len(window.text):
        raise window.error("Extra data", at)


def _item(window: _Window, decoder: json.JSONDecoder, at: int) -> tuple[int, Any]:
    """(where it ends, the item) of the item starting at ``at``, reading on until the decoder's verdict
    cannot depend on text not read yet."""
    size = window.chunk_bytes
    while True:
        text = window.text
        try:
            item, end = decoder.raw_decode(text, at)
        except json.JSONDecodeError as exc:
            settled = exc.pos + _LOOKAHEAD < len(text) and not exc.msg.startswith("Unterminated string")
            if settled or window.ended:
                raise window.error(exc.msg, exc.pos) from None
        except RecursionError:
            raise window.error("Arrays and objects nested too deeply", at) from None
        else:
            if end + _LOOKAHEAD < len(text) or window.ended:
                return end, item
        window.read(at, size)
        at = 0
        size *= 2  # an item longer than a chunk: read it in doubling chunks, not a decode per chunk


__all__ = ["CHUNK_BYTES", "ArrayEncodingError", "ArraySyntaxError", "items"]
