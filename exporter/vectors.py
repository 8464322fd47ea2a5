"""Pretrained word vectors in the GloVe / word2vec text format, read for one vocabulary only.

Format: an optional word2vec header line ``count dim``, then one ``word v1 ... vD`` per line. A row
whose word holds spaces (more than D fields, the extra ones not numbers) is skipped: no token holds
a space.
The file is streamed line by line and only rows whose word is in the vocabulary are parsed,
so a multi-gigabyte file costs memory only for the vectors actually used. Kept free of torch.
"""

from __future__ import annotations

import gzip
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, cast

import numpy as np

from textsieve.errors import InputError
from textsieve.registry.tokenizer import Tokenizer, Vocabulary

_FORMAT = "expected the GloVe/word2vec text format: one 'word v1 ... vD' a line, optional 'count dim' header"


@dataclass(frozen=True)
class PretrainedVectors:
    """Rows for the vocabulary ids that had a vector: ``matrix[i]`` belongs to ``ids[i]``."""

    ids: np.ndarray  # int64 [found]
    matrix: np.ndarray  # float32 [found, dim]
    dim: int

    @property
    def found(self) -> int:
        return int(self.ids.shape[0])


def load_vectors(path: Path, vocabulary: Vocabulary, *, tokenizer: Tokenizer | None = None) -> PretrainedVectors:
    """Vectors for the vocabulary's tokens; file words are normalised as the tokenizer does."""
    path = Path(path)
    if path.suffix.lower() == ".bin" or path.name.lower().endswith(".bin.gz"):
        raise InputError(f"{path}: binary word2vec files are not supported; {_FORMAT}")
    normalize = (tokenizer or Tokenizer()).normalize
    index = vocabulary.index
    # Padding stays zero and the unknown token stays random, whatever the file holds for them.
    reserved = {vocabulary.pad_id, vocabulary.unk_id}
    ids: list[int] = []
    rows: list[np.ndarray] = []
    seen: set[int] = set()
    dim: int | None = None
    for number, line in _lines(path):
        parts = line.rstrip().split(" ")
        if number == 1 and len(parts) == 2 and parts[0].isdigit() and parts[1].isdigit():
            dim = int(parts[1])  # word2vec header: "count dim"
            if dim < 1:
                raise InputError(f"{path}: line 1: header says dimension {dim}; it must be at least 1")
            continue
        if not parts[0]:
            if not line.strip():
                continue  # blank lines (e.g. a trailing newline too many) carry nothing
            raise InputError(f"{path}: line {number}: starts with a space; {_FORMAT}")
        values = len(parts) - 1
        if dim is None:
            if values < 1:
                raise InputError(f"{path}: line {number}: has a word but no values; {_FORMAT}")
            dim = values
        elif values > dim and not any(map(_is_float, parts[1 : values - dim + 1])):
            # A "word" holding spaces (". . .", "at name@domain.com": a few rows of the large Common
            # Crawl GloVe files, from memory): never one token, as the tokenizer splits at spaces.
            continue
        elif values != dim:
            raise InputError(
                f"{path}: line {number}: has {values} values, expected {dim} (every row must have the same dimension)"
            )
        token_id = index.get(normalize(parts[0]))
        # The first row wins when several spellings normalise alike ("Apple", "apple"):
        # these files list frequent words first, so that is the best-estimated vector.
        if token_id is None or token_id in reserved or token_id in seen:
            continue
        try:
            row = np.array([float(v) for v in parts[1:]], dtype=np.float32)
        except ValueError:
            bad = next(v for v in parts[1:] if not _is_float(v))
            raise InputError(f"{path}: line {number}: value {bad[:40]!r} is not a number; {_FORMAT}") from None
        if not np.isfinite(row).all():
            raise InputError(
                f"{path}: line {number}: has a value that is not finite (nan or inf); vectors must be finite numbers"
            )
        seen.add(token_id)
        ids.append(token_id)
        rows.append(row)
    if dim is None:
        raise InputError(f"{path}: the file has no vectors; {_FORMAT}")
    matrix = np.stack(rows) if rows else np.zeros((0, dim), dtype=np.float32)
    return PretrainedVectors(np.array(ids, dtype=np.int64), matrix, dim)


def _is_float(value: str) -> bool:
    try:
        float(value)
    except ValueError:
        return False
    return True


def _open(path: Path) -> IO[bytes]:
    try:
        if path.suffix.lower() == ".gz":
            return cast(IO[bytes], gzip.open(path, "rb"))
        return open(path, "rb")
    except FileNotFoundError:
        raise InputError(f"{path}: no such file; --vectors must name a pretrained vectors file") from None
    except IsADirectoryError:
        raise InputError(f"{path}: is a folder; --vectors must name a pretrained vectors file") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc


def _lines(path: Path) -> Iterator[tuple[int, str]]:
    """(line number, text) pairs, decoding as UTF-8 one line at a time."""
    offset = 0
    try:
        with _open(path) as fh:
            for number, raw in enumerate(fh, start=1):
                try:
                    line = raw.decode("utf-8")
                except UnicodeDecodeError as exc:
                    raise InputError(
                        f"{path}: line {number}: byte offset {offset + exc.start} is not valid "
                        f"UTF-8 (byte 0x{raw[exc.start]:02x}); {_FORMAT}, saved as UTF-8"
                    ) from None
                if number == 1 and line.startswith("\ufeff"):
                    line = line[1:]
                offset += len(raw)
                yield number, line
    except (OSError, EOFError, gzip.BadGzipFile) as exc:
        raise InputError(f"{path}: cannot be read ({exc})") from exc


__all__ = ["PretrainedVectors", "load_vectors"]
