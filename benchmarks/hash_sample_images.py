"""Images for the hashing benchmarks: generated noise-and-shapes pictures, demo originals,
and the sample photographs scikit-image ships in its wheel (no download).

Imported by bench_hashing.py and bench_hash_quality.py; not part of the package.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

#: scikit-image sample photographs stored inside the scikit-image wheel (skimage/data/*).
SKIMAGE_PHOTOS = (
    "astronaut", "camera", "chelsea", "coffee", "coins", "rocket", "retina",
    "hubble_deep_field", "immunohistochemistry", "moon", "brick", "grass", "gravel", "page",
)


def skimage_photos() -> dict[str, Image.Image]:
    """scikit-image's bundled sample photographs as RGB images, by name."""
    import skimage.data

    out = {name: Image.fromarray(getattr(skimage.data, name)()).convert("RGB") for name in SKIMAGE_PHOTOS}
    out["motorcycle_left"] = Image.fromarray(skimage.data.stereo_motorcycle()[0]).convert("RGB")
    return out


def noise_and_shapes(width: int, height: int, rng: np.random.Generator, *, noise_sigma: float = 3.0) -> Image.Image:
    """A skin-toned background with soft gradients, a few blobs and sensor-like noise."""
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
    base = rng.uniform(150, 220, 3)
    period = rng.uniform(0.1, 0.4, 3) * width
    rgb = np.stack(
        [base[c] + 15 * np.sin((xx * (c + 1) + yy) / period[c]) for c in range(3)], axis=-1
    )
    img = Image.fromarray(rgb.clip(0, 255).astype(np.uint8))
    draw = ImageDraw.Draw(img)
    for _ in range(int(rng.integers(3, 8))):
        x, y = rng.uniform(0, width), rng.uniform(0, height)
        rx, ry = rng.uniform(0.03, 0.2, 2) * width
        colour = tuple(int(v) for v in rng.integers(30, 200, 3))
        draw.ellipse([x - rx, y - ry, x + rx, y + ry], fill=colour)
    img = img.filter(ImageFilter.GaussianBlur(width / 600))
    if noise_sigma > 0:
        a = np.asarray(img, dtype=np.float32) + rng.normal(0, noise_sigma, (height, width, 3)).astype(np.float32)
        img = Image.fromarray(a.clip(0, 255).astype(np.uint8))
    return img


def jpeg_bytes(img: Image.Image, quality: int = 90) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=quality)
    return buf.getvalue()


def write_jpegs(folder: Path, n: int, width: int, height: int, *, seed: int = 0,
                noise_sigma: float = 3.0, quality: int = 90) -> list[Path]:
    """Write ``n`` noise-and-shapes JPEGs; returns their paths."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(n):
        p = folder / f"img_{i:04d}.jpg"
        p.write_bytes(jpeg_bytes(noise_and_shapes(width, height, rng, noise_sigma=noise_sigma), quality))
        paths.append(p)
    return paths


def demo_originals(folder: Path, n_images: int, *, image_scale: float, seed: int = 0) -> list[Path]:
    """Generate the demo scenario and return its original (not copied, not broken) JPEG files."""
    import pandas as pd

    from curate.demo import generate_scenario

    sc = generate_scenario(folder, n_images=n_images, random_state=seed, progress=False,
                           image_scale=image_scale)
    truth = pd.read_csv(sc.path / "truth" / "images.csv")
    keep = truth[(truth["copy_of"].isna()) & (truth["is_problem_file"] == 0)]
    keep = keep[keep["path"].str.lower().str.endswith((".jpg", ".jpeg"))]
    return [sc.path / p for p in keep["path"]]
