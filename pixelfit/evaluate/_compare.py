"""Comparing rungs: McNemar's test and the one-standard-error choice."""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import binom, chi2


def mcnemar(y_true: np.ndarray, pred_a: np.ndarray, pred_b: np.ndarray) -> dict:
    """McNemar's test with continuity correction on two prediction vectors for the same patches.

    b counts patches A gets right and B wrong, c the reverse;
    statistic = (|b - c| - 1)^2 / (b + c), referred to chi-square with 1 degree of freedom.
    With no discordant patch the statistic is 0 and p = 1.
    """
    y_true = np.asarray(y_true, bool)
    ra = np.asarray(pred_a, bool) == y_true
    rb = np.asarray(pred_b, bool) == y_true
    b = int(np.sum(ra & ~rb))
    c = int(np.sum(~ra & rb))
    return mcnemar_from_counts(b, c)


def mcnemar_from_counts(b: int, c: int) -> dict:
    if b + c == 0:
        return {"b": b, "c": c, "statistic": 0.0, "p_value": 1.0}
    stat = (abs(b - c) - 1) ** 2 / (b + c)
    return {"b": b, "c": c, "statistic": float(stat), "p_value": float(chi2.sf(stat, 1))}


def mcnemar_exact(b: int, c: int) -> dict:
    """McNemar's exact test: a two-sided binomial test of ``b`` against ``b + c`` trials at 1/2.

    p = min(1, 2 * P(X <= min(b, c))) with X ~ Binomial(b + c, 1/2); with no discordant patch p = 1.
    """
    b, c = int(b), int(c)
    p = 1.0 if b + c == 0 else float(min(1.0, 2.0 * binom.cdf(min(b, c), b + c, 0.5)))
    return {"b": b, "c": c, "discordant": b + c, "p_value": p, "method": "exact binomial, two-sided"}


def compare_calls(y_true: np.ndarray, pred_a: np.ndarray, pred_b: np.ndarray) -> dict:
    """Two rules' calls on the same patches: each one's confusion matrix, McNemar's exact test,
    and the patches where they disagree, split by which one was right.

    Parameters
    ----------
    y_true, pred_a, pred_b : ndarray of shape (n,), bool

    Returns
    -------
    dict
        ``a`` and ``b`` (``tp, fp, fn, tn``), ``both_right``, ``both_wrong``, ``mcnemar``
        (:func:`mcnemar_exact`: ``b`` = patches only A got right, ``c`` = only B), and the
        indices ``only_a_right`` and ``only_b_right`` into the given patches.
    """
    y = np.asarray(y_true, bool)
    pa, pb = np.asarray(pred_a, bool), np.asarray(pred_b, bool)
    if not (y.shape == pa.shape == pb.shape) or y.ndim != 1:
        raise ValueError("the truth and both predictions must be vectors of one length")
    ra, rb = pa == y, pb == y

    def conf(p: np.ndarray) -> dict:
        return {"tp": int(np.sum(p & y)), "fp": int(np.sum(p & ~y)), "fn": int(np.sum(~p & y)), "tn": int(np.sum(~p & ~y))}

    only_a, only_b = np.flatnonzero(ra & ~rb), np.flatnonzero(~ra & rb)
    return {"n": int(len(y)), "a": conf(pa), "b": conf(pb), "both_right": int(np.sum(ra & rb)),
            "both_wrong": int(np.sum(~ra & ~rb)), "mcnemar": mcnemar_exact(len(only_a), len(only_b)),
            "only_a_right": [int(i) for i in only_a], "only_b_right": [int(i) for i in only_b]}


def one_standard_error_choice(cv_means: list[float | None], cv_sds: list[float | None], folds: int,
                              complexity: list[float]) -> int | None:
    """Index of the simplest rung whose CV score is within one standard error of the best.

    The standard error is the best rung's fold standard deviation / sqrt(folds). Among rungs
    within reach the one of least ``complexity`` wins, ties to the earlier rung.
    """
    means = {i: float(m) for i, m in enumerate(cv_means) if m is not None and not math.isnan(m)}
    if not means or folds < 2:
        return None
    best = max(means, key=lambda i: (means[i], -complexity[i]))
    se = (cv_sds[best] or 0.0) / math.sqrt(folds)
    within = [i for i in means if means[i] >= means[best] - se]
    return min(within, key=lambda i: (complexity[i], i))
