"""Estimators of the ladder built on scikit-learn: the sparse logistic regression and the
per-pixel mutual information that ranks pixels for naive Bayes. The families themselves (sizes,
figures, rule-file sections, firmware) live in :mod:`pixelfit.families`."""

from __future__ import annotations

import hashlib
import math
import warnings
from collections import OrderedDict

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.feature_selection import mutual_info_classif
from sklearn.linear_model import LogisticRegression
from sklearn.svm import l1_min_c
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_is_fitted, validate_data

from pixelfit._numeric import linear_decision, sigmoid
from pixelfit.errors import TrainingError

_L1_CACHE: OrderedDict[tuple[bytes, float], np.ndarray] = OrderedDict()  # (data, C) -> L1 weights


class SparseLogistic(ClassifierMixin, BaseEstimator):
    """Logistic regression on k pixels chosen by an L1 penalty tuned to leave k non-zero weights.

    ``fit`` walks the inverse penalty C of an L1-penalised fit (bisection on log C, liblinear) to
    the largest support of at most k pixels; the weights are then refit on that support with a
    light L2 penalty (C = ``refit_c``), because at the C where the k-th pixel enters, the L1
    weights are shrunk almost to zero. When no C leaves exactly k (pixels that enter the path
    together), the largest support under k is filled up to k with the strongest other weights of
    the smallest support over k. With k >= n_pixels every pixel is used.

    Attributes
    ----------
    support_ : ndarray of shape (n_nonzero,), int
        Flat pixel indices with a weight.
    coef_ : ndarray of shape (1, n_pixels)
    intercept_ : ndarray of shape (1,)
    C_ : float
        The L1 inverse penalty that chose the support.
    n_nonzero_ : int
    classes_ : ndarray of shape (2,)
    """

    def __init__(self, k: int = 1, refit_c: float = 10.0, max_steps: int = 30):
        self.k = k
        self.refit_c = refit_c
        self.max_steps = max_steps

    @staticmethod
    def _l1(X, y, C, data_key: bytes) -> np.ndarray:
        """The L1-penalised weights at inverse penalty C (one row of n_pixels)."""
        # Rungs of several sizes bisect over the same C values on the same folds: reuse the fits.
        key = (data_key, C)
        hit = _L1_CACHE.get(key)
        if hit is not None:
            return hit
        # A large intercept_scaling keeps liblinear from penalising the intercept.
        m = LogisticRegression(l1_ratio=1.0, solver="liblinear", C=C, max_iter=1000, random_state=0,
                               intercept_scaling=100.0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            m.fit(X, y)
        coef = m.coef_.ravel().copy()
        _L1_CACHE[key] = coef
        while len(_L1_CACHE) > 4096:
            _L1_CACHE.popitem(last=False)
        return coef

    def _support(self, X, y, k: int) -> tuple[np.ndarray, float]:
        lo = l1_min_c(X, y, loss="log") if X.any() else 1.0
        log_lo, log_hi = math.log(lo), math.log(lo * 1e6)
        best: tuple[np.ndarray, float] | None = None
        over: tuple[np.ndarray, float] | None = None  # the weights of the smallest support above k
        data_key = _digest(X, y)
        for _ in range(self.max_steps):
            mid = (log_lo + log_hi) / 2
            coef = self._l1(X, y, math.exp(mid), data_key)
            sup = np.flatnonzero(coef)
            if len(sup) <= k and (best is None or len(sup) > len(best[0])):
                best = (sup, math.exp(mid))
            if len(sup) > k and (over is None or len(sup) < np.count_nonzero(over[0])):
                over = (coef, math.exp(mid))
            if len(sup) == k:
                break
            if len(sup) < k:
                log_lo = mid
            else:
                log_hi = mid
        if best is not None and 0 < len(best[0]) < k and over is not None:
            # Pixels entered the L1 path together (or the steps ran out) between the largest support
            # under k and the smallest over it: fill up to k from the latter, strongest weights first.
            coef, c = over
            extra = [i for i in np.argsort(-np.abs(coef), kind="stable") if coef[i] and i not in set(best[0])]
            best = (np.sort(np.r_[best[0], extra[:k - len(best[0])]]).astype(np.intp), c)
        if best is None or len(best[0]) == 0:
            # Even the weakest useful penalty selects too many: keep the k strongest pixels.
            m = LogisticRegression(l1_ratio=1.0, solver="liblinear", C=lo * 1.5, intercept_scaling=100.0).fit(X, y)
            order = np.argsort(-np.abs(m.coef_.ravel()), kind="stable")[:k]
            best = (np.sort(order), lo * 1.5)
        return best

    def fit(self, X, y):
        X, y = validate_data(self, X, y, dtype=np.float64)
        check_classification_targets(y)
        k = int(self.k)
        p = X.shape[1]
        if k < 1:
            raise TrainingError(f"logistic size k={k} must be at least 1")
        self.classes_ = np.unique(y)
        if len(self.classes_) != 2:
            raise ValueError(f"Only binary classification is supported: SparseLogistic needs samples of 2 classes, "
                             f"got {len(self.classes_)} class(es).")
        if k >= p:
            support, c = np.arange(p), math.inf
        else:
            support, c = self._support(X, y, k)
        refit = LogisticRegression(C=self.refit_c, max_iter=2000)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            refit.fit(X[:, support], y)
        coef = np.zeros((1, p))
        coef[0, support] = refit.coef_.ravel()
        self.support_ = support.astype(np.intp)
        self.coef_ = coef
        self.intercept_ = np.asarray(refit.intercept_, dtype=np.float64)
        self.C_ = c
        self.n_nonzero_ = int(np.count_nonzero(coef))
        return self

    def decision_function(self, X):
        check_is_fitted(self, "coef_")
        X = validate_data(self, X, dtype=np.float64, reset=False)
        return linear_decision(X, self.coef_, float(self.intercept_[0]))

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        return tags

    def predict(self, X):
        positive = self.decision_function(X) > 0
        return self.classes_[positive.astype(np.intp)]

    def predict_proba(self, X):
        s = sigmoid(self.decision_function(X))
        return np.column_stack([1 - s, s])


def _digest(*arrays) -> bytes:
    h = hashlib.blake2b(digest_size=16)
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(repr((a.shape, a.dtype.str)).encode())
        h.update(a.tobytes())
    return h.digest()


_MI_CACHE: OrderedDict[bytes, np.ndarray] = OrderedDict()


def pixel_mutual_information(X, y) -> np.ndarray:
    """Mutual information of each binary pixel with the label (scikit-learn's discrete estimate).

    Every nb rung of a ladder ranks pixels on the same training folds; the scores are computed
    once per distinct (X, y) and reused.
    """
    key = _digest(X, y)
    hit = _MI_CACHE.get(key)
    if hit is None:
        hit = mutual_info_classif(np.asarray(X, dtype=np.int8), y, discrete_features=True, random_state=0)
        _MI_CACHE[key] = hit
        while len(_MI_CACHE) > 32:
            _MI_CACHE.popitem(last=False)
    return hit.copy()
