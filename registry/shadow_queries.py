"""The shadow-count queries, for both backends, run inside a caller's transaction.

Every write is an additive UPSERT (``ON CONFLICT … DO UPDATE SET n = n + excluded.n``, which
SQLite since 3.24 and PostgreSQL since 9.5 both accept), so two replicas flushing at once add
up instead of overwriting each other; one flush is one transaction, so it lands whole or not at all.
"""

from __future__ import annotations

from textsieve.registry._db import Tx
from textsieve.registry.shadow import ShadowCounts, StoredText, Tally, Transition

_PAIR = "model = ? AND live_version = ? AND candidate_version = ?"


class ShadowQueries:
    def __init__(self, tx: Tx) -> None:
        self.tx = tx

    def add(self, model: str, live: int, candidate: int, tally: Tally, at: str) -> None:
        self.tx.run(
            "INSERT INTO shadow_pairs (model, live_version, candidate_version, texts, agreed, dropped, delta_sum, "
            "flushes, first_at, updated_at) VALUES (?, ?, ?, ?, ?, ?, ?, 1, ?, ?) "
            "ON CONFLICT (model, live_version, candidate_version) DO UPDATE SET "
            "texts = shadow_pairs.texts + excluded.texts, agreed = shadow_pairs.agreed + excluded.agreed, "
            "dropped = shadow_pairs.dropped + excluded.dropped, "
            "delta_sum = shadow_pairs.delta_sum + excluded.delta_sum, flushes = shadow_pairs.flushes + 1, "
            "updated_at = excluded.updated_at",
            (model, live, candidate, tally.texts, tally.agreed, tally.dropped, tally.delta_sum, at, at),
        )
        for (a, b), n in sorted(tally.transitions.items()):
            self.tx.run(
                "INSERT INTO shadow_transitions (model, live_version, candidate_version, live_label, "
                "candidate_label, texts) VALUES (?, ?, ?, ?, ?, ?) "
                "ON CONFLICT (model, live_version, candidate_version, live_label, candidate_label) "
                "DO UPDATE SET texts = shadow_transitions.texts + excluded.texts",
                (model, live, candidate, a, b, n),
            )

    def keep_texts(self, model: str, live: int, candidate: int, tally: Tally, at: str) -> None:
        for k in tally.kept:
            self.tx.run(
                "INSERT INTO shadow_texts (model, live_version, candidate_version, text, live_label, "
                "live_probability, candidate_label, candidate_probability, at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    model,
                    live,
                    candidate,
                    k.text,
                    k.live_label,
                    k.live_probability,
                    k.candidate_label,
                    k.candidate_probability,
                    at,
                ),
            )

    def trim_texts(self, model: str, keep: int | None, older_than: str) -> int:
        """Forget kept texts of ``model`` stored before ``older_than``, and those beyond the newest ``keep``
        (None: no count)."""
        removed = self.tx.run("DELETE FROM shadow_texts WHERE model = ? AND at < ?", (model, older_than))
        if keep is None:
            return removed
        row = self.tx.one(
            "SELECT id FROM shadow_texts WHERE model = ? ORDER BY id DESC LIMIT 1 OFFSET ?", (model, max(keep, 0))
        )
        if row is not None:
            removed += self.tx.run("DELETE FROM shadow_texts WHERE model = ? AND id <= ?", (model, row["id"]))
        return removed

    def pairs(self, model: str) -> list[ShadowCounts]:
        rows = self.tx.all(
            "SELECT model, live_version, candidate_version, texts, agreed, dropped, delta_sum, flushes, first_at, "
            "updated_at FROM shadow_pairs WHERE model = ? ORDER BY updated_at DESC, live_version, candidate_version",
            (model,),
        )
        return [self._with_transitions(r) for r in rows]

    def pair(self, model: str, live: int, candidate: int) -> ShadowCounts | None:
        row = self.tx.one(
            "SELECT model, live_version, candidate_version, texts, agreed, dropped, delta_sum, flushes, first_at, "
            f"updated_at FROM shadow_pairs WHERE {_PAIR}",
            (model, live, candidate),
        )
        return None if row is None else self._with_transitions(row)

    def _with_transitions(self, row: dict[str, object]) -> ShadowCounts:
        key = (row["model"], row["live_version"], row["candidate_version"])
        rows = self.tx.all(
            "SELECT live_label, candidate_label, texts FROM shadow_transitions WHERE "
            f"{_PAIR} ORDER BY live_label, candidate_label",
            key,
        )
        return ShadowCounts.model_validate({**row, "transitions": [Transition.model_validate(r) for r in rows]})

    def texts(self, model: str, live: int, candidate: int, limit: int) -> list[StoredText]:
        rows = self.tx.all(
            "SELECT id, text, live_label, live_probability, candidate_label, candidate_probability, at "
            f"FROM shadow_texts WHERE {_PAIR} ORDER BY id DESC LIMIT ?",
            (model, live, candidate, limit),
        )
        return [StoredText.model_validate(r) for r in rows]


__all__ = ["ShadowQueries"]
