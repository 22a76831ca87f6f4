"""Speed and memory of the data check on many patches, against a bare pass over the same data.

Run from the repository root::

    python benchmarks/bench_check.py               # 1,000,000 patches of 16x16
    python benchmarks/bench_check.py --n 200000    # smaller, quicker

The patches are invented noise generated here, with 5 % planted exact copies (half of them of a
patch of the other class) and a quarter held out at random. Timed: grouping the grey patches,
binarizing them (Otsu over the training part), and :func:`check_data` (binary groups, conflicts,
leakage, near-duplicates within one bit). Memory: the peak of numpy allocations during the check,
traced by ``tracemalloc``, beyond the patches themselves. Reference: one ``np.sort`` of the patches'
first 8 bytes as uint64 (a single sort of n keys), so the ratio says how many sorts the check costs.
Goals: under 10 s and under 1 GB extra for 1,000,000 patches.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import tracemalloc

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from pixelfit.data import Binarizer, check_data, grey_groups, pack_binarized  # noqa: E402


def make_patches(n: int, side: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    images = rng.integers(0, 256, (n, side, side), dtype=np.uint8)
    labels = np.where(rng.random(n) < 0.3, "mark", "clean")
    copies = rng.choice(n, n // 20, replace=False)
    images[copies] = images[rng.integers(0, n, len(copies))]
    test = rng.random(n) < 0.25
    return images, labels, test


def run_check(images, labels, test):
    grey = grey_groups(images)
    b = Binarizer("otsu").fit(images[~test])
    packed = np.concatenate([pack_binarized(b.transform(images[a:a + 65536])) for a in range(0, len(images), 65536)])
    return check_data(images, labels, labels == "mark", packed, images.shape[1] * images.shape[2], test, grey)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--side", type=int, default=16)
    args = ap.parse_args()
    images, labels, test = make_patches(args.n, args.side)
    print(f"{args.n:,} patches of {args.side}x{args.side} ({images.nbytes / 2**20:.0f} MiB), {int(test.sum()):,} held out")
    t0 = time.perf_counter()
    np.sort(np.ascontiguousarray(images.reshape(args.n, -1)[:, :8]).view(np.uint64).ravel())
    ref = time.perf_counter() - t0
    tracemalloc.start()
    t0, c0 = time.perf_counter(), time.process_time()
    check = run_check(images, labels, test)
    took, cpu = time.perf_counter() - t0, time.process_time() - c0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    f = check.figures
    # On a machine shared with other work the wall time waits for the CPU; the CPU time does not.
    print(f"check: {took:.2f} s wall, {cpu:.2f} s CPU ({took / ref:.1f}x one sort of n keys, {ref:.2f} s); "
          f"peak extra memory {peak / 2**20:.0f} MiB")
    print(f"found: {f['duplicate_groups']:,} duplicate groups ({f['duplicate_patches']:,} patches), "
          f"{f['leaked_test_grey']:,} grey leaks, {f['leaked_test_binary']:,} binary leaks, "
          f"{f['near_duplicate_test']:,} near-duplicates, {f['conflict_groups']:,} conflict groups")
    print(f"goals: time < 10 s: {'met' if took < 10 else 'NOT met'} (wall), {'met' if cpu < 10 else 'NOT met'} (CPU); "
          f"memory < 1 GB: {'met' if peak < 2**30 else 'NOT met'}")


if __name__ == "__main__":
    main()
