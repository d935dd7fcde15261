"""Time to show the next pair in the review widget, with a cold and a warm thumbnail cache.

    python benchmarks/bench_review.py [--quick] [--images N] [--size PX]

Builds a demo workspace (curate.demo.generate_scenario + curate.pipeline.run_pipeline,
600 x 450 clinical and 512 x 512 dermoscopic JPEGs), takes its candidate pairs
(table ``pairs``; if the pairs step has not filled it, consecutive catalog
images are paired instead, which costs the display the same), then for the
same pairs, side by side in one run:

- cold: the thumbnail cache folder is emptied first, so each pair's
  thumbnails are made from the original files (decode, shrink, write);
- warm: the same pairs again, thumbnails read from the cache;
- warm, difference view: as warm, plus the difference picture.

Each figure is the wall time of ``ReviewWidget``'s "Next" (button click ->
both pictures oriented, squared, JPEG-encoded and set on the widgets, plus the
prefetch of the next pair's thumbnails into memory), without a browser; each
of the three runs starts a new widget, so no decoded thumbnail is carried over.
The machine's load is printed too: other work on a shared machine slows every row. The target is
well under 200 ms per pair; the ratios to that budget and between cold and
warm are printed.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import tempfile
import time
from pathlib import Path

BUDGET_MS = 200.0


def build_workspace(folder: Path, n_images: int):
    from curate.demo import generate_scenario
    from curate.pipeline import run_pipeline
    from curate.store import Workspace

    generate_scenario(folder, n_images=n_images, random_state=0, progress=False)
    summary = run_pipeline(folder, progress=False, echo=lambda line: None)
    ws = Workspace.open(summary["workspace"])
    n_pairs = int(ws.read_sql("SELECT COUNT(*) AS n FROM pairs")["n"].iloc[0])
    origin = "pairs step"
    if n_pairs < 10:
        ids = ws.read_sql("SELECT image_id FROM images WHERE decodable = 1 ORDER BY image_id")
        ids = ids["image_id"].tolist()
        with ws.transaction() as con:
            con.execute("DELETE FROM pairs")
            for n, (a, b) in enumerate(zip(ids[:-1], ids[1:])):
                con.execute(
                    "INSERT INTO pairs(image_a, image_b, orientation, crop, score, verdict) "
                    "VALUES (?, ?, ?, 0, ?, 'possible')",
                    (a, b, n % 8, 0.3 + 0.4 * ((n * 37) % 100) / 100),
                )
        origin = "consecutive images (the pairs step had not filled table pairs)"
    return ws, origin


def time_pairs(ws, n_pairs: int, *, size: int, mode: str = "side_by_side") -> list[float]:
    from curate.review import ReviewWidget

    widget = ReviewWidget(ws, reviewer="bench", size=size)
    if mode != "side_by_side":
        widget.view.value = mode
    times = []
    for _ in range(n_pairs):
        t0 = time.perf_counter()
        widget.buttons["next"].click()
        times.append((time.perf_counter() - t0) * 1000.0)
    return times


def describe(times: list[float]) -> str:
    q = statistics.quantiles(times, n=20)
    return (f"median {statistics.median(times):6.1f} ms   p95 {q[-1]:6.1f} ms   "
            f"max {max(times):6.1f} ms")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small demo, fewer pairs")
    ap.add_argument("--images", type=int, default=None, help="demo size (default 300; quick 80)")
    ap.add_argument("--pairs", type=int, default=None, help="pairs timed (default 60; quick 20)")
    ap.add_argument("--size", type=int, default=320, help="display size in pixels")
    args = ap.parse_args()
    n_images = args.images or (80 if args.quick else 300)
    n_pairs = args.pairs or (20 if args.quick else 60)

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        ws, origin = build_workspace(Path(tmp) / "demo", n_images)
        total = int(ws.read_sql("SELECT COUNT(*) AS n FROM pairs")["n"].iloc[0])
        n_pairs = min(n_pairs, total - 1)
        print(f"demo: {n_images} images, {total} candidate pairs from {origin} "
              f"(built in {time.perf_counter() - t0:.1f} s); timing {n_pairs} pairs, "
              f"display {args.size} px")
        shutil.rmtree(ws.path / "thumbnails", ignore_errors=True)
        cold = time_pairs(ws, n_pairs, size=args.size)
        warm = time_pairs(ws, n_pairs, size=args.size)
        diff = time_pairs(ws, n_pairs, size=args.size, mode="difference")

    print(f"load average (1 min): {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"cold cache            {describe(cold)}")
    print(f"warm cache            {describe(warm)}")
    print(f"warm, difference view {describe(diff)}")
    mc, mw, md = (statistics.median(t) for t in (cold, warm, diff))
    print(f"ratio cold / warm (median): {mc / mw:.1f}x")
    print(f"ratio to the {BUDGET_MS:.0f} ms budget (median): cold {mc / BUDGET_MS:.3f}, "
          f"warm {mw / BUDGET_MS:.3f}, difference {md / BUDGET_MS:.3f}")


if __name__ == "__main__":
    main()
