"""Crop check speed: batched NCC (curate.crop_check now) against the implementation before batching.

    python benchmarks/bench_crop_check.py [--pairs 200] [--seed 0] [--workspace PATH]

Reference implementation ("before batching"): ``curate/crop_check.py`` as of commit
:data:`REFERENCE_COMMIT`, read with ``git show`` into a temporary module. It makes one FFT
pair per template at twice the image size, resizes every template through Pillow again
for each request, and scores the probe scale again in the coarse search.

Pairs (default): pictures drawn by :mod:`curate.demo_images` at demo size (150 x 113 or
128 x 128 pixels, like the pipeline's reduced decodes), in three kinds (:data:`MIX`):

  different   two different lesions, each on its own skin
  look-alike  the same colours, another outline, the same skin and lighting
  crop        70-95% of the width cut from a picture, turned or flipped at random,
              JPEG re-saved; a quarter from scikit-image's sample photographs

The ratio depends on where the checks stop: after the probes (old about 6 ms, new about
2.5 ms), after the coarse search, or after the full check, whose confirming hashes
(curate.hashing, unchanged, about 7 ms) both implementations pay. The table shows the
ratio by kind and by outcome.

``--workspace PATH`` times random pairs of that workspace which the pipeline checks
(:func:`curate.crop_files.pairs_to_check` on its pairs table) instead, decoded as the
pipeline decodes them.

Both implementations run on the same pairs in one process, interleaved pair by pair (old,
new, new, old; the faster of each one's two runs counts). Prints seconds per check for
both, their ratio overall and by outcome, and how many results disagree (``confirmed``,
``crop_is_a``, ``orientation`` exactly; ``ncc``, ``scale``, ``box`` within 1e-6), with how
many of those are whole-picture ties (both directions score the same NCC in exact
arithmetic; float rounding picks one, in either implementation). Target: at least 2x
fewer seconds per check. Times depend on the machine and what else runs on it; compare
the ratios.
"""

from __future__ import annotations

import argparse
import io
import subprocess
import sys
import time
import types
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

#: Last commit of curate/crop_check.py before the NCC search was batched.
REFERENCE_COMMIT = "cdefaf9"
#: Share of each kind of pair in the default mix.
MIX = {"different": 0.35, "look-alike": 0.35, "crop": 0.30}


def load_reference() -> types.ModuleType:
    """curate/crop_check.py at :data:`REFERENCE_COMMIT` as a module of its own."""
    source = subprocess.run(["git", "-C", str(ROOT), "show", f"{REFERENCE_COMMIT}:curate/crop_check.py"],
                            capture_output=True, text=True, check=True).stdout
    module = types.ModuleType("crop_check_before_batching")
    module.__file__ = f"crop_check_before_batching ({REFERENCE_COMMIT})"
    sys.modules[module.__name__] = module  # dataclasses look their module up
    exec(compile(source, module.__file__, "exec"), module.__dict__)
    return module


def _capture(rng, seed: int):
    from curate.demo_images import Capture, skin_lab

    w, h = (150, 113) if rng.random() < 0.7 else (128, 128)
    return Capture("clinical" if rng.random() < 0.6 else "dermoscopic", w, h,
                   skin_lab(float(rng.uniform(10, 60)), float(rng.uniform(11, 20)), float(rng.uniform(5, 13))),
                   angle=float(rng.uniform(0, 6.28)), centre=tuple(rng.uniform(0.4, 0.6, 2)),
                   light_angle=float(rng.uniform(0, 6.28)), hair=int(rng.integers(0, 4)), seed=seed)


def _crop(img: Image.Image, rng) -> Image.Image:
    from curate.hashing import PIL_TRANSPOSE

    kw, kh = rng.uniform(0.70, 0.95, 2)
    cw, ch = int(img.width * kw), int(img.height * kh)
    x0, y0 = int(rng.integers(0, img.width - cw + 1)), int(rng.integers(0, img.height - ch + 1))
    out = img.crop((x0, y0, x0 + cw, y0 + ch))
    t = int(rng.integers(0, 8))
    if t:
        out = out.transpose(PIL_TRANSPOSE[t])
    buf = io.BytesIO()
    out.convert("RGB").save(buf, "JPEG", quality=int(rng.integers(60, 95)))
    buf.seek(0)
    return Image.open(buf).convert("RGB")


def drawn_pairs(n: int, seed: int) -> list[tuple[str, Image.Image, Image.Image]]:
    """``n`` pairs in the :data:`MIX` of kinds, drawn with ``seed``."""
    from dataclasses import replace

    from curate.demo_images import DIAGNOSIS_LOOK, draw_lesion_image, lesion_look

    from hash_sample_images import skimage_photos

    rng = np.random.default_rng(seed)
    diagnoses = sorted(DIAGNOSIS_LOOK)
    photos = [p.reduce(max(1, max(p.size) // 300)) for p in skimage_photos().values()]
    edges = np.round(np.cumsum([0.0, *MIX.values()]) * n).astype(int)
    kinds = [kind for kind, lo, hi in zip(MIX, edges[:-1], edges[1:]) for _ in range(hi - lo)]
    pairs = []
    for kind in kinds:
        look = lesion_look(diagnoses[int(rng.integers(len(diagnoses)))], rng)
        cap = _capture(rng, int(rng.integers(2**31)))
        a = draw_lesion_image(look, cap)
        if kind == "different":
            other = lesion_look(diagnoses[int(rng.integers(len(diagnoses)))], rng)
            b = draw_lesion_image(other, _capture(rng, int(rng.integers(2**31))))
        elif kind == "look-alike":
            b = draw_lesion_image(look.with_new_shape(int(rng.integers(2**31))), replace(cap, seed=cap.seed + 1))
        else:
            if rng.random() < 0.25:
                a = photos[int(rng.integers(len(photos)))]
            b = _crop(a, rng)
            if rng.random() < 0.5:
                a, b = b, a
        pairs.append((kind, a, b))
    return pairs


def workspace_pairs(path: str, n: int, seed: int) -> list[tuple[str, Image.Image, Image.Image]]:
    """``n`` random pairs the pipeline crop-checks in the workspace at ``path``, decoded."""
    from curate.crop_files import _decode, pairs_to_check
    from curate.store import Workspace

    ws = Workspace.open(path)
    catalog = ws.catalog()
    paths = dict(zip(catalog["image_id"], catalog["path"]))
    pairs = ws.read_sql("SELECT * FROM pairs")
    todo = pairs[pairs_to_check(pairs)].sample(frac=1.0, random_state=seed)
    out = []
    for a, b in zip(todo["image_a"], todo["image_b"]):
        pa, pb = (_decode(paths[i]) if i in paths else None for i in (a, b))
        if pa is not None and pb is not None:
            out.append(("candidate", pa, pb))
        if len(out) == n:
            break
    return out


def outcome(m, probe_min_ncc: float) -> str:
    """Where the (old) check stopped: after the probes, after the coarse search, or at the end."""
    if m.distances:
        return "full check"
    return "probe stop" if m.ncc < probe_min_ncc else "coarse stop"


def agree(x, y) -> bool:
    """The same answer: flags and orientation exactly, NCC, scale and box within 1e-6."""
    return (x.confirmed == y.confirmed and x.crop_is_a == y.crop_is_a and x.orientation == y.orientation
            and abs(x.ncc - y.ncc) <= 1e-6 and abs(x.scale - y.scale) <= 1e-6
            and np.allclose(x.box, y.box, rtol=0, atol=1e-6))


def direction_tie(x, y) -> bool:
    """Whole-picture alignments seen from opposite sides: an exact tie that rounding decides."""
    return x.crop_is_a != y.crop_is_a and min(x.scale, y.scale) >= 0.97


def timed(check, a, b):
    started = time.perf_counter()
    result = check(a, b)
    return time.perf_counter() - started, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=200, help="number of pairs (default 200)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the drawn pairs or of the workspace sample")
    parser.add_argument("--workspace", help="time pairs this workspace crop-checks instead of drawn pairs")
    args = parser.parse_args()

    from curate import crop_check as new

    old = load_reference()
    if args.workspace:
        pairs, source = workspace_pairs(args.workspace, args.pairs, args.seed), f"workspace {args.workspace}"
    else:
        pairs, source = drawn_pairs(args.pairs, args.seed), f"drawn, seed {args.seed}"
    for impl in (old, new):  # warm up imports and FFT plans
        impl.check_crop(pairs[0][1], pairs[0][2])

    rows = []
    for kind, a, b in pairs:
        t_old1, m_old = timed(old.check_crop, a, b)
        t_new1, m_new = timed(new.check_crop, a, b)
        t_new2, _ = timed(new.check_crop, a, b)
        t_old2, _ = timed(old.check_crop, a, b)
        rows.append({"kind": kind, "outcome": outcome(m_old, old.PROBE_MIN_NCC), "old": min(t_old1, t_old2),
                     "new": min(t_new1, t_new2), "agree": agree(m_old, m_new), "tie": direction_tie(m_old, m_new)})

    def line(label, sel):
        t_old, t_new = sum(r["old"] for r in sel), sum(r["new"] for r in sel)
        print(f"{label:<26} {len(sel):>5} {1000 * t_old / len(sel):>11.2f} {1000 * t_new / len(sel):>11.2f}"
              f" {t_old / t_new:>7.2f}x")

    print(f"{len(rows)} pairs ({source}); reference = curate/crop_check.py at {REFERENCE_COMMIT}")
    print(f"{'':<26} {'pairs':>5} {'old ms/pair':>11} {'new ms/pair':>11} {'ratio':>8}")
    for key in ("kind", "outcome"):
        for value in sorted({r[key] for r in rows}):
            line(f"{key} {value}", [r for r in rows if r[key] == value])
    line("all", rows)
    t_old, t_new = sum(r["old"] for r in rows), sum(r["new"] for r in rows)
    print(f"seconds per check: old {t_old / len(rows):.4f}, new {t_new / len(rows):.4f}; "
          f"ratio old / new {t_old / t_new:.2f}x")
    differ = [r for r in rows if not r["agree"]]
    print(f"results that disagree: {len(differ)} of {len(rows)} "
          f"({sum(r['tie'] for r in differ)} of them whole-picture direction ties)")


if __name__ == "__main__":
    main()
