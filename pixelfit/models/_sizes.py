"""Sizes of rule classes (log2 of how many rules a family of a given size holds).

Pure counting; the bounds that use these sizes live in :mod:`pixelfit.evaluate`.
"""

from __future__ import annotations

import math

LN2 = math.log(2.0)


def log2_comb(n: int, k: int) -> float:
    """log2 of the binomial coefficient C(n, k)."""
    if k < 0 or k > n:
        return float("-inf")
    return (math.lgamma(n + 1) - math.lgamma(k + 1) - math.lgamma(n - k + 1)) / LN2


def log2_lut_class(n_pixels: int, k: int) -> float:
    """log2 of the number of k-pixel truth-table rules: C(p, k) * 2^(2^k)."""
    return log2_comb(n_pixels, k) + float(2**k)


def log2_memorize_class(n_pixels: int) -> float:
    """log2 of the number of Boolean functions of the whole patch: 2^(2^p), i.e. 2^p."""
    return float(2.0**n_pixels)


def log2_tree_class(n_pixels: int, depth: int) -> float:
    """log2 of the number of decision trees of depth <= ``depth`` over ``n_pixels`` binary pixels.

    A tree is a labelled leaf (2 choices) or a split on one of p pixels with two subtrees of depth
    at most d - 1: T(0) = 2, T(d) = 2 + p * T(d - 1)^2. Counting syntactic trees over-counts the
    functions they compute, which only loosens (never invalidates) the bound.
    """
    log_t = 1.0  # log2 T(0)
    for _ in range(depth):
        # log2(2 + p * 2^(2 log_t)) computed without overflow
        a = math.log2(n_pixels) + 2 * log_t
        log_t = a + math.log2(1 + 2.0 ** (1 - a)) if a < 1000 else a
    return log_t
