"""How much of a training score could be luck: sizes of rule classes and generalization bounds.

Convention used throughout: bounds are one-sided upper bounds on the true error rate holding with
probability at least 1 - delta, with ln(1/delta) (not ln(2/delta)); delta = 0.05 by default.
"""

from __future__ import annotations

import math

from pixelfit.models import log2_comb

LN2 = math.log(2.0)


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


def generalization_bound(family: str, figures: dict, train_error: float, m: int, n_pixels: int,
                         delta: float = 0.05) -> dict | None:
    """The bound that applies to the family, as {'error_upper', 'method', 'delta'}; None if none."""
    if figures["log2_class_size"] is not None:
        return {"error_upper": hoeffding_bound(train_error, figures["log2_class_size"], m, delta),
                "method": "hoeffding-union (finite class, one-sided, ln(1/delta))", "delta": delta}
    if figures["vc_dim"] is not None:
        h = figures["vc_dim"]
        method = "vapnik-vc (h = k + 1, union over the C(p, k) pixel choices, ln(4/delta))"
        if vc_vacuous(h, m):
            method += f"; vacuous: VC dimension h >= m training patches (h = {h}, m = {m})"
        return {"error_upper": vc_bound(train_error, h, m, delta, log2_comb(n_pixels, h - 1)),
                "method": method, "delta": delta}
    return None
