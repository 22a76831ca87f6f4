"""How much of a training score could be luck: sizes of rule classes and generalization bounds.

Convention used throughout: bounds are one-sided upper bounds on the true error rate holding with
probability at least 1 - delta, with ln(1/delta) (not ln(2/delta)); delta = 0.05 by default.
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


def hoeffding_bound(train_error: float, log2_class_size: float, m: int, delta: float = 0.05) -> float:
    """Upper bound on the true error of a rule picked from a finite class (Occam / union bound).

    err <= train_error + sqrt((ln|H| + ln(1/delta)) / (2 m)), clipped to 1.
    """
    if m <= 0:
        return 1.0
    ln_h = log2_class_size * LN2
    return min(1.0, train_error + math.sqrt((ln_h + math.log(1.0 / delta)) / (2.0 * m)))


def consistent_sample_size(log2_class_size: float, epsilon: float, delta: float = 0.05) -> int:
    """Training patches after which any rule with zero training error has true error <= epsilon.

    m >= (1 / epsilon) (ln|H| + ln(1/delta)), rounded up.
    """
    return math.ceil((log2_class_size * LN2 + math.log(1.0 / delta)) / epsilon)


def vc_confidence(h: int, m: int, delta: float = 0.05, log2_union: float = 0.0) -> float:
    """The confidence term of Vapnik's bound: sqrt((h (ln(2m/h) + 1) - ln(delta/4)) / m).

    ``log2_union`` spreads delta over 2^log2_union classes (a union bound): ln(delta/4) becomes
    ln(delta/4) - log2_union * ln 2.

    The term is only meaningful for h < m: past h = 2m it *falls* as h grows (ln(2m/h) < 0) and
    near h = 5.4 m the value under the root turns negative. With h >= m a class of VC dimension h
    can fit any labelling of the m patches, so nothing is learned about the true error: the term
    is infinite (the bound is vacuous), see :func:`vc_vacuous`.
    """
    if m <= 0 or h <= 0 or vc_vacuous(h, m):
        return float("inf")
    return math.sqrt((h * (math.log(2.0 * m / h) + 1.0) - math.log(delta / 4.0) + log2_union * LN2) / m)


def vc_vacuous(h: int, m: int) -> bool:
    """True when Vapnik's bound says nothing: the VC dimension h is at least the m training patches."""
    return h >= m


def vc_bound(train_error: float, h: int, m: int, delta: float = 0.05, log2_union: float = 0.0) -> float:
    """Vapnik's bound on the true error, clipped to 1; exactly 1 (vacuous) when h >= m.

    ``log2_union`` (see :func:`vc_confidence`) accounts for the pixels a linear model sees having
    been chosen from the data: one class per choice of pixels.
    """
    if m <= 0 or h <= 0 or vc_vacuous(h, m):
        return 1.0
    return min(1.0, train_error + vc_confidence(h, m, delta, log2_union))
