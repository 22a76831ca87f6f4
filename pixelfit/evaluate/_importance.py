"""Per-pixel maps: permutation importance for any fitted model, and two maps of the data itself."""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.inspection import permutation_importance

from pixelfit.models import pixel_mutual_information


class _OnPixels(ClassifierMixin, BaseEstimator):
    """A fitted model seen through a subset of pixel columns, the rest held at given values."""

    def __init__(self, est, base: np.ndarray, cols: np.ndarray):
        self.est, self.base, self.cols = est, base, cols

    def fit(self, *_):  # the scorer protocol asks for it; the model is already fitted
        return self

    @property
    def classes_(self):
        return self.est.classes_

    def predict(self, Xs):
        full = self.base.copy()
        full[:, self.cols] = Xs
        return self.est.predict(full)


def permutation_map(est, X: np.ndarray, y: np.ndarray, shape: tuple[int, int], pixels=None,
                    seed: int = 0, repeats: int = 3) -> np.ndarray:
    """Mean drop in accuracy when each pixel is shuffled among the given (held-out) patches.

    ``pixels`` (flat indices) limits the work to the pixels a model reads; the others have an
    importance of exactly 0. None means all pixels.
    """
    # Bits stay bits: every one of the (pixels x repeats) predictions copies the matrix once.
    X = np.asarray(X)
    if X.dtype != bool:
        X = X.astype(bool) if np.isin(X, (0, 1)).all() else X.astype(np.float64)
    out = np.zeros(X.shape[1])
    cols = np.arange(X.shape[1]) if pixels is None else np.asarray(pixels, dtype=np.intp)
    if len(X) == 0 or len(cols) == 0:
        return out.reshape(shape)
    res = permutation_importance(_OnPixels(est, X, cols), X[:, cols], y, scoring="accuracy",
                                 n_repeats=repeats, random_state=seed)
    out[cols] = res.importances_mean
    return out.reshape(shape)


def mean_difference_map(X: np.ndarray, y: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Fraction of positives with the pixel lit minus fraction of negatives with it lit."""
    X = np.asarray(X)  # averaged as it is: a float copy of a million patches is gigabytes
    y = np.asarray(y, bool)
    pos = X[y].mean(axis=0, dtype=np.float64) if y.any() else np.zeros(X.shape[1])
    neg = X[~y].mean(axis=0, dtype=np.float64) if (~y).any() else np.zeros(X.shape[1])
    return (pos - neg).reshape(shape)


def mutual_information_map(X: np.ndarray, y: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Mutual information (nats) between each binary pixel and the label."""
    return pixel_mutual_information(X, np.asarray(y, bool)).reshape(shape)
