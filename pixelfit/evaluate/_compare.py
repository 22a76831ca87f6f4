"""Comparing rungs: McNemar's test, the one-standard-error choice, operating points."""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import chi2
from sklearn.metrics import precision_recall_curve


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


def operating_points(y_true: np.ndarray, scores: np.ndarray) -> list[dict]:
    """Precision and recall when predicting positive for score >= threshold, one row per threshold."""
    y_true = np.asarray(y_true, bool)
    if len(y_true) == 0 or not y_true.any():
        return []
    precision, recall, thresholds = precision_recall_curve(y_true, scores)
    return [{"threshold": float(t), "precision": float(p), "recall": float(r)}
            for p, r, t in zip(precision[:-1], recall[:-1], thresholds)]


def threshold_for_target(points: list[dict], target_precision: float | None = None,
                         target_recall: float | None = None) -> dict | None:
    """The operating point meeting the targets; None when no threshold meets them.

    With a precision target: the highest recall among thresholds meeting it (and the recall target
    if one is given); with only a recall target: the highest precision among those meeting it.
    """
    ok = [pt for pt in points
          if (target_precision is None or pt["precision"] >= target_precision)
          and (target_recall is None or pt["recall"] >= target_recall)]
    if not ok or (target_precision is None and target_recall is None):
        return None
    if target_precision is not None:
        return max(ok, key=lambda pt: (pt["recall"], pt["precision"], -pt["threshold"]))
    return max(ok, key=lambda pt: (pt["precision"], pt["recall"], pt["threshold"]))
