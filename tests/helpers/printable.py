"""Strings that keep ZWNJ or ZWJ between two visible characters, which names, labels and the CLI's
tables all keep as given (textsieve/printable.py; PRECIS, RFC 8264 §4.3, and RFC 5892 appendix A,
which name these joiners for Persian and Indic words; emoji sequences join with ZWJ: Unicode TR #51)."""

from __future__ import annotations

import pytest

JOINED = [
    pytest.param("\u0645\u06cc\u200c\u0646\u0627", id="Persian with a zero width non-joiner"),
    pytest.param("\u0915\u094d\u200d\u0937", id="Devanagari half form with a zero width joiner"),
    pytest.param("\U0001f469\u200d\U0001f4bb", id="emoji joined by a zero width joiner"),
]

__all__ = ["JOINED"]
