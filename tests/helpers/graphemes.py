"""Texts whose extended grapheme clusters (Unicode UAX #29, "Unicode Text Segmentation") are
written down by hand, for the reviewer page's highlight tests (this module holds no tests).

A text is written with each cluster of more than one code point between bars, e.g.
``"my card |👩🏽\u200d💻| ok"``; every other character is a cluster of its own. The expected
boundaries then come from UAX #29's rules, named in :data:`CLUSTERS`, not from any segmenter.
"""

from __future__ import annotations

from itertools import accumulate

# Each multi-code-point cluster the texts use, with the UAX #29 rule (as of Unicode 15.1, which
# added GB9c for Indic conjuncts) that keeps it whole.
CLUSTERS = {
    # An emoji, a skin tone (Emoji_Modifier: Grapheme_Cluster_Break=Extend, GB9), a zero-width
    # joiner (ZWJ, GB9) and a pictograph joined to it (GB11).
    "👩🏽\u200d💻": "GB9, GB11",
    "👨\u200d👩\u200d👧\u200d👦": "GB11",  # pictographs joined by ZWJs
    "👍🏿": "GB9",  # an emoji and its skin tone
    "🇫🇷": "GB12, GB13",  # regional indicators pair up, two at a time
    "e\u0301": "GB9",  # e and a combining acute accent (Extend)
    "क्ष": "GB9c",  # ka, virama, ssa: a Devanagari conjunct (Indic_Conjunct_Break)
    "मा": "GB9",  # ma and the vowel sign aa (Extend)
    "रें": "GB9",  # ra, the vowel sign e and the anusvara (both Extend)
}


def clustered(marked: str) -> tuple[str, list[int]]:
    """The text and its cluster boundaries as code-point offsets (0 and its length included)."""
    pieces = marked.split("|")
    clusters: list[str] = []
    for i, piece in enumerate(pieces):
        if i % 2:
            assert piece in CLUSTERS, f"{piece!r} is not in CLUSTERS"
            clusters.append(piece)
        else:
            clusters.extend(piece)
    return "".join(clusters), [0, *accumulate(len(c) for c in clusters)]


def widened(bounds: list[int], start: int, end: int) -> tuple[int, int]:
    """``[start, end)`` widened outward to the nearest cluster boundaries."""
    return max(b for b in bounds if b <= start), min(b for b in bounds if b >= end)


__all__ = ["CLUSTERS", "clustered", "widened"]
