"""Bias and variance of the 0-1 loss from replicate predictions, and the learning-curve verdict."""

from __future__ import annotations

import numpy as np

#: Plain verdicts of a learning curve.
VERDICT_HELPS = "more data would likely help"
VERDICT_FLAT = "flat: more data alone will not help; a larger rung might"
VERDICT_UNCLEAR = "unclear"
#: A change of error over the last segment (70 to 100 % of the data) smaller than one percentage
#: point is "flat" (common practice: a smaller gain is below what a ladder's users act on).
FLAT_TOLERANCE = 0.01


def bias_variance_01(predictions: np.ndarray, y: np.ndarray) -> dict:
    """Domingos' decomposition of the 0-1 loss of two-class predictions, noise taken as zero.

    Parameters
    ----------
    predictions : ndarray of shape (n_replicates, n_patches), bool
        What each replicate model predicts for each held-out patch.
    y : ndarray of shape (n_patches,), bool
        The true classes.

    Returns
    -------
    dict with ``replicates``, ``loss``, ``bias``, ``variance``, ``unbiased_variance`` and
    ``biased_variance``, each a fraction over all held-out patches (None without patches).
    The main prediction of a patch is the majority vote of the replicates; a tie (an even number
    of replicates) goes to the negative class. ``bias`` is the share of patches whose main
    prediction is wrong, ``variance`` the mean share of replicates that differ from the main
    prediction; the variance on unbiased patches adds to the loss and on biased patches takes
    from it, so ``loss = bias + unbiased_variance - biased_variance`` exactly.
    """
    P = np.asarray(predictions, dtype=bool)
    y = np.asarray(y, dtype=bool)
    if P.ndim != 2 or P.shape[1] != len(y):
        raise ValueError("predictions must be of shape (n_replicates, n_patches)")
    b, n = P.shape
    if b == 0 or n == 0:
        return {"replicates": int(b), "loss": None, "bias": None, "variance": None,
                "unbiased_variance": None, "biased_variance": None}
    votes = P.sum(axis=0)
    main = 2 * votes > b  # ties: the negative class
    biased = main != y
    var = (P != main).mean(axis=0)
    return {
        "replicates": int(b),
        "loss": float((P != y).mean()),
        "bias": float(biased.mean()),
        "variance": float(var.mean()),
        "unbiased_variance": float(var[~biased].sum() / n),
        "biased_variance": float(var[biased].sum() / n),
    }


def last_segment_slope(fractions: list[float], errors: np.ndarray) -> dict:
    """Slope of error over the last segment of a learning curve, with its standard error.

    Parameters
    ----------
    fractions : the training fractions, increasing
    errors : ndarray of shape (n_repeats, n_fractions); NaN where a fit failed

    Returns
    -------
    dict: ``slope`` (change of error per whole training part, over the last two fractions, mean of
    the repeats), ``std_error`` (standard error of that mean over the repeats; None with one),
    ``change`` (the error change over the segment itself) and ``verdict``.
    """
    E = np.asarray(errors, dtype=np.float64)
    span = float(fractions[-1] - fractions[-2])
    d = E[:, -1] - E[:, -2]
    d = d[np.isfinite(d)]
    if len(d) == 0 or span <= 0:
        return {"slope": None, "std_error": None, "change": None, "verdict": VERDICT_UNCLEAR}
    change = float(d.mean())
    se_change = float(d.std(ddof=1) / np.sqrt(len(d))) if len(d) > 1 else None
    return {"slope": change / span, "std_error": None if se_change is None else se_change / span,
            "change": change, "verdict": slope_verdict(change, se_change)}


def slope_verdict(change: float, se: float | None) -> str:
    """Verdict from the error change over the last segment and its standard error.

    "more data would likely help" when the error still falls by more than the flat tolerance and
    by more than two standard errors; "flat" when the change lies within the tolerance, two
    standard errors included; "unclear" otherwise (or with a single repeat).
    """
    if se is None or not np.isfinite(se):
        return VERDICT_UNCLEAR
    if change < -FLAT_TOLERANCE and change + 2 * se < 0:
        return VERDICT_HELPS
    if abs(change) + 2 * se <= FLAT_TOLERANCE:
        return VERDICT_FLAT
    return VERDICT_UNCLEAR
