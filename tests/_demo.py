"""The demo nights (demo_frames/ and their configs) copied for a test."""

from __future__ import annotations

import shutil
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def demo_copy(folder: Path) -> Path:
    """Copy the demo nights and their configs; return the first night's config.

    That is ``demo_2026-10-15.yaml``; ``demo_2026-10-16.yaml``,
    ``demo_2026-10-17.yaml`` and ``demo.yaml`` (the three and their mosaic,
    the README's first command) sit beside it.  Products
    of the copy go to ``folder/demo_products/`` (the configs' ``output_dir``,
    relative to ``configs/``).
    """
    shutil.copytree(REPO / "demo_frames", folder / "demo_frames")
    (folder / "configs").mkdir()
    for path in (REPO / "configs").glob("*demo*.yaml"):
        shutil.copy(path, folder / "configs" / path.name)
    return folder / "configs" / "demo_2026-10-15.yaml"
