"""The drift-count queries, for both backends, run inside a caller's transaction.

A flush is one INSERT (a row per replica and flush, never an UPDATE, so replicas never wait on one
another's rows); reading a window walks a version's rows newest first until they hold the window's
texts, and pruning deletes the rows older than that, which no window of this size can reach again.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from textsieve.registry._db import Tx
from textsieve.registry.drift import StoredWindow, decode_counts, encode_counts, newest_rows


class DriftQueries:
    def __init__(self, tx: Tx) -> None:
        self.tx = tx

    def add(self, model: str, version: int, replica: str, at: str, texts: int, counts: NDArray[np.int64]) -> None:
        self.tx.run(
            "INSERT INTO drift_counts (model, version, replica, flushed_at, texts, counts) VALUES (?, ?, ?, ?, ?, ?)",
            (model, version, replica, at, texts, encode_counts(counts)),
        )

    def window(self, model: str, version: int, window_texts: int, size: int) -> StoredWindow:
        """The sum of the newest rows of (``model``, ``version``) holding at least ``window_texts`` texts.

        Rows whose vector is not ``size`` long (another layout of the same version cannot happen,
        but a hand-edited row can) are left out rather than added to bins they do not match."""
        total = np.zeros(size, dtype=np.int64)
        texts = rows = 0
        for r in self.tx.all(
            "SELECT texts, counts FROM drift_counts WHERE model = ? AND version = ? ORDER BY id DESC", (model, version)
        ):
            counts = decode_counts(str(r["counts"]))
            if len(counts) != size:
                continue
            total += counts
            texts += int(r["texts"])
            rows += 1
            if texts >= window_texts:
                break
        return StoredWindow(texts, total, rows)

    def prune(self, model: str, version: int, window_texts: int) -> int:
        """Delete the rows of (``model``, ``version``) older than its newest ``window_texts`` texts."""
        found = self.tx.all(
            "SELECT id, texts FROM drift_counts WHERE model = ? AND version = ? ORDER BY id DESC", (model, version)
        )
        keep = newest_rows([int(r["texts"]) for r in found], window_texts)
        if keep >= len(found):
            return 0
        return self.tx.run(
            "DELETE FROM drift_counts WHERE model = ? AND version = ? AND id < ?",
            (model, version, found[keep - 1]["id"]),
        )


__all__ = ["DriftQueries"]
