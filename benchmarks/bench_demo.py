"""Demo scenario generation speed: one worker vs two, and generation vs the pipeline.

    python benchmarks/bench_demo.py            # 600 files (the default scenario)
    python benchmarks/bench_demo.py --quick    # 100 files
    python benchmarks/bench_demo.py --images 100000 --skip-single --skip-pipeline

Prints wall times and ratios measured side by side in one run: the speed-up
of two drawing processes over one (same seed, byte-identical output), the
time per file, and how long the pipeline takes relative to generating the data.
Times depend on the machine and on what else runs on it; compare the ratios.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path


def _generate(folder: Path, n: int, workers: int) -> float:
    from curate.demo import generate_scenario

    started = time.perf_counter()
    generate_scenario(folder, n_images=n, random_state=0, progress=False, workers=workers)
    return time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="100 files instead of 600")
    parser.add_argument("--images", type=int, help="number of files (overrides --quick)")
    parser.add_argument("--skip-single", action="store_true", help="do not time the one-worker run")
    parser.add_argument("--skip-pipeline", action="store_true", help="do not time the pipeline")
    args = parser.parse_args()
    n = args.images or (100 if args.quick else 600)

    with tempfile.TemporaryDirectory() as tmp:
        two = _generate(Path(tmp) / "two", n, workers=2)
        print(f"generate {n} files, 2 workers: {two:8.1f} s  ({1000 * two / n:.1f} ms per file)")
        if not args.skip_single:
            one = _generate(Path(tmp) / "one", n, workers=1)
            print(f"generate {n} files, 1 worker:  {one:8.1f} s  ({1000 * one / n:.1f} ms per file)")
            print(f"ratio 1 worker / 2 workers: {one / two:.2f}x")
        if not args.skip_pipeline:
            from curate.pipeline import run_pipeline

            started = time.perf_counter()
            summary = run_pipeline(Path(tmp) / "two", progress=False, echo=lambda line: None)
            pipe = time.perf_counter() - started
            print(f"pipeline on {n} files: {pipe:8.1f} s; ratio pipeline / generation: {pipe / two:.2f}x")
            print("  per step (s): " + ", ".join(f"{k} {v:.1f}" for k, v in summary["seconds"].items()))
            print(f"generation + pipeline: {two + pipe:.1f} s")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak resident memory of this process: {peak:.0f} MB (workers not included)")


if __name__ == "__main__":
    main()
