"""Exhaustive k-pixel search: the engine against reference implementations in the same process.

Run from the repository root::

    python benchmarks/bench_lut.py            # all parts, 10,000 patches of 9x9
    python benchmarks/bench_lut.py --parts 2  # only the popcount-limit comparison

Parts (numbers are wall-clock seconds, best of ``--repeat`` runs unless marked "once"):

1. engine vs a per-subset loop (index the k columns, ``np.bincount`` the pattern codes) at
   k = 2, 3; the engine alone at k = 4. Goal: >= 100x at k = 3, identical optimum.
2. engine at k = 4 vs the popcount limit: one AND + popcount of the class's words per subset per
   class, on prepacked contiguous words, nothing else. Goal: within 3x; k = 5 under a minute.
3. scikit-learn's SequentialFeatureSelector (depth-3 tree, 3 features, cv = 5) vs the exhaustive
   k = 3 rule: time ratio (goal >= 30x) and training errors (ours must not be higher).
4. repeated patches (the same number drawn from only 300 distinct ones): k = 4 with duplicates
   collapsed into weights vs with every patch packed once.

The data are invented: smooth random blobs with noise, labelled by a hidden 3-pixel rule with
10 % label noise, so the search has a real optimum and many near-ties.
"""

from __future__ import annotations

import argparse
import itertools
import os
import sys
import time
from math import comb

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from pixelfit.models import LutRule, lut_engine
from pixelfit.models.lut_engine import CountIndex, exhaustive_best, pack_columns


def make_patches(n: int, side: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Binary patches (n, side*side) with spatially correlated pixels, and a noisy planted label."""
    rng = np.random.default_rng(seed)
    field = rng.normal(size=(n, side + 2, side + 2))
    # 3x3 box blur: neighbouring pixels agree more often than not, as in real patches.
    smooth = sum(field[:, i : i + side, j : j + side] for i in range(3) for j in range(3))
    X = (smooth + rng.normal(scale=1.5, size=smooth.shape) > 0.3).reshape(n, -1)
    a, b, c = rng.choice(side * side, 3, replace=False)
    y = (X[:, a] & ~X[:, b]) | (X[:, b] & X[:, c])
    y ^= rng.random(n) < 0.10
    return X, y


def best_of(fn, repeat: int):
    times, out = [], None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def loop_search(X, y, k):
    """The straightforward definition: every k-subset in lexicographic order, first strict minimum."""
    weights = 1 << np.arange(k)
    best, best_err = None, None
    for S in itertools.combinations(range(X.shape[1]), k):
        codes = X[:, S].astype(np.intp) @ weights
        err = np.minimum(np.bincount(codes[y], minlength=2**k), np.bincount(codes[~y], minlength=2**k)).sum()
        if best_err is None or err < best_err:
            best, best_err = S, int(err)
    return best, best_err


def engine_search(X, y, k, n_jobs):
    combos, errs, _ = exhaustive_best(CountIndex(X, y), k, n_jobs=n_jobs)
    return tuple(int(v) for v in combos[0]), int(errs[0])


def popcount_limit(X, y, k, repeat):
    """Seconds for C(p, k) x (AND + popcount + sum) of each class's words, blocks prepacked."""
    p = X.shape[1]
    total = comb(p, k)
    rows = 4096
    rng = np.random.default_rng(0)
    blocks = []
    for Xc in (X[y], X[~y]):
        w = pack_columns(Xc).shape[1]
        blocks.append((rng.integers(0, 2**63, (rows, w), dtype=np.uint64),
                       rng.integers(0, 2**63, (rows, w), dtype=np.uint64)))
    full, rest = divmod(total, rows)

    def run():
        for a, b in blocks:
            for _ in range(full):
                np.bitwise_count(a & b).sum(axis=1)
            np.bitwise_count(a[:rest] & b[:rest]).sum(axis=1)

    return best_of(run, repeat)[0]


def part1(X, y, args):
    print("\n1. engine vs per-subset bincount loop")
    for k in (2, 3):
        t_loop, ref = best_of(lambda k=k: loop_search(X, y, k), 1)
        t_eng, got = best_of(lambda k=k: engine_search(X, y, k, args.n_jobs), args.repeat)
        print(f"   k={k}: {comb(X.shape[1], k):>9,} sets  loop {t_loop:8.3f} s (once)  engine {t_eng:7.3f} s  "
              f"ratio {t_loop / t_eng:7.1f}x  optimum {'identical' if ref == got else f'DIFFERENT {ref} vs {got}'}"
              f" {got}")
    t_eng, got = best_of(lambda: engine_search(X, y, 4, args.n_jobs), args.repeat)
    print(f"   k=4: {comb(X.shape[1], 4):>9,} sets  engine {t_eng:7.3f} s  optimum {got}")


def part2(X, y, args):
    print("\n2. engine vs the popcount limit (AND + popcount of n/64 words per set per class)")
    for k in (4,):
        t_lim = popcount_limit(X, y, k, args.repeat)
        t_eng, got = best_of(lambda k=k: engine_search(X, y, k, args.n_jobs), args.repeat)
        print(f"   k={k}: limit {t_lim:7.3f} s  engine {t_eng:7.3f} s  engine/limit {t_eng / t_lim:5.2f}")
        if args.n_jobs != 1:
            t_one, _ = best_of(lambda k=k: engine_search(X, y, k, 1), args.repeat)
            print(f"        one thread {t_one:7.3f} s  ({t_one / t_eng:4.2f}x from n_jobs={args.n_jobs})")
    if not args.skip_k5:
        t5, got = best_of(lambda: engine_search(X, y, 5, args.n_jobs), 1)
        print(f"   k=5: {comb(X.shape[1], 5):,} sets  engine {t5:7.2f} s (once)  optimum {got}")


def part3(X, y, args):
    from sklearn.feature_selection import SequentialFeatureSelector
    from sklearn.tree import DecisionTreeClassifier

    print("\n3. SequentialFeatureSelector (depth-3 tree, 3 features, cv=5) vs exhaustive k=3")

    def sfs():
        tree = DecisionTreeClassifier(max_depth=3, random_state=0)
        sel = SequentialFeatureSelector(tree, n_features_to_select=3, cv=5).fit(X, y)
        cols = np.flatnonzero(sel.get_support())
        fitted = DecisionTreeClassifier(max_depth=3, random_state=0).fit(X[:, cols], y)
        return cols, int((fitted.predict(X[:, cols]) != y).sum())

    def ours():
        rule = LutRule(k=3, n_jobs=args.n_jobs).fit(X, y)
        return rule.pixels_, rule.train_errors_

    t_sfs, (cols, e_sfs) = best_of(sfs, 1)
    t_ours, (pix, e_ours) = best_of(ours, args.repeat)
    print(f"   SFS {t_sfs:7.2f} s (once) pixels {cols.tolist()} train errors {e_sfs}")
    print(f"   lut {t_ours:7.3f} s        pixels {pix.tolist()} train errors {e_ours}")
    print(f"   time ratio {t_sfs / t_ours:6.1f}x   errors ours <= theirs: {e_ours <= e_sfs}")


def part4(X, y, args):
    print("\n4. repeated patches: duplicates collapsed into weights vs packed one by one (k=4)")
    rows = np.random.default_rng(1).integers(0, 300, len(X))
    Xr, yr = X[rows], y[rows]
    t_w, got_w = best_of(lambda: engine_search(Xr, yr, 4, args.n_jobs), args.repeat)
    words = CountIndex(Xr, yr).n_words
    collapse = lut_engine._weight_planes
    lut_engine._weight_planes = lambda Xc: [(Xc, 1)]
    try:
        t_p, got_p = best_of(lambda: engine_search(Xr, yr, 4, args.n_jobs), args.repeat)
        plain = CountIndex(Xr, yr).n_words
    finally:
        lut_engine._weight_planes = collapse
    print(f"   {words} words instead of {plain}: collapsed {t_w:.3f} s, plain {t_p:.3f} s, "
          f"ratio {t_p / t_w:.1f}x, optimum {'identical' if got_w == got_p else 'DIFFERENT'}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--patches", type=int, default=10_000)
    ap.add_argument("--side", type=int, default=9)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--n-jobs", type=int, default=-1)
    ap.add_argument("--parts", default="1,2,3,4")
    ap.add_argument("--skip-k5", action="store_true")
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args(argv)
    X, y = make_patches(args.patches, args.side, args.seed)
    print(f"{args.patches:,} patches of {args.side}x{args.side}, {int(y.sum()):,} positive; "
          f"n_jobs={args.n_jobs}, cpus={os.cpu_count()}, load average {os.getloadavg()[0]:.2f}")
    parts = {"1": part1, "2": part2, "3": part3, "4": part4}
    for p in args.parts.split(","):
        parts[p.strip()](X, y, args)


if __name__ == "__main__":
    main()
