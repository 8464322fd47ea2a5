"""Imported by the fork server only (textsieve/forking.py), before it forks any worker: work
that every worker process would otherwise repeat on its first model, done once and inherited.

The tokenizer's full pattern needs the Unicode database's combining marks and format characters:
read from registry/_unicode_tables.py when the Python's Unicode version is the tables', else a
scan of every code point (~0.08 s of CPU), which a scoring run's workers each paid on a 2-core
machine where a 100,000-text run takes ~2 s (bench/README.md, "Scoring a file"). A worker forked
after this import finds the classes and the default spec's compiled pattern in its copy of the cache.
"""

from __future__ import annotations

from textsieve.registry.tokenizer import Tokenizer

Tokenizer()
