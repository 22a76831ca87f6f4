"""The class sizes that summary.json reports, checked by counting and by formulas written out here.

The counts are done by brute force on tiny cases (every rule listed and counted), independently of
pixelfit's own code; the formulas for the sizes a real `pixelfit fit` reports are written out in
this file ("common combinatorics": C(p, k) ways to choose k of p pixels, 2^(2^k) truth tables on
k bits, 2^(2^p) Boolean functions of p bits, two constant rules).
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest

from pixelfit.cli import main
from pixelfit.evaluate import log2_lut_class, log2_memorize_class, log2_tree_class


def _count_lut_rules(p: int, k: int) -> int:
    """Every k-pixel truth-table rule as a distinct (pixel set, table) pair, listed and counted."""
    rules = set()
    for pixels in itertools.combinations(range(p), k):
        for table in itertools.product((False, True), repeat=2**k):
            rules.add((pixels, table))
    return len(rules)


def _trees(p: int, depth: int) -> list:
    """Every syntactic tree of depth <= ``depth`` over p binary pixels: a leaf labelled 0 or 1, or
    a split on one pixel with a subtree for 0 and one for 1, each of depth <= depth - 1."""
    leaves: list = [("leaf", 0), ("leaf", 1)]
    if depth == 0:
        return leaves
    below = _trees(p, depth - 1)
    return leaves + [("split", j, lo, hi) for j in range(p) for lo in below for hi in below]


def _tree_predict(tree, bits) -> int:
    while tree[0] == "split":
        tree = tree[3] if bits[tree[1]] else tree[2]
    return tree[1]


@pytest.mark.parametrize("p,k", [(1, 1), (3, 1), (3, 2), (4, 2), (5, 2), (4, 3), (5, 3), (6, 3)])
def test_lut_class_size_by_counting(p, k):
    n = _count_lut_rules(p, k)
    assert n == math.comb(p, k) * 2 ** (2**k)  # common combinatorics
    assert 2 ** log2_lut_class(p, k) == pytest.approx(n, rel=1e-9)


@pytest.mark.parametrize("p,d", [(1, 0), (1, 1), (2, 1), (3, 1), (1, 2), (2, 2), (3, 2), (1, 3), (2, 3)])
def test_tree_class_size_by_counting(p, d):
    trees = _trees(p, d)
    assert len(set(trees)) == len(trees)  # all syntactically distinct
    assert 2 ** log2_tree_class(p, d) == pytest.approx(len(trees), rel=1e-9)
    # Counting trees over-counts the functions they compute (so the bound only loosens): the
    # distinct truth tables of all these trees over the 2^p inputs never outnumber them.
    inputs = list(itertools.product((0, 1), repeat=p))
    functions = {tuple(_tree_predict(t, x) for x in inputs) for t in trees}
    assert len(functions) <= len(trees)
    if d >= p:  # a tree as deep as the pixels are many computes every Boolean function
        assert len(functions) == 2 ** (2**p)


def test_memorize_class_size_by_counting():
    # All Boolean functions of p bits, listed as truth tables over the 2^p inputs.
    for p in (1, 2, 3):
        n = len(set(itertools.product((0, 1), repeat=2**p)))
        assert n == 2 ** (2**p) and 2 ** log2_memorize_class(p) == n


def _tree_count_written_out(p: int, d: int) -> int:
    # A tree of depth <= d is a leaf (two labels) or a split on one of p pixels over two trees of
    # depth <= d - 1: T(0) = 2, T(d) = 2 + p T(d - 1)^2 (common combinatorics; exact integers).
    t = 2
    for _ in range(d):
        t = 2 + p * t * t
    return t


def test_summary_class_sizes_follow_the_formulas(tmp_path):
    rng = np.random.default_rng(5)
    side = 5
    p = side * side
    imgs = rng.integers(0, 256, (60, side, side), dtype=np.uint8)
    labels = np.where(imgs[:, 2, 2] > 127, "on", "off")
    np.savez(tmp_path / "s.npz", images=imgs, labels=labels)
    out = tmp_path / "out"
    assert main(["fit", str(tmp_path / "s.npz"), "--out", str(out), "--folds", "0",
                 "--families", "constant,lut,tree,memorize", "--sizes", "lut=1,2,3,4", "--sizes", "tree=1,2,3,4"]) == 0
    s = json.loads((out / "summary.json").read_text())
    got = {(r["family"], r["size"]): r["log2_class_size"] for r in s["rungs"]}
    assert {f for f, _ in got} == {"constant", "lut", "tree", "memorize"}
    for (family, size), log2_h in got.items():
        if family == "constant":
            expect = math.log2(2)  # always-positive or always-negative
        elif family == "lut":
            expect = math.log2(math.comb(p, size)) + 2**size
        elif family == "tree":
            expect = math.log2(_tree_count_written_out(p, size))
        else:
            expect = float(2**p)  # log2 of 2^(2^p)
        assert log2_h == pytest.approx(expect, rel=1e-12), (family, size)
