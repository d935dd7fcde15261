"""Radius search speed: multi-index hashing (curate.hamming_index) against blocked numpy brute force.

Codes: uniformly random 64-bit codes plus planted near copies (10% of the codes
are copies of others with 0..6 bits flipped). Task: all pairs within 8 bits.

Prints, measured in this run:
- brute force (blocks of rows, XOR + ``np.bitwise_count``, upper triangle) and
  the index at the brute-force size (default 200,000 codes), their ratio, and
  whether both give the same pair set;
- the index at 100k, 1M and 4M codes: seconds, pairs, growth ratio against the
  smallest size, and peak memory (each size in a fresh process: peak resident
  set (VmHWM) and the peak of numpy allocations traced by
  ``tracemalloc``).

Targets: 1,000,000 codes in at most 60 s on the 2-core machine; at least 30x
faster than brute force at 200,000 codes.

Usage::

    python benchmarks/bench_radius_search.py [--quick] [--radius 8]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
import tracemalloc

import numpy as np


def make_codes(n: int, seed: int = 0, copy_share: float = 0.1, max_flips: int = 6) -> np.ndarray:
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, 2**64 - 1, size=n, dtype=np.uint64, endpoint=True)
    k = int(n * copy_share)
    src = rng.integers(0, n - k, size=k)
    flips = np.zeros(k, np.uint64)
    n_flips = rng.integers(0, max_flips + 1, size=k)
    for b in range(max_flips):
        bit = np.uint64(1) << rng.integers(0, 64, size=k).astype(np.uint64)
        flips ^= np.where(b < n_flips, bit, np.uint64(0))
    codes[n - k:] = codes[src] ^ flips
    return codes


def brute_force_pairs(codes: np.ndarray, radius: int, block: int = 512):
    """All pairs within ``radius``: blocks of rows against the rest, XOR + popcount (numpy >= 2)."""
    out_i, out_j = [], []
    n = codes.shape[0]
    for start in range(0, n, block):
        rows = codes[start:start + block]
        d = np.bitwise_count(rows[:, None] ^ codes[None, start:])
        r, c = np.nonzero(d <= radius)
        keep = c > r  # upper triangle (column offset is relative to start)
        out_i.append(r[keep] + start)
        out_j.append(c[keep] + start)
    return np.concatenate(out_i), np.concatenate(out_j)


def _peak_rss_kib() -> float:
    """Peak resident set of this process (Linux VmHWM, which exec resets; else getrusage)."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return float(line.split()[1])
    except OSError:
        pass
    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)  # KiB on Linux


def _one(n: int, radius: int) -> dict:
    """Run the index once on n codes (called in a fresh process) and report time and memory."""
    from curate.hamming_index import choose_substrings, radius_pairs

    radius_pairs(make_codes(2000, 1), radius)  # compile / load cached kernels outside the timing
    codes = make_codes(n)
    tracemalloc.start()
    started = time.perf_counter()
    i, _, _ = radius_pairs(codes, radius)
    seconds = time.perf_counter() - started
    _, traced_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss_kib = _peak_rss_kib()
    return {"n": n, "seconds": seconds, "pairs": int(i.size), "substrings": choose_substrings(n, radius),
            "numpy_peak_mib": traced_peak / 2**20, "peak_rss_mib": rss_kib / 1024}


def _in_fresh_process(n: int, radius: int) -> dict:
    out = subprocess.run([sys.executable, __file__, "--one", str(n), "--radius", str(radius)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Radius search: index against brute force.")
    parser.add_argument("--quick", action="store_true", help="small sizes (for CI smoke runs)")
    parser.add_argument("--radius", type=int, default=8)
    parser.add_argument("--one", type=int, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one is not None:
        print(json.dumps(_one(args.one, args.radius)))
        return 0

    from curate.hamming_index import radius_pairs

    brute_n = 20_000 if args.quick else 200_000
    sizes = [20_000, 100_000, 200_000] if args.quick else [100_000, 1_000_000, 4_000_000]
    r = args.radius
    print(f"radius {r} bits; codes: random 64-bit plus 10% planted copies with 0..6 bits flipped")

    print("\nindex alone, each size in a fresh process (peak RSS: VmHWM of that process):")
    print(f"  {'codes':>10} {'seconds':>9} {'x smallest':>10} {'pairs':>10} {'m':>3} {'peak RSS MiB':>13} "
          f"{'numpy peak MiB':>15}")
    rows = [_in_fresh_process(n, r) for n in sizes]
    base = rows[0]["seconds"]
    for row in rows:
        print(f"  {row['n']:>10,} {row['seconds']:>9.2f} {row['seconds'] / base:>10.1f} {row['pairs']:>10,} "
              f"{row['substrings']:>3} {row['peak_rss_mib']:>13.0f} {row['numpy_peak_mib']:>15.0f}")
    print(f"  (codes grow {sizes[-1] / sizes[0]:.0f}x from first to last size)")
    codes = make_codes(brute_n)
    radius_pairs(codes[:2000], r)  # compile outside the timing
    t0 = time.perf_counter()
    bi, bj = brute_force_pairs(codes, r)
    brute_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    ii, jj, _ = radius_pairs(codes, r)
    index_s = time.perf_counter() - t0
    order = np.lexsort((bj, bi))
    same = np.array_equal(bi[order], ii) and np.array_equal(bj[order], jj)
    print(f"\n{brute_n:,} codes, side by side:")
    print(f"  blocked numpy brute force  {brute_s:8.2f} s  {bi.size:,} pairs")
    print(f"  multi-index hashing        {index_s:8.2f} s  {ii.size:,} pairs  same pair set: {same}")
    print(f"  speed-up                   {brute_s / index_s:8.1f}x  (target >= 30x)")

    million = [row for row in rows if row["n"] == 1_000_000]
    if million:
        print(f"\n1,000,000 codes: {million[0]['seconds']:.1f} s (target <= 60 s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
