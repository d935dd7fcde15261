"""Tiny generated images and split tables for the leakage and manifest tests (no real patients)."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
from PIL import Image


def blob_image(seed: int, size: int = 64) -> Image.Image:
    """A smooth random picture (low-frequency noise), distinct for each seed."""
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, size=(6, 6, 3), dtype=np.uint8)
    return Image.fromarray(small).resize((size, size), Image.BICUBIC)


def save(img: Image.Image, path: Path) -> str:
    path.parent.mkdir(parents=True, exist_ok=True)
    img.save(path)
    return str(path)


def split_tree(root: Path, layout: dict[str, list[int]]) -> dict[str, str]:
    """Write ``root/<split>/img<seed>.png`` for each seed; return relative path -> split."""
    out = {}
    for split, seeds in layout.items():
        for seed in seeds:
            rel = f"{split}/img{seed}.png"
            save(blob_image(seed), root / rel)
            out[rel] = split
    return out


def write_csv(path: Path, rows: list[dict]) -> str:
    pd.DataFrame(rows).to_csv(path, index=False)
    return str(path)


def relpaths(root: Path) -> list[str]:
    return sorted(
        Path(os.path.relpath(os.path.join(d, f), root)).as_posix()
        for d, _, files in os.walk(root)
        for f in files
    )
