"""Quality of the near-duplicate verdicts: recall per planted copy kind, precision of `near`.

Two data sets, scored the same way:

1. the demo scenario (``curate.demo.generate_scenario``), whose truth folder
   lists every planted copy (``copy_of``, ``copy_kind``) and look-alike pairs of
   different lesions (hard negatives). The library never reads the truth; only
   this scorer does.
2. copies of scikit-image's sample photographs (``skimage.data``; photographs
   shipped with scikit-image, see its data/README) under the same transforms,
   made here with Pillow.

A planted copy is *recalled* when the pair (copy, original) gets verdict
``exact`` or ``near``; "found" counts any verdict (``possible`` included).
Precision of ``near``: near pairs whose two files are copies of one another
(directly or through a common original), over all near pairs.

Targets at the default radius: recall >= 0.99 for byte copies, re-encodes,
resizes, rotations and flips; >= 0.95 for colour shifts and crops keeping 75% or
more of each side; precision of near >= 0.99.

Usage::

    python benchmarks/score_near_duplicates.py [--quick] [--images N] [--seed S] [--radius R]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

TARGETS = {
    "byte_copy": 0.99, "reencode": 0.99, "resize": 0.99, "rotate90": 0.99, "rotate180": 0.99,
    "rotate270": 0.99, "flip_h": 0.99, "flip_v": 0.99, "colour_shift": 0.95, "crop>=75%": 0.95,
}
NEAR_PRECISION_TARGET = 0.99


def _components(paths, links) -> dict:
    """Copy groups: connected components over (copy, original) links."""
    parent = {p: p for p in paths}

    def find(x):
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for a, b in links:
        if a in parent and b in parent:
            parent[find(a)] = find(b)
    return {p: find(p) for p in paths}


def score(pairs: pd.DataFrame, truth: pd.DataFrame, lookalikes: pd.DataFrame | None = None) -> dict:
    """Recall per kind and precision of ``near``.

    Parameters
    ----------
    pairs : DataFrame
        ``path_a``, ``path_b``, ``verdict`` with paths relative to the same root as ``truth``.
    truth : DataFrame
        ``path``, ``copy_of`` (empty for originals), ``copy_kind``, optional
        ``crop_keep_fraction``.
    lookalikes : DataFrame, optional
        ``path_a``, ``path_b`` of different lesions that look alike.
    """
    verdict = {}
    for a, b, v in zip(pairs["path_a"], pairs["path_b"], pairs["verdict"]):
        verdict[(a, b)] = verdict[(b, a)] = v
    copies = truth[truth["copy_of"].notna() & (truth["copy_of"].astype(str) != "")].copy()
    copies["verdict"] = [verdict.get((p, q), "missed") for p, q in zip(copies["path"], copies["copy_of"])]
    copies["kind"] = copies["copy_kind"]
    if "crop_keep_fraction" in copies:
        crop = copies["copy_kind"].eq("crop")
        keep = pd.to_numeric(copies["crop_keep_fraction"], errors="coerce")
        copies.loc[crop & (keep >= 0.75), "kind"] = "crop>=75%"
        copies.loc[crop & (keep < 0.75), "kind"] = "crop<75%"
    copies["recalled"] = copies["verdict"].isin(["exact", "near"])
    copies["found"] = copies["verdict"] != "missed"
    per_kind = copies.groupby("kind").agg(n=("recalled", "size"), recall=("recalled", "mean"),
                                          found=("found", "mean"))
    per_kind["target"] = [TARGETS.get(k, np.nan) for k in per_kind.index]
    group = _components(truth["path"].tolist(), zip(copies["path"], copies["copy_of"]))
    near = pairs[pairs["verdict"] == "near"]
    right = np.array([group.get(a, a) == group.get(b, b) for a, b in zip(near["path_a"], near["path_b"])], bool)
    out = {
        "per_kind": per_kind,
        "near_pairs": int(len(near)),
        "near_correct": int(right.sum()),
        "near_precision": float(right.mean()) if len(near) else 1.0,
        "possible_pairs": int((pairs["verdict"] == "possible").sum()),
        "missed": copies.loc[~copies["recalled"], ["path", "copy_of", "kind", "verdict"]],
    }
    if lookalikes is not None and len(lookalikes):
        la = [verdict.get((a, b), "none") for a, b in zip(lookalikes["path_a"], lookalikes["path_b"])]
        out["lookalike_verdicts"] = pd.Series(la).value_counts().to_dict()
    return out


def _relative(pairs: pd.DataFrame, root: Path) -> pd.DataFrame:
    out = pairs.copy()
    for c in ("path_a", "path_b"):
        out[c] = [os.path.relpath(p, root) for p in out[c]]
    return out


def score_demo(n_images: int, seed: int, radius: int, workers=None, progress=True) -> dict:
    from curate.demo import generate_scenario
    from curate.pair_store import find_near_duplicates

    with tempfile.TemporaryDirectory() as tmp:
        scenario = generate_scenario(tmp, n_images=n_images, random_state=seed, progress=progress)
        root = Path(scenario.out_dir if hasattr(scenario, "out_dir") else tmp)
        started = time.perf_counter()
        pairs = find_near_duplicates(root / "sources", radius=radius, workers=workers, progress=progress)
        seconds = time.perf_counter() - started
        truth = pd.read_csv(root / "truth" / "images.csv")
        look = root / "truth" / "lookalike_pairs.csv"
        lookalikes = pd.read_csv(look) if look.is_file() else None
        result = score(_relative(pairs, root), truth, lookalikes)
    result["seconds"] = seconds
    return result


# --- scikit-image sample photographs -----------------------------------------------------

# skimage.data.cat is the same photograph as chelsea, so it is left out (it would count as
# a false near-duplicate of chelsea when it is a true one).
SAMPLE_NAMES = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon",
                "page", "text", "clock", "horse", "hubble_deep_field", "immunohistochemistry",
                "motorcycle_left", "retina", "skin", "brick", "grass", "gravel")


def _sample_photos() -> dict:
    import skimage.data as data

    photos = {}
    for name in SAMPLE_NAMES:
        func = getattr(data, name, None)
        if func is None:
            continue
        try:
            arr = np.asarray(func())
        except Exception:  # noqa: BLE001 - some samples need a download (pooch); skip those
            continue
        if arr.dtype == bool:
            arr = arr.astype(np.uint8) * 255
        if arr.ndim == 3 and arr.shape[2] == 4:
            arr = arr[:, :, :3]
        if arr.ndim == 3 and arr.shape[0] == 2:  # stereo pairs and the like
            continue
        photos[name] = arr.astype(np.uint8)
    return photos


def _transforms(img, rng):
    from PIL import Image, ImageEnhance

    w, h = img.size

    def crop(im, keep):
        cw, ch = int(im.width * keep), int(im.height * keep)
        x0, y0 = rng.integers(0, im.width - cw + 1), rng.integers(0, im.height - ch + 1)
        return im.crop((int(x0), int(y0), int(x0) + cw, int(y0) + ch))

    def colour(im):
        rgb = im.convert("RGB")
        rgb = ImageEnhance.Color(rgb).enhance(float(rng.uniform(0.75, 1.25)))
        return ImageEnhance.Brightness(rgb).enhance(float(rng.uniform(0.9, 1.1)))

    return {
        "reencode": ("jpeg70", img),
        "resize": ("png", img.resize((max(8, w // 2), max(8, h // 2)), Image.Resampling.BILINEAR)),
        "rotate90": ("png", img.transpose(Image.Transpose.ROTATE_90)),
        "rotate180": ("png", img.transpose(Image.Transpose.ROTATE_180)),
        "rotate270": ("png", img.transpose(Image.Transpose.ROTATE_270)),
        "flip_h": ("png", img.transpose(Image.Transpose.FLIP_LEFT_RIGHT)),
        "flip_v": ("png", img.transpose(Image.Transpose.FLIP_TOP_BOTTOM)),
        "crop>=75%": ("png", crop(img, float(rng.uniform(0.8, 0.9)))),
        "colour_shift": ("png", colour(img)),
        "combination": ("jpeg85", colour(crop(img, 0.85)).transpose(Image.Transpose.ROTATE_90)),
    }


def score_samples(radius: int, workers=None, seed: int = 0) -> dict:
    """Copies of scikit-image's sample photographs (skimage.data) under the planted transforms."""
    import shutil

    from PIL import Image

    from curate.pair_store import find_near_duplicates

    rng = np.random.default_rng(seed)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        for name, arr in _sample_photos().items():
            img = Image.fromarray(arr)
            original = f"{name}.png"
            img.save(root / original)
            rows.append({"path": original, "copy_of": None, "copy_kind": None})
            shutil.copy(root / original, root / f"{name}__byte_copy.png")
            rows.append({"path": f"{name}__byte_copy.png", "copy_of": original, "copy_kind": "byte_copy"})
            for kind, (fmt, out) in _transforms(img, rng).items():
                fname = f"{name}__{kind.replace('>=', 'ge').replace('%', '')}.{'jpg' if fmt.startswith('jpeg') else 'png'}"
                if fmt.startswith("jpeg"):
                    out.convert("RGB").save(root / fname, quality=int(fmt[4:]))
                else:
                    out.save(root / fname)
                rows.append({"path": fname, "copy_of": original, "copy_kind": kind})
        truth = pd.DataFrame(rows)
        pairs = find_near_duplicates(root, radius=radius, workers=workers, progress=False)
        result = score(_relative(pairs, root), truth)
    result["n_photos"] = int(truth["copy_of"].isna().sum())
    return result


def _print(title: str, result: dict) -> None:
    print(f"\n== {title}")
    table = result["per_kind"].copy()
    table["meets"] = np.where(table["target"].isna(), "", np.where(table["recall"] >= table["target"], "yes", "NO"))
    print(table.to_string(float_format=lambda x: f"{x:.3f}"))
    ok = "yes" if result["near_precision"] >= NEAR_PRECISION_TARGET else "NO"
    print(f"near precision: {result['near_correct']}/{result['near_pairs']} = {result['near_precision']:.3f} "
          f"(target {NEAR_PRECISION_TARGET}, meets: {ok}); possible pairs: {result['possible_pairs']}")
    if "lookalike_verdicts" in result:
        print(f"look-alike different lesions (hard negatives), verdicts: {result['lookalike_verdicts']}")
    if len(result["missed"]):
        print("not recalled:")
        print(result["missed"].to_string(index=False))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="small demo (300 images)")
    parser.add_argument("--images", type=int, default=None, help="demo images (default 1200, quick 300)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--radius", type=int, default=None, help="candidate radius in bits")
    parser.add_argument("--workers", type=int, default=None)
    args = parser.parse_args(argv)
    from curate.near_duplicates import DEFAULT_RADIUS

    radius = DEFAULT_RADIUS if args.radius is None else args.radius
    n = args.images or (300 if args.quick else 1200)
    demo = score_demo(n, args.seed, radius, workers=args.workers)
    _print(f"demo scenario, {n} images, seed {args.seed}, radius {radius} ({demo['seconds']:.1f} s)", demo)
    samples = score_samples(radius, workers=args.workers, seed=args.seed)
    _print(f"scikit-image sample photographs (skimage.data), {samples['n_photos']} photos, radius {radius}", samples)
    return 0


if __name__ == "__main__":
    sys.exit(main())
