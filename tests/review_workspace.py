"""A tiny review workspace filled by hand: drawn lesion images, catalog rows, candidate pairs.

The review tests build on this so they do not depend on the scan, hashing or pairs
steps. Images are drawn with Pillow at test time (no real patients).
"""

from __future__ import annotations

import hashlib
import random
from pathlib import Path

from PIL import Image, ImageDraw, ImageFilter

from curate.store import Workspace, utc_now


def draw_lesion(seed: int, size: int = 200) -> Image.Image:
    """A made-up skin patch with a brown blob of random shape; different seeds look different."""
    rng = random.Random(seed)
    skin = (rng.randint(190, 235), rng.randint(150, 190), rng.randint(120, 160))
    im = Image.new("RGB", (size, size), skin)
    d = ImageDraw.Draw(im)
    for _ in range(6):
        cx, cy = rng.randint(60, size - 60), rng.randint(60, size - 60)
        rx, ry = rng.randint(15, 45), rng.randint(15, 45)
        shade = rng.randint(40, 110)
        d.ellipse((cx - rx, cy - ry, cx + rx, cy + ry), fill=(shade + 40, shade, shade // 2))
    # an off-centre mark so rotations and flips are visible
    d.rectangle((10, 10, 40, 25), fill=(90, 40, 30))
    return im.filter(ImageFilter.GaussianBlur(2))


def make_review_workspace(root: Path, *, n_lesions: int = 4) -> Workspace:
    """A workspace with 2 * n_lesions + 1 images and candidate pairs of each kind.

    For each lesion k: image "k.png" and a copy of it turned 90 degrees
    ("k_rot.png", orientation 3 turns it back, see curate.thumbnails); the last
    image is another lesion (a look-alike of lesion 0).
    Pairs: (original, turned copy) per lesion with score 0.9 verdict near;
    (lesion 0, look-alike) with score 0.55 verdict possible and a label conflict;
    (lesion 1, lesion 2) with score 0.3 verdict possible from different sources.
    """
    root = Path(root)
    images = root / "images"
    images.mkdir(parents=True, exist_ok=True)
    ws = Workspace.create(root / "ws")
    now = utc_now()
    rows = []
    for k in range(n_lesions):
        im = draw_lesion(k)
        src = "north" if k % 2 == 0 else "south"
        im.save(images / f"{k}.png")
        im.rotate(90, expand=True).save(images / f"{k}_rot.png")
        rows.append((f"{k}.png", src, f"P{k}", f"L{k}", "compound naevus", "2021-03-04"))
        rows.append((f"{k}_rot.png", src, f"P{k}", f"L{k}", "compound naevus", "2022-05-06"))
    draw_lesion(1000).save(images / "lookalike.png")
    rows.append(("lookalike.png", "south", "P99", "L99", "melanoma", "2020-01-02"))
    with ws.transaction() as con:
        for n, (name, src, patient, lesion, label, date) in enumerate(rows, start=1):
            p = images / name
            con.execute(
                "INSERT INTO images(image_id, path, root, source, size, sha256, width, height, "
                "decodable, patient_id, lesion_id, label, capture_date, first_seen, last_seen) "
                "VALUES (?, ?, ?, ?, ?, ?, 200, 200, 1, ?, ?, ?, ?, ?, ?)",
                (n, str(p), str(images), src, p.stat().st_size,
                 hashlib.sha256(p.read_bytes()).hexdigest(), patient, lesion,
                 label, date, now, now),
            )
            con.execute(
                "INSERT INTO image_nodes(image_id, node, training_class) VALUES (?, ?, ?)",
                (n, "melanoma" if label == "melanoma" else "compound_naevus",
                 "malignant" if label == "melanoma" else "benign"),
            )
        pairs = [(2 * k + 1, 2 * k + 2, 0.9, "near", None, 3) for k in range(n_lesions)]
        pairs.append((1, 2 * n_lesions + 1, 0.55, "possible", "label", 0))
        pairs.append((3, 5, 0.3, "possible", None, 0))
        for a, b, score, verdict, conflict, orientation in pairs:
            con.execute(
                "INSERT INTO pairs(image_a, image_b, d_ahash, d_dhash, d_phash, d_whash, "
                "d_colorhash, orientation, crop, score, verdict, conflict) "
                "VALUES (?, ?, 4, 6, 8, 5, 2, ?, 0, ?, ?, ?)",
                (a, b, orientation, score, verdict, conflict),
            )
    return ws
