"""Exhaustive k-pixel search: the engine against reference implementations in the same process.

Run from the repository root::

    python benchmarks/bench_lut.py            # all parts, 10,000 patches of 9x9
    python benchmarks/bench_lut.py --parts 2  # only the popcount-limit comparison

Parts (numbers are wall-clock seconds, best of ``--repeat`` runs unless marked "once"):

1. engine vs a per-subset loop (index the k columns, ``np.bincount`` the pattern codes) at
   k = 2, 3; the engine alone at k = 4. Goal: >= 100x at k = 3, identical optimum.
2. engine at k = 4 and k = 5 vs the popcount limit: one AND + popcount of the class's words per
   subset per class, on prepacked contiguous words, nothing else. Engine and limit alternate
   ``--repeat`` times; the ratio of their best times is printed with the range of the per-pair
   ratios. Goal: within 3x at k = 5. The k = 5 optimum is checked against the per-subset loop on
   20,000 random 5-sets (none may beat it, its own error must agree) and, in full, on 2,000
   patches of 5x5 (every 5-set). Then ``LutRule``'s plan: the estimated and measured time of the
   default fit of lut-5 (it must be exhaustive), and on 16x16 patches (``--side16``) lut-3's
   default fit (goal under 5 s) and lut-4's estimate.
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


def loop_errors(X, y, combos):
    """Optimal training error of each given pixel set, by the definition (codes + np.bincount)."""
    k = combos.shape[1]
    weights = 1 << np.arange(k)
    out = []
    for S in combos:
        codes = X[:, S].astype(np.intp) @ weights
        out.append(int(np.minimum(np.bincount(codes[y], minlength=2**k),
                                  np.bincount(codes[~y], minlength=2**k)).sum()))
    return np.array(out)


def part2(X, y, args):
    print("\n2. engine vs the popcount limit (AND + popcount of n/64 words per set per class), alternating")
    for k in (4,) if args.skip_k5 else (4, 5):
        lims, engs, got = [], [], None
        for _ in range(args.repeat):
            lims.append(popcount_limit(X, y, k, 1))
            t_eng, got = best_of(lambda k=k: engine_search(X, y, k, args.n_jobs), 1)
            engs.append(t_eng)
        pairs = [e / lim for e, lim in zip(engs, lims)]
        print(f"   k={k}: {comb(X.shape[1], k):,} sets  limit {min(lims):7.3f} s  engine {min(engs):7.3f} s  "
              f"engine/limit {min(engs) / min(lims):5.2f} (pairs {min(pairs):.2f}-{max(pairs):.2f}, "
              f"{args.repeat} each)  optimum {got}")
        if k == 5:
            rng = np.random.default_rng(5)
            sample = np.sort(np.array([rng.choice(X.shape[1], 5, replace=False) for _ in range(20_000)]), axis=1)
            own = loop_errors(X, y, np.array([got[0]]))[0]
            beaten = int((loop_errors(X, y, sample) < got[1]).sum())
            print(f"        loop check: its own error {own} ({'agrees' if own == got[1] else 'DIFFERS'}), "
                  f"random 5-sets that beat it: {beaten} of 20,000")
    if args.n_jobs != 1:
        t_eng, _ = best_of(lambda: engine_search(X, y, 4, args.n_jobs), args.repeat)
        t_one, _ = best_of(lambda: engine_search(X, y, 4, 1), args.repeat)
        print(f"   k=4 one thread {t_one:7.3f} s  ({t_one / t_eng:4.2f}x from n_jobs={args.n_jobs})")
    if not args.skip_k5:
        Xs, ys = make_patches(2000, 5, args.seed)
        t_loop, ref = best_of(lambda: loop_search(Xs, ys, 5), 1)
        t_eng, got = best_of(lambda: engine_search(Xs, ys, 5, 1), 1)
        print(f"   k=5 on 2,000 5x5 patches (every one of {comb(25, 5):,} sets): loop {t_loop:.2f} s, engine "
              f"{t_eng:.3f} s, optimum {'identical' if ref == got else f'DIFFERENT {ref} vs {got}'} {got}")
        plan_line(X, y, 5, args)
    if args.side16:
        X16, y16 = make_patches(len(X), 16, args.seed)
        plan_line(X16, y16, 3, args)
        plan = LutRule(k=4).plan(X16, y16)
        print(f"   16x16 k=4: {plan.sets:,} sets, estimated {plan.estimated_seconds:.1f} s exhaustive, "
              f"default: {plan.method} from size {plan.largest_exact_size}")


def plan_line(X, y, k, args):
    """The default LutRule fit: its plan (estimate, decision) against its measured time."""
    t, rule = best_of(lambda: LutRule(k=k, n_jobs=args.n_jobs).fit(X, y), 1)
    side = int(round(X.shape[1] ** 0.5))
    print(f"   LutRule(k={k}) on {len(X):,} {side}x{side} patches, default options: {rule.search_}, "
          f"estimated {rule.plan_.estimated_seconds:.2f} s, fit took {t:.2f} s (plan included), "
          f"train errors {rule.train_errors_}")


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
    ap.add_argument("--side16", action="store_true", help="part 2: also lut-3 and lut-4's plan on 16x16 patches")
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
