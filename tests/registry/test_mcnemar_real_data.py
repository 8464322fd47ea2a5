"""The statistical gate on real data: the UCI Sentiment Labelled Sentences (Kotzias, Denil,
de Freitas & Smyth, KDD 2015; vendored in tests/data/sentiment_labelled).

Two versions trained alike with different seeds differ only by chance, so McNemar's exact test
(McNemar, 1947; Dietterich, 1998, §3.2) must not call the second significantly worse; a
version trained on a copy with 35 % of its training labels flipped must be refused. Measured
when this test was written (600 held-out sentences): seed 1 accuracy 0.810, seed 2 0.815,
43 right→wrong vs 46 wrong→right, p = 0.83; corrupted 0.565, 194 vs 47, p = 2e-22.
"""

from __future__ import annotations

import json
import random
from pathlib import Path

import pytest

from tests.helpers.training import export_tiny, train_tiny
from textsieve.errors import GateRefusedError
from textsieve.registry import open_registry

DATA = Path(__file__).resolve().parents[1] / "data" / "sentiment_labelled"
# A tiny model (tests/helpers/training.py) with a larger step, so 4 epochs learn the task.
CONFIG = dict(epochs=4, embedding_dim=16, maps=8, learning_rate=0.01)
FLIPPED = 0.35

pytestmark = pytest.mark.slow


def _sentences() -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    for name in ("amazon", "imdb", "yelp"):
        for item in json.loads((DATA / f"{name}.json").read_text(encoding="utf-8")):
            if item["class"] is not None:  # the files end with an empty sentinel item
                rows.append((item["text"].strip(), "positive" if item["class"] == 1 else "negative"))
    return rows


def _write(path: Path, rows: list[tuple[str, str]]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("".join(json.dumps({"text": t, "label": y}) + "\n" for t, y in rows), encoding="utf-8")
    return path


def test_seeds_are_not_refused_and_corrupted_labels_are(tmp_path: Path) -> None:
    rows = _sentences()
    assert len(rows) == 3000
    random.Random(2015).shuffle(rows)
    train, valid, test = rows[:2100], rows[2100:2400], rows[2400:]
    clean, corrupt = tmp_path / "clean", tmp_path / "corrupt"
    _write(clean / "train.jsonl", train)
    _write(clean / "valid.jsonl", valid)
    rng = random.Random(7)
    other = {"positive": "negative", "negative": "positive"}
    _write(corrupt / "train.jsonl", [(t, other[y] if rng.random() < FLIPPED else y) for t, y in train])
    _write(corrupt / "valid.jsonl", valid)
    evalset = _write(tmp_path / "test.jsonl", test)

    bundles = [
        export_tiny(train_tiny(data, tmp_path / f"run-{i}", seed=seed, **CONFIG), tmp_path / f"bundle-{i}")
        for i, (data, seed) in enumerate([(clean, 1), (clean, 2), (corrupt, 1)], start=1)
    ]
    with open_registry(tmp_path / "registry") as reg:
        for bundle in bundles:
            reg.publish(bundle, "sentiment", evalset=evalset if bundle == bundles[0] else None)
        reg.promote("sentiment", 1, "live", reason="seed 1")
        reg.change_settings("sentiment", {"mcnemar": True}, reason="600 texts: judge by significance", actor="lead")

        seed = next(g for g in reg.check("sentiment", 2) if g.name == "mcnemar")
        assert seed.passed, seed.detail
        assert seed.figures["n"] == 600 and seed.figures["mcnemar_p"] >= 0.05
        assert abs(seed.figures["accuracy_delta"]) < 0.05

        with pytest.raises(GateRefusedError) as info:
            reg.promote("sentiment", 3, "live", reason="new data")
        gate = next(g for g in info.value.context["gates"] if g["name"] == "mcnemar")
        f = gate["figures"]
        assert not gate["passed"] and f["mcnemar_p"] < 0.05 and f["right_to_wrong"] > f["wrong_to_right"]
        assert f["accuracy_delta"] < -0.1  # a clear loss, not a borderline one
        assert "gate mcnemar refused: significantly worse" in info.value.message
        assert "/v1/models/sentiment/versions/3/report" in info.value.message
        assert reg.live("sentiment").version == 1  # type: ignore[union-attr]
