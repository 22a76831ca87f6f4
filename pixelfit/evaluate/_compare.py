"""Comparing rungs: McNemar's test and the one-standard-error choice."""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import chi2


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
