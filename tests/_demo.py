"""The demo night (demo_frames/ and its configs) copied for a test."""

from __future__ import annotations

import shutil
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def demo_copy(folder: Path) -> Path:
    """Copy the demo night and its configs under ``folder``; return its ``demo.yaml``.

    Products of the copy go to ``folder/demo_products/`` (the config's
    ``output_dir``, relative to ``configs/``).
    """
    shutil.copytree(REPO / "demo_frames", folder / "demo_frames")
    (folder / "configs").mkdir()
    for name in ("demo.yaml", "simulate_demo.yaml"):
        shutil.copy(REPO / "configs" / name, folder / "configs" / name)
    return folder / "configs" / "demo.yaml"
