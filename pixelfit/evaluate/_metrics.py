"""Detection metrics with 95 % intervals.

Convention: a ratio whose denominator is zero (precision with no predicted positive, recall with
no actual positive, F1 when both are undefined, MCC when any margin is empty) is reported as
``None`` (``null`` in JSON), never as a made-up 0 or 1.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import beta

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
    y_true = np.asarray(y_true, bool)
    y_pred = np.asarray(y_pred, bool)
    if y_true.shape != y_pred.shape or y_true.ndim != 1:
        raise ValueError(f"truth and prediction must be vectors of one length, not {y_true.shape} and {y_pred.shape}")
    tn, fp, fn, tp = np.bincount(2 * y_true.view(np.uint8) + y_pred.view(np.uint8), minlength=4)
    return {"tp": int(tp), "fp": int(fp), "fn": int(fn), "tn": int(tn)}


def _ratio(num: float, den: float) -> float | None:
    return num / den if den > 0 else None


def detection_metrics(y_true: np.ndarray, y_pred: np.ndarray) -> dict:
    """All metrics of one prediction vector, as a JSON-ready dict.

    Keys: tp, fp, fn, tn, n, precision, recall, f1, accuracy, mcc, precision_ci, recall_ci,
    accuracy_ci. Undefined values are None.
    """
    return metrics_from_counts(**confusion(y_true, y_pred))


def metrics_from_counts(tp: int, fp: int, fn: int, tn: int) -> dict:
    """:func:`detection_metrics` from the four cells of the confusion matrix.

    The ratios are their textbook definitions over the counts; ``tests/test_references.py`` holds
    them equal to scikit-learn's ``precision_score``, ``recall_score``, ``f1_score`` and
    ``matthews_corrcoef`` on the same vectors. Working from counts keeps this cheap enough for a
    threshold slider (no per-call input validation of whole vectors).
    """
    n = tp + fp + fn + tn
    out: dict = {"tp": tp, "fp": fp, "fn": fn, "tn": tn, "n": n}
    if n == 0:
        out.update(precision=None, recall=None, f1=None, accuracy=None, mcc=None,
                   precision_ci=None, recall_ci=None, accuracy_ci=None)
        return out
    out["precision"] = _ratio(tp, tp + fp)
    out["recall"] = _ratio(tp, tp + fn)
    out["f1"] = _ratio(2 * tp, 2 * tp + fp + fn)
    out["accuracy"] = (tp + tn) / n
    margins = (tp + fp, tp + fn, tn + fp, tn + fn)
    out["mcc"] = (tp * tn - fp * fn) / math.sqrt(math.prod(margins)) if min(margins) > 0 else None
    for key, (x, m) in (("precision_ci", (tp, tp + fp)), ("recall_ci", (tp, tp + fn)), ("accuracy_ci", (tp + tn, n))):
        ci = wilson_interval(x, m)
        out[key] = None if ci is None else [ci[0], ci[1]]
    return out


def error_rate(y_true: np.ndarray, y_pred: np.ndarray) -> float:
    return float(np.mean(np.asarray(y_true, bool) != np.asarray(y_pred, bool))) if len(y_true) else 0.0


#: Held-out F1 a quantized predictor may lose against its floating-point model before it is flagged.
QUANTIZED_F1_TOLERANCE = 0.01


def quantization_check(float_pred: np.ndarray, integer_pred: np.ndarray, y_true: np.ndarray | None = None) -> dict:
    """How the integer-only predictor compares with the floating-point model on the same patches.

    Returns ``{'n', 'agree', 'agreement', 'test', 'f1_float', 'f1_loss', 'loses_f1'}``: the
    share of patches where both give the same call, and with labels the integer predictor's own
    detection metrics (:func:`detection_metrics`), the F1 it loses against the float model (None where either F1 is
    undefined) and whether that loss exceeds :data:`QUANTIZED_F1_TOLERANCE` (one point).
    """
    fp = np.asarray(float_pred, bool)
    ip = np.asarray(integer_pred, bool)
    n = int(len(fp))
    agree = int(np.sum(fp == ip))
    out: dict = {"n": n, "agree": agree, "agreement": agree / n if n else None,
                 "test": None, "f1_float": None, "f1_loss": None, "loses_f1": None}
    if y_true is not None:
        y = np.asarray(y_true, bool)
        q = detection_metrics(y, ip)
        f = detection_metrics(y, fp)
        loss = None if q["f1"] is None or f["f1"] is None else f["f1"] - q["f1"]
        out.update(test=q,
                   f1_float=f["f1"], f1_loss=loss, loses_f1=None if loss is None else bool(loss > QUANTIZED_F1_TOLERANCE))
    return out
