"""The benchmark's texts: invented help-desk messages of 5–60 tokens, spread evenly over length.

The demo generator's messages cluster around 20 tokens; drawn as they come they would flatter
any padding scheme. So the pool (a different seed from the training data) is cut into length
bands of 5 tokens (5–9, 10–14, …, 55–60) and each band gets the same number of texts, drawn
with replacement within the band: the long bands hold few distinct messages, and a repeated
text costs the server what a new one of that length from the same generator would (no text is
cached). Words are: the encoder caches the tokens between spaces (registry/encoder.py), and
the generator's small vocabulary hits that cache almost always, as a stable stream of support
messages mostly does. Text made mostly of words never seen before (codes, typos, another
language) encodes at up to ~1.3x the cost it had before that cache, which these figures do not show.
"""

from __future__ import annotations

import random

from textsieve.exporter.demo_data import MAX_TOKENS, MIN_TOKENS, generate, token_count

POOL_SIZE = 20_000
POOL_SEED = 20_250_101  # not the training seed (7)
BAND = 5


def bench_texts(n: int, seed: int = 1) -> list[str]:
    """``n`` texts, shuffled, equally many from each 5-token length band."""
    pool = generate(POOL_SIZE, seed=POOL_SEED)
    bands: dict[int, list[str]] = {}
    for row in pool:
        text = row["text"]
        band = min((token_count(text) - MIN_TOKENS) // BAND, (MAX_TOKENS - MIN_TOKENS) // BAND - 1)
        bands.setdefault(band, []).append(text)
    rng = random.Random(seed)
    keys = sorted(bands)
    texts = [rng.choice(bands[keys[i % len(keys)]]) for i in range(n)]
    rng.shuffle(texts)
    return texts


__all__ = ["bench_texts"]
