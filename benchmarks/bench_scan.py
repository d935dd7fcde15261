"""Scan throughput: first scan vs re-scan of an unchanged tree, measured side by side.

Usage::

    python benchmarks/bench_scan.py --quick          # 2,000 files, a few seconds
    python benchmarks/bench_scan.py                  # 20,000 files
    python benchmarks/bench_scan.py --files 100000   # the 100k case
    python benchmarks/bench_scan.py --demo --files 100000 --image-scale 0.25
                                                     # on the demo scenario's drawn images
    python benchmarks/bench_scan.py --scenario DIR   # an existing demo folder (curate demo's
                                                     # OUT), each source with its metadata CSV

``--scenario`` scans every source of a scenario folder (``sources.json``) into a new
workspace with its metadata, as ``curate demo`` does, then again unchanged; the folder is
only read (no 1 % change step).

By default it writes small JPEG files quickly: a few hundred Pillow-drawn
images, each file given a unique JPEG comment segment so every file has its
own SHA-256. ``--demo`` uses :func:`curate.demo.generate_scenario` instead
(realistic pictures, planted bad files and copies; drawing them takes longer).

Printed figures: files/s of the first scan (digest + Pillow check of every
file), of a re-scan of the unchanged tree (directory entries only), of a
re-scan after 1 % of the files changed, and the ratio first / re-scan (the
target is at least 20). Files are in the page cache in both scans (they were
just written), so the ratio is the work saved, not disk speed.
"""

from __future__ import annotations

import argparse
import io
import os
import shutil
import struct
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from curate.ingest import scan_folder  # noqa: E402
from curate.store import Workspace  # noqa: E402

PER_FOLDER = 1000


def variants(n: int, size: int) -> list[bytes]:
    """``n`` drawn JPEGs: a skin-toned field with fine texture (noise) and a dark ellipse.

    The texture keeps the files near the size of real photographs of that
    many pixels (a flat drawing would compress to a few kilobytes).
    """
    rng = np.random.default_rng(0)
    out = []
    for i in range(n):
        img = Image.new("RGB", (size, size), (180 + i % 60, 130 + (7 * i) % 50, 110))
        d = ImageDraw.Draw(img)
        d.ellipse((size // 5 + i % 9, size // 4, size - size // 4, size - size // 5 - i % 7), fill=(80, 50, 40))
        noisy = np.asarray(img, dtype=np.int16) + rng.normal(0, 12, (size, size, 1)).astype(np.int16)
        b = io.BytesIO()
        Image.fromarray(noisy.clip(0, 255).astype(np.uint8)).save(b, "JPEG", quality=90)
        out.append(b.getvalue())
    return out


def with_comment(jpeg: bytes, text: bytes) -> bytes:
    """The same JPEG with a COM segment after SOI (a valid JPEG with its own bytes)."""
    return jpeg[:2] + b"\xff\xfe" + struct.pack(">H", len(text) + 2) + text + jpeg[2:]


def write_files(root: Path, n: int, size: int) -> None:
    base = variants(min(n, 64), size)
    for i in range(n):
        folder = root / f"batch_{i // PER_FOLDER:04d}"
        if i % PER_FOLDER == 0:
            folder.mkdir(parents=True, exist_ok=True)
        (folder / f"img_{i:07d}.jpg").write_bytes(with_comment(base[i % len(base)], b"file %d" % i))


def timed_scan(ws, root, source, progress, workers=None):
    t = time.perf_counter()
    result = scan_folder(ws, root, source=source, progress=progress, workers=workers)
    return result, time.perf_counter() - t


def touch_some(root: Path, fraction: float) -> int:
    files = sorted(root.rglob("*.jpg"))
    step = max(1, round(1 / fraction))
    for p in files[::step]:
        data = p.read_bytes()
        p.write_bytes(with_comment(data, b"changed"))
    return len(files[::step])


def scan_scenario(folder: Path, progress: bool) -> int:
    """First scan and unchanged re-scan of a demo folder's sources, with their metadata."""
    from curate.pipeline import read_sources

    sources = read_sources(folder)
    with tempfile.TemporaryDirectory() as tmp:
        ws = Workspace.create(Path(tmp) / "ws")
        runs = []
        for _ in range(2):
            t = time.perf_counter()
            results = [scan_folder(ws, folder / s["folder"], source=s["name"], metadata=folder / s["metadata"],
                                   columns=s["columns"], progress=progress) for s in sources]
            runs.append((time.perf_counter() - t, results))
    (t_first, first), (t_again, again) = runs
    files = sum(r.files_seen for r in first)
    reused = sum(r.reused for r in again)
    print(f"scenario {folder}: {len(sources)} sources, {files} files, metadata joined")
    print(f"first scan      : {files / t_first:10.0f} files/s  ({t_first:7.2f} s)")
    print(f"re-scan, same   : {files / t_again:10.0f} files/s  ({t_again:7.2f} s)  reused {reused}")
    print(f"ratio first / re-scan (same tree): {t_first / t_again:.1f}x (target >= 20x)")
    return 0 if reused == files else 1


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="2,000 files (a few seconds)")
    ap.add_argument("--files", type=int, default=None, help="number of files (default 20,000)")
    ap.add_argument("--size", type=int, default=512, help="picture side in pixels (synthetic files)")
    ap.add_argument("--demo", action="store_true", help="scan a generated demo scenario instead")
    ap.add_argument("--image-scale", type=float, default=0.25, help="demo picture scale (with --demo)")
    ap.add_argument("--keep", type=Path, default=None, help="work in this folder and keep it")
    ap.add_argument("--progress", action="store_true", help="show progress bars")
    ap.add_argument("--workers", type=int, default=None, help="reading threads (default: min(2, cpus))")
    ap.add_argument("--scenario", type=Path, default=None,
                    help="scan this existing demo folder's sources with their metadata, read only")
    ap.add_argument("--compare-workers", action="store_true",
                    help="also time a first scan with 1 thread, into a second workspace")
    args = ap.parse_args(argv)
    if args.scenario is not None:
        return scan_scenario(args.scenario, args.progress)
    n = args.files or (2000 if args.quick else 20000)

    work = args.keep or Path(tempfile.mkdtemp(prefix="bench_scan_"))
    try:
        t = time.perf_counter()
        if args.demo:
            from curate.demo import generate_scenario

            scenario = generate_scenario(work / "demo", n_images=n, image_scale=args.image_scale,
                                         progress=args.progress)
            root = work / "demo" / "sources"
            kind = f"demo scenario, image scale {args.image_scale}"
        else:
            root = work / "images"
            write_files(root, n, args.size)
            kind = f"synthetic {args.size}x{args.size} JPEGs"
        made = time.perf_counter() - t
        n_files = sum(1 for _ in root.rglob("*") if _.is_file())
        print(f"{n_files} files ({kind}) written in {made:.1f} s under {root}")

        ws = Workspace.create(work / "ws")
        first, t_first = timed_scan(ws, root, "bench", args.progress, args.workers)
        again, t_again = timed_scan(ws, root, "bench", args.progress, args.workers)
        changed = touch_some(root, 0.01)
        partly, t_partly = timed_scan(ws, root, "bench", args.progress)

        def rate(count, seconds):
            return f"{count / seconds:10.0f} files/s  ({seconds:7.2f} s)"

        print(f"first scan      : {rate(first.files_seen, t_first)}  read {first.new}")
        print(f"re-scan, same   : {rate(again.files_seen, t_again)}  reused {again.reused}, read {again.new + again.redigested}")
        print(f"re-scan, 1% new : {rate(partly.files_seen, t_partly)}  re-read {partly.redigested} of {changed} changed")
        if args.compare_workers:
            _, t_single = timed_scan(Workspace.create(work / "ws1"), root, "bench", args.progress, 1)
            print(f"first scan, 1 thread: {rate(first.files_seen, t_single)}  "
                  f"(threads speed-up {t_single / t_first:.2f}x)")
        print(f"ratio first / re-scan (same tree): {t_first / t_again:.1f}x (target >= 20x)")
        print(f"ratio first / re-scan (1% changed): {t_first / t_partly:.1f}x")
        print(f"problems found: {first.report.counts() or 'none'}; "
              f"exact duplicates: {first.exact_duplicate_files} files in {first.exact_duplicate_groups} groups")
        ok = again.reused == again.files_seen and partly.redigested == changed
        return 0 if ok else 1
    finally:
        if args.keep is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
