"""The drift-count queries, for both backends, run inside a caller's transaction.

A flush is one INSERT (a row per replica and flush, never an UPDATE, so replicas never wait on one
another's rows), which records the writer's window size; reading a window walks a version's rows
newest first until they hold the window's texts. Pruning deletes the rows older than the newest
texts of the *largest* window size declared: the writer's own, or any a row of the version still
stored declares. Replicas set to different ``TEXTSIEVE_DRIFT_WINDOW_TEXTS`` used to prune by their
own sizes, so the smallest deleted the rows every larger window read. A size stops counting once
its last row falls out of the largest window (the replica that declared it was set again, or is
gone), so the table shrinks back by itself. Rows from before ``0010_drift_window_texts`` or from an
older release declare nothing (NULL).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from textsieve.registry._db import Tx
from textsieve.registry.drift import StoredWindow, decode_counts, encode_counts, newest_rows


class DriftQueries:
    def __init__(self, tx: Tx) -> None:
        self.tx = tx

    def add(
        self,
        model: str,
        version: int,
        replica: str,
        at: str,
        texts: int,
        counts: NDArray[np.int64],
        *,
        window_texts: int,
    ) -> None:
        self.tx.run(
            "INSERT INTO drift_counts (model, version, replica, flushed_at, texts, counts, window_texts) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            (model, version, replica, at, texts, encode_counts(counts), window_texts),
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
        return StoredWindow(texts, total, rows, self.declared(model, version))

    def declared(self, model: str, version: int) -> tuple[int, ...]:
        """The window sizes the stored rows of (``model``, ``version``) were written under, smallest first."""
        found = self.tx.all(
            "SELECT DISTINCT window_texts FROM drift_counts "
            "WHERE model = ? AND version = ? AND window_texts IS NOT NULL",
            (model, version),
        )
        return tuple(sorted(int(r["window_texts"]) for r in found))

    def prune(self, model: str, version: int, window_texts: int) -> int:
        """Delete the rows of (``model``, ``version``) older than its newest texts of the largest window
        size declared: ``window_texts`` (the writer's) or any a stored row of the version declares."""
        found = self.tx.all(
            "SELECT id, texts, window_texts FROM drift_counts WHERE model = ? AND version = ? ORDER BY id DESC",
            (model, version),
        )
        largest = max([window_texts, *(int(r["window_texts"]) for r in found if r["window_texts"] is not None)])
        keep = newest_rows([int(r["texts"]) for r in found], largest)
        if keep >= len(found):
            return 0
        return self.tx.run(
            "DELETE FROM drift_counts WHERE model = ? AND version = ? AND id < ?",
            (model, version, found[keep - 1]["id"]),
        )


__all__ = ["DriftQueries"]
