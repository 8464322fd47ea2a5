"""JSON Lines files as the project writes them: one object per line, UTF-8, ``\\n`` line ends."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any


def write_jsonl(path: Path, rows: list[dict[str, Any]]) -> Path:
    path.write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rows), encoding="utf-8")
    return path


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    # split on "\n" only: str.splitlines() would also break at U+2028, U+0085 and others, which
    # JSON allows unescaped inside strings (RFC 8259, section 7).
    return [json.loads(line) for line in path.read_text(encoding="utf-8").split("\n") if line]


__all__ = ["read_jsonl", "write_jsonl"]
