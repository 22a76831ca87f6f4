"""Time the whole default ladder on 2,000 patches of 10x10, rung by rung.

Run:  python benchmarks/bench_ladder.py [--patches 2000] [--side 10]

The reference in the same process is one plain scikit-learn fit of a depth-3 tree with 5-fold
cross_val_score on the same data, so the printed ratio says how many such "notebook baselines"
the full ladder costs. The goal for the ladder itself is under 60 s on a 2-core machine.
"""

from __future__ import annotations

import argparse
import time
from collections import defaultdict

import numpy as np
from sklearn.model_selection import cross_val_score
from sklearn.tree import DecisionTreeClassifier

from pixelfit.data import Binarizer, Dataset
from pixelfit.ladder import conclude, prepare, run_ladder
from pixelfit.models import parse_families, plan_rungs


def synthetic(n: int, side: int, seed: int = 0) -> Dataset:
    rng = np.random.default_rng(seed)
    imgs = rng.normal(90, 35, (n, side, side))
    y = rng.random(n) < 0.35
    rr, cc = np.mgrid[0:side, 0:side]
    for i in np.flatnonzero(y):
        r0, c0 = side / 2 + rng.normal(0, 1.2), side / 2 + rng.normal(0, 1.2)
        imgs[i] += 110 * np.exp(-((rr - r0) ** 2 + (cc - c0) ** 2) / 4.0)
    y ^= rng.random(n) < 0.04
    return Dataset(np.clip(imgs, 0, 255).astype(np.uint8), np.where(y, "pos", "neg"),
                   [f"#{i}" for i in range(n)], "synthetic", "npz")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--patches", type=int, default=2000)
    ap.add_argument("--side", type=int, default=10)
    args = ap.parse_args()
    ds = synthetic(args.patches, args.side)
    prep = prepare(ds, Binarizer.parse("otsu"))
    t = time.perf_counter()
    cross_val_score(DecisionTreeClassifier(max_depth=3, random_state=0), prep.X_train, prep.y_train, cv=5)
    ref = time.perf_counter() - t
    plan = plan_rungs(parse_families(None), prep.n_pixels)
    per_family: dict[str, float] = defaultdict(float)
    rungs = []
    t0 = time.perf_counter()
    for pr in run_ladder(prep, plan, folds=5):
        if pr.rung:
            rungs.append(pr.rung)
            per_family[pr.rung.family] += pr.rung.seconds
    total = time.perf_counter() - t0
    rec = conclude(rungs, prep.y_test)
    print(f"default ladder: {len(rungs)} rungs on {args.patches} patches of {args.side}x{args.side}, 5 folds")
    for fam, secs in per_family.items():
        print(f"  {fam:<9} {secs:7.2f} s")
    slowest = sorted(rungs, key=lambda r: -r.seconds)[:5]
    print("  slowest rungs: " + ", ".join(f"{r.key} {r.seconds:.2f} s" for r in slowest))
    print(f"total {total:.1f} s (goal < 60 s); reference tree-3 5-fold CV {ref * 1000:.1f} ms; "
          f"ladder / reference = {total / ref:.0f}x; recommended {rec.key if rec else None}")


if __name__ == "__main__":
    main()
