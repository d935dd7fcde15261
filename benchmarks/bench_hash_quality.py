"""How well curate's hashes hold up: reduced (draft) decoding, crops, rotations and flips.

    python benchmarks/bench_hash_quality.py [--quick]

1. Draft decoding: for each JPEG, every hash from the reduced decode
   (``Image.draft``, as ``curate hash`` does) against the same pipeline with a
   full-size decode; mean and max differing bits per hash family. Images: the
   demo scenario's originals (generated, ``image_scale`` 4: about 2400 x 1800)
   and scikit-image's sample photographs (shipped in its wheel) saved as JPEG q=92.
2. Crops keeping 75-100% of each side (random size and position, JPEG q=90):
   recall at radius r of (a) the crop's ``phash`` against the original's
   ``phash`` + ``crop_hashes`` and (b) every code of the crop against every code
   of the original; plus how often two *different* images match that way.
3. Rotations and flips (lossless transpose, JPEG q=90 re-encode): distance of
   the copy's ``phash`` to the original's ``phash_t<k>``.
"""

from __future__ import annotations

import argparse
import io
import sys
import tempfile
from pathlib import Path

import numpy as np
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parent))

from hash_sample_images import demo_originals, jpeg_bytes, skimage_photos  # noqa: E402

from curate.hash_files import decode_for_hashing  # noqa: E402
from curate.hashing import PIL_TRANSPOSE, hash_thumbnail  # noqa: E402

FAMILIES = ["ahash", "dhash", "phash", "whash", "colorhash"]


def popcount(x) -> np.ndarray:
    return np.bitwise_count(np.asarray(x, dtype=np.uint64))


def hashes(data: bytes, draft: bool = True) -> dict:
    return hash_thumbnail(decode_for_hashing(data, draft=draft))


def code_set(h: dict) -> np.ndarray:
    return np.concatenate([[np.uint64(h["phash"])], h["crop_hashes"]]).astype(np.uint64)


def draft_deviation(named_bytes: dict[str, bytes]) -> dict[str, tuple[float, int]]:
    diffs = {f: [] for f in FAMILIES + ["crop_hashes", "phash_t*"]}
    for data in named_bytes.values():
        a, b = hashes(data, True), hashes(data, False)
        for f in FAMILIES:
            diffs[f].append(int(popcount(np.uint64(a[f]) ^ np.uint64(b[f]))))
        diffs["crop_hashes"].extend(popcount(a["crop_hashes"] ^ b["crop_hashes"]).tolist())
        diffs["phash_t*"].extend(
            int(popcount(np.uint64(a[f"phash_t{k}"]) ^ np.uint64(b[f"phash_t{k}"]))) for k in range(8)
        )
    return {f: (float(np.mean(v)), int(np.max(v))) for f, v in diffs.items()}


def crop_recall(originals: dict[str, Image.Image], crops_per_image: int, rng, radii=(8, 10, 12)):
    full_set, set_set = [], []
    sets = {}
    for name, img in originals.items():
        h = hashes(jpeg_bytes(img, 90))
        sets[name] = code_set(h)
        w, hgt = img.size
        for _ in range(crops_per_image):
            sx, sy = rng.uniform(0.75, 1.0, 2)
            x0, y0 = rng.uniform(0, 1 - sx), rng.uniform(0, 1 - sy)
            box = (round(x0 * w), round(y0 * hgt), round((x0 + sx) * w), round((y0 + sy) * hgt))
            c = hashes(jpeg_bytes(img.crop(box), 90))
            full_set.append(int(popcount(np.uint64(c["phash"]) ^ sets[name]).min()))
            set_set.append(int(popcount(np.bitwise_xor.outer(code_set(c), sets[name])).min()))
    names = list(sets)
    fs_neg, ss_neg = [], []
    for i in range(len(names)):
        for j in range(len(names)):
            if i != j:
                a, b = sets[names[i]], sets[names[j]]
                fs_neg.append(int(popcount(a[0] ^ b).min()))
                ss_neg.append(int(popcount(np.bitwise_xor.outer(a, b)).min()))
    rows = []
    for r in radii:
        rows.append((r, np.mean(np.array(full_set) <= r), np.mean(np.array(set_set) <= r),
                     np.mean(np.array(fs_neg) <= r), np.mean(np.array(ss_neg) <= r)))
    return rows, len(full_set), len(fs_neg)


def orientation_distances(originals: dict[str, Image.Image]) -> tuple[float, int, float]:
    d, far = [], []
    for img in originals.values():
        h = hashes(jpeg_bytes(img, 90))
        for k, method in enumerate(PIL_TRANSPOSE):
            if method is None:
                continue
            c = hashes(jpeg_bytes(img.transpose(method), 90))
            d.append(int(popcount(np.uint64(c["phash"]) ^ np.uint64(h[f"phash_t{k}"]))))
            far.append(int(popcount(np.uint64(c["phash"]) ^ np.uint64(h["phash"]))))
    return float(np.mean(d)), int(np.max(d)), float(np.mean(far))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer demo images and crops")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    n_demo = 60 if args.quick else 200
    crops = 4 if args.quick else 12
    with tempfile.TemporaryDirectory() as tmp:
        demo_paths = demo_originals(Path(tmp) / "demo", n_demo, image_scale=4.0)
        demo = {p.name: p.read_bytes() for p in demo_paths}
        photos = skimage_photos()
        photo_bytes = {n: jpeg_bytes(im, 92) for n, im in photos.items()}
        print(f"images: {len(demo)} demo originals (about 2400x1800 JPEG), "
              f"{len(photos)} scikit-image sample photographs (JPEG q=92)")
        print("\n1. bits changed by the reduced (draft) JPEG decode, against a full-size decode")
        print(f"   {'hash':<12} {'demo mean':>9} {'max':>4}   {'skimage mean':>12} {'max':>4}")
        dd, ds = draft_deviation(demo), draft_deviation(photo_bytes)
        for f in dd:
            print(f"   {f:<12} {dd[f][0]:9.2f} {dd[f][1]:4d}   {ds[f][0]:12.2f} {ds[f][1]:4d}")
        demo_imgs = {p.name: Image.open(io.BytesIO(demo[p.name])).convert("RGB") for p in demo_paths[:40]}
        for label, originals in (("scikit-image photographs", photos), ("demo originals", demo_imgs)):
            rows, n_pos, n_neg = crop_recall(originals, crops, rng)
            print(f"\n2. crops keeping 75-100% of each side, {label}: {n_pos} crops, {n_neg} different-image pairs")
            print("   radius  recall phash->windows  recall windows<->windows  false phash->windows  false windows<->windows")
            for r, a, b, fa, fb in rows:
                print(f"   {r:6d}  {a:21.3f}  {b:24.3f}  {fa:20.3f}  {fb:23.3f}")
            mean_d, max_d, far = orientation_distances(dict(list(originals.items())[:15]))
            print(f"3. rotations/flips ({label}): phash of copy vs original's phash_t<k>: mean {mean_d:.2f} "
                  f"bits, max {max_d}; vs untransformed phash: mean {far:.1f} bits")


if __name__ == "__main__":
    main()
