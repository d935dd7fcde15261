"""Pictures drawn at test time for the hashing tests (no files from elsewhere)."""

from __future__ import annotations

import numpy as np
from PIL import Image, ImageDraw


def drawn(width: int, height: int, seed: int) -> Image.Image:
    """A coloured background with a few filled ellipses, the same for the same arguments."""
    rng = np.random.default_rng(seed)
    img = Image.new("RGB", (width, height), tuple(int(v) for v in rng.integers(90, 230, 3)))
    draw = ImageDraw.Draw(img)
    for _ in range(5):
        x, y = rng.integers(0, width), rng.integers(0, height)
        r = int(rng.integers(max(1, width // 10), max(2, width // 3)))
        draw.ellipse([x - r, y - r, x + r, y + r], fill=tuple(int(v) for v in rng.integers(0, 255, 3)))
    return img
