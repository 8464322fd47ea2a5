"""Write registry/_unicode_tables.py: the combining marks and format characters of this Python's
Unicode database, so that a process building the tokenizer's pattern reads them instead of scanning
every code point (~0.08 s, on the path of every scoring run's and every server's start).

    .venv/bin/python scripts/unicode_tables.py

A Python with another Unicode version scans as before; tests/registry/test_tokenizer.py scans and
compares whenever the versions match, and says to run this script when they do not agree.
"""

from __future__ import annotations

import sys
import unicodedata
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from textsieve.files import atomic_write_text  # noqa: E402
from textsieve.registry.tokenizer import scan_marks_and_formats  # noqa: E402

TARGET = ROOT / "registry" / "_unicode_tables.py"


def render(version: str, marks: list[tuple[int, int]], formats: list[tuple[int, int]]) -> str:
    def runs(pairs: list[tuple[int, int]]) -> str:  # one run a line, as ruff format writes a tuple
        return "\n".join(f"    (0x{lo:04X}, 0x{hi:04X})," for lo, hi in pairs)

    return (
        '"""Combining marks (category M*) and format characters (Cf) of Unicode '
        f"{version}, as (first, last) runs.\n\n"
        "Made by scripts/unicode_tables.py from Python's unicodedata; do not edit. The tokenizer reads\n"
        "them when the running Python has this Unicode version (registry/tokenizer.py).\n"
        '"""\n\n'
        f'UNICODE_VERSION = "{version}"\n\n'
        f"MARKS: tuple[tuple[int, int], ...] = (\n{runs(marks)}\n)\n\n"
        f"FORMATS: tuple[tuple[int, int], ...] = (\n{runs(formats)}\n)\n"
    )


def main() -> int:
    marks, formats = scan_marks_and_formats()
    atomic_write_text(TARGET, render(unicodedata.unidata_version, marks, formats))
    print(
        f"wrote {TARGET.relative_to(ROOT)}: Unicode {unicodedata.unidata_version}, "
        f"{len(marks)} runs of marks, {len(formats)} of format characters"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
