"""The whole default ladder on invented 10x10 patches: seconds per rung and in total.

Run from the repository root::

    python benchmarks/bench_ladder.py                 # 2,000 patches, every default family
    python benchmarks/bench_ladder.py --families lut  # only the truth-table rungs

Goal: the default ladder on 2,000 10x10 patches in under a minute on a 2-core machine.
The patches are gray, with a faint spot on positives plus noise; they exist only for timing.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from pixelfit.data import Binarizer, Dataset
from pixelfit.families import FAMILY_ORDER, plan_rungs
from pixelfit.ladder import prepare, run_ladder


def make_dataset(n: int, side: int, seed: int) -> Dataset:
    rng = np.random.default_rng(seed)
    images = rng.normal(90, 35, (n, side, side))
    labels = np.where(rng.random(n) < 0.35, "mark", "clean")
    for i in np.flatnonzero(labels == "mark"):
        r, c = rng.integers(2, side - 4, 2)
        images[i, r : r + 3, c : c + 2] += rng.uniform(40, 110)
    images = np.clip(images, 0, 255).astype(np.uint8)
    return Dataset(images, labels, [f"#{i}" for i in range(n)], "bench", "npz")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--patches", type=int, default=2000)
    ap.add_argument("--side", type=int, default=10)
    ap.add_argument("--families", default=",".join(FAMILY_ORDER))
    ap.add_argument("--folds", type=int, default=5)
    args = ap.parse_args(argv)
    prep = prepare(make_dataset(args.patches, args.side, 0), Binarizer("otsu"), positive="mark")
    rungs = plan_rungs(args.families.split(","), prep.n_pixels)
    print(f"{args.patches:,} patches of {args.side}x{args.side}, {len(rungs)} rungs, folds={args.folds}, "
          f"cpus={os.cpu_count()}, load average {os.getloadavg()[0]:.2f}")
    t0 = time.perf_counter()
    per_family: dict[str, float] = {}
    for step in run_ladder(prep, rungs, folds=args.folds):
        if step.rung is not None:
            r = step.rung
            per_family[r.family] = per_family.get(r.family, 0.0) + r.seconds
            print(f"   {r.key:<14} {r.seconds:8.2f} s")
    total = time.perf_counter() - t0
    print("   by family: " + ", ".join(f"{f} {s:.1f} s" for f, s in per_family.items()))
    print(f"   whole ladder {total:.1f} s (goal < 60 s)")


if __name__ == "__main__":
    main()
