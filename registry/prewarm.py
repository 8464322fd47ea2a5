"""Imported by the fork server only (textsieve/forking.py), before it forks any worker: work
that every worker process would otherwise repeat on its first model, done once and inherited.

The tokenizer's full pattern needs the Unicode database's combining marks and format characters:
read from registry/_unicode_tables.py when the Python's Unicode version is the tables', else a
scan of every code point (~0.08 s of CPU), which a scoring run's workers each paid on a 2-core
machine where a 100,000-text run takes ~2 s (bench/README.md, "Scoring a file"). A worker forked
after this import finds the classes and the default spec's compiled pattern in its copy of the cache.

Imported last, it also moves everything the fork server holds (its imports: NumPy, onnxruntime,
pydantic and ours) out of the cycle collector's reach (``gc.freeze``). Those objects live as long as
the server and every worker forked from it: a worker's full collections no longer scan them, and
when the caller ends, the server's exit no longer walks them all before it closes the stdout and
stderr it shares with the caller (a shell's ``$(textsieve score …)`` or a captured subprocess waits
for that; bench/README.md, "Scoring a file").
"""

from __future__ import annotations

import gc

from textsieve.registry.tokenizer import Tokenizer

Tokenizer()
gc.freeze()
