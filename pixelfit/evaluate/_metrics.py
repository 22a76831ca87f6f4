"""Detection metrics with 95 % intervals.

Convention: a ratio whose denominator is zero (precision with no predicted positive, recall with
no actual positive, F1 when both are undefined, MCC when any margin is empty) is reported as
``None`` (``null`` in JSON), never as a made-up 0 or 1.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import beta
from sklearn.metrics import confusion_matrix, f1_score, matthews_corrcoef, precision_score, recall_score

Z95 = 1.959963984540054  # standard normal quantile at 0.975


def wilson_interval(successes: int, n: int, z: float = Z95) -> tuple[float, float] | None:
    """Wilson score interval for a binomial proportion; None when ``n == 0``."""
    if n <= 0:
        return None
    p = successes / n
    z2 = z * z
    centre = (p + z2 / (2 * n)) / (1 + z2 / n)
    half = (z / (1 + z2 / n)) * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    return (max(0.0, centre - half), min(1.0, centre + half))


def clopper_pearson_interval(successes: int, n: int, alpha: float = 0.05) -> tuple[float, float] | None:
    """Clopper-Pearson ("exact") interval for a binomial proportion; None when ``n == 0``.

    The bounds are quantiles of beta distributions: Beta(x, n - x + 1) at alpha / 2 and
    Beta(x + 1, n - x) at 1 - alpha / 2, with 0 for x = 0 and 1 for x = n. It never covers less
    than 1 - alpha, at the price of being wider than :func:`wilson_interval`.
    """
    if n <= 0:
        return None
    lo = 0.0 if successes <= 0 else float(beta.ppf(alpha / 2, successes, n - successes + 1))
    hi = 1.0 if successes >= n else float(beta.isf(alpha / 2, successes + 1, n - successes))
    return (lo, hi)


def confusion(y_true: np.ndarray, y_pred: np.ndarray) -> dict[str, int]:
    """tp, fp, fn, tn for boolean truth and prediction vectors of equal length."""
    tn, fp, fn, tp = confusion_matrix(np.asarray(y_true, bool), np.asarray(y_pred, bool), labels=[False, True]).ravel()
    return {"tp": int(tp), "fp": int(fp), "fn": int(fn), "tn": int(tn)}


def _nan_to_none(x: float) -> float | None:
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else float(x)


def detection_metrics(y_true: np.ndarray, y_pred: np.ndarray) -> dict:
    """All metrics of one prediction vector, as a JSON-ready dict.

    Keys: tp, fp, fn, tn, precision, recall, f1, accuracy, mcc, precision_ci, recall_ci,
    accuracy_ci. Undefined values are None.
    """
    y_true = np.asarray(y_true, bool)
    y_pred = np.asarray(y_pred, bool)
    c = confusion(y_true, y_pred)
    n = len(y_true)
    out: dict = dict(c)
    out["n"] = n
    if n == 0:
        out.update(precision=None, recall=None, f1=None, accuracy=None, mcc=None,
                   precision_ci=None, recall_ci=None, accuracy_ci=None)
        return out
    kw = {"zero_division": np.nan}
    out["precision"] = _nan_to_none(precision_score(y_true, y_pred, **kw))
    out["recall"] = _nan_to_none(recall_score(y_true, y_pred, **kw))
    out["f1"] = _nan_to_none(f1_score(y_true, y_pred, **kw)) if c["tp"] + c["fp"] + c["fn"] > 0 else None
    out["accuracy"] = (c["tp"] + c["tn"]) / n
    margins = (c["tp"] + c["fp"], c["tp"] + c["fn"], c["tn"] + c["fp"], c["tn"] + c["fn"])
    out["mcc"] = float(matthews_corrcoef(y_true, y_pred)) if min(margins) > 0 else None
    out["precision_ci"] = wilson_interval(c["tp"], c["tp"] + c["fp"])
    out["recall_ci"] = wilson_interval(c["tp"], c["tp"] + c["fn"])
    out["accuracy_ci"] = wilson_interval(c["tp"] + c["tn"], n)
    for key in ("precision_ci", "recall_ci", "accuracy_ci"):
        if out[key] is not None:
            out[key] = [out[key][0], out[key][1]]
    return out


def error_rate(y_true: np.ndarray, y_pred: np.ndarray) -> float:
    return float(np.mean(np.asarray(y_true, bool) != np.asarray(y_pred, bool))) if len(y_true) else 0.0
