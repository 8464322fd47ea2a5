"""Where the package's sources live: textsieve/ and the top-level folders its symbolic links name."""

from __future__ import annotations

import os
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def package_folders(root: Path = ROOT) -> list[str]:
    """``textsieve`` plus exporter/, registry/ and service/, reached through links in textsieve/."""
    links = [p for p in (root / "textsieve").iterdir() if p.is_symlink()]
    return ["textsieve", *sorted(os.readlink(p).removeprefix("../") for p in links)]
