"""pixelfit's own rules, as scikit-learn classifiers: constant, k-pixel truth table, memorize.

All three take ``X`` of shape (n_patches, n_pixels) of binarized pixels and a binary ``y``. Any
non-zero value counts as a lit pixel, as in the C export.
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_is_fitted, validate_data

from pixelfit.errors import TrainingError
from pixelfit.models.lut_engine import (
    CancelFn,
    CountIndex,
    ProgressFn,
    SearchPlan,
    beam_best,
    exhaustive_best,
    plan_search,
)

#: What the CLI and the window put after the name of a truth-table rung found by the beam search,
#: and the footnote that explains the mark.
BEAM_MARK = " (beam)"
BEAM_NOTE = ("(beam) truth table found by a beam search, not by trying every pixel set (that was estimated to "
             "take too long; `--exhaustive` forces it): it may not be the best table of its size on the training "
             "patches")


def is_beam(search: dict | None) -> bool:
    """True for a rung whose ``search`` record (summary.json) says it came from the beam search."""
    return search is not None and search.get("method") == "beam"


class _BinaryRule(ClassifierMixin, BaseEstimator):
    """Shared input checks: binary targets; the positive class is ``classes_[1]``."""

    def _check_fit(self, X, y):
        X, y = validate_data(self, X, y, ensure_min_samples=1)
        check_classification_targets(y)
        self.classes_ = np.unique(y)
        if len(self.classes_) > 2:
            raise ValueError(f"Only binary classification is supported. The type of the target is multiclass "
                             f"({len(self.classes_)} classes).")
        if len(self.classes_) == 1:
            # One class seen: everything is predicted as that class.
            yb = np.zeros(len(y), bool)
        else:
            yb = y == self.classes_[1]
        return _as_bits(X), yb

    def _check_predict(self, X):
        check_is_fitted(self, "classes_")
        X = validate_data(self, X, reset=False)
        return _as_bits(X)

    def _label(self, positive: np.ndarray) -> np.ndarray:
        if len(self.classes_) == 1:
            return np.full(len(positive), self.classes_[0])
        return self.classes_[positive.astype(np.intp)]

    def predict(self, X):
        """Predicted class of each patch, shape (n_patches,)."""
        return self._label(self._positive(X))

    def predict_proba(self, X):
        """Columns: [P(classes_[0]), P(classes_[1])] as estimated from training counts."""
        s = self._score(X)
        if len(self.classes_) == 1:
            return np.ones((len(s), 1))
        return np.column_stack([1.0 - s, s])

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        return tags


def _as_bits(X) -> np.ndarray:
    X = np.asarray(X)
    return X if X.dtype == bool else X != 0


def _majority(n_pos: float, n_neg: float) -> bool:
    """Majority label; a tie goes to the negative class."""
    return bool(n_pos > n_neg)


class ConstantRule(_BinaryRule):
    """Always predicts the training majority (ties: the negative class). Size 0."""

    def fit(self, X, y):
        _, yb = self._check_fit(X, y)
        self.n_pos_, self.n_neg_ = int(yb.sum()), int((~yb).sum())
        self.label_ = _majority(self.n_pos_, self.n_neg_)
        self.rate_ = self.n_pos_ / max(1, len(yb))
        return self

    def _positive(self, X):
        X = self._check_predict(X)
        return np.full(len(X), self.label_)

    def _score(self, X):
        X = self._check_predict(X)
        return np.full(len(X), self.rate_)


class LutRule(_BinaryRule):
    """A k-pixel truth-table rule with the training-optimal pixel set.

    Parameters
    ----------
    k : int
        Number of pixels the rule looks at.
    max_seconds : float or None
        Score every k-subset when that search is estimated (by timing a few of its work units
        first) to take at most this long; otherwise grow a beam from the largest size whose
        exhaustive search fits the same time. None: ``lut_engine.EXHAUSTIVE_SECONDS`` (30 s).
    exhaustive : bool
        Score every k-subset whatever the estimate.
    exact_size : int or None
        Skip the estimate: search exhaustively up to this size and grow a beam from there to k
        (``exact_size >= k``: exhaustive). The ladder decides once per rung and sets it, so that
        every fold of a rung searches the same way.
    beam_width : int
        Pixel sets kept per step of the beam search.
    n_jobs : int or None
        Workers for the exhaustive search (-1: all cores; None: what an active
        ``joblib.parallel_config`` says, e.g. a cluster's). The result does not depend on it. The
        default is 1: on a quiet 2-core machine two threads were no faster than one (k=4 on
        10,000 9x9 patches: 1.24 s against 0.97 s; ``benchmarks/README.md``), the counting being
        bound by memory.

    Attributes
    ----------
    pixels_ : ndarray of shape (k,), int
        Flat pixel indices, ascending; bit j of a pattern code is pixel ``pixels_[j]``.
    counts_ : ndarray of shape (2^k, 2), int
        Training patches per pattern: [negatives, positives].
    table_ : ndarray of shape (2^k,), bool
        True where the pattern is labelled positive (the majority; ties and unseen patterns: see
        ``fit``).
    rate_ : ndarray of shape (2^k,), float
        Fraction of positives per pattern (unseen patterns: the training rate); the score.
    search_ : {'exhaustive', 'beam'}
    plan_ : SearchPlan or None
        The estimate and decision (None when ``exact_size`` decided).
    largest_exact_size_ : int
        The largest size searched exhaustively (k when ``search_`` is 'exhaustive').
    n_candidates_ : int
        Pixel sets scored at size k (for a beam: over all its steps).
    train_errors_ : int
    """

    def __init__(self, k: int = 1, max_seconds: float | None = None, exhaustive: bool = False,
                 exact_size: int | None = None, beam_width: int = 256, n_jobs: int | None = 1):
        self.k = k
        self.max_seconds = max_seconds
        self.exhaustive = exhaustive
        self.exact_size = exact_size
        self.beam_width = beam_width
        self.n_jobs = n_jobs

    def plan(self, X, y, cancel: CancelFn | None = None) -> SearchPlan:
        """Estimate the exhaustive search on this data and decide exhaustive or beam (no fit)."""
        X, yb = self._check_fit(X, y)
        return plan_search(CountIndex(X, yb), self._k(X), self.max_seconds, self.exhaustive, cancel)

    def _k(self, X) -> int:
        p, k = X.shape[1], int(self.k)
        if not 1 <= k <= p:
            raise TrainingError(f"lut size k={k} must be between 1 and the number of pixels ({p})")
        return k

    def fit(self, X, y, progress: ProgressFn | None = None, cancel: CancelFn | None = None):
        """Find the pixel set with the lowest training error and its table.

        Each pattern is labelled with the majority class of the training patches showing it; a
        tie goes to the negative class, an unseen pattern gets the overall training majority.
        """
        X, yb = self._check_fit(X, y)
        k = self._k(X)
        index = CountIndex(X, yb)
        self.plan_ = None
        if self.exact_size is not None:
            exact = min(k, max(1, int(self.exact_size)))
        else:
            self.plan_ = plan_search(index, k, self.max_seconds, self.exhaustive, cancel)
            exact = self.plan_.largest_exact_size
        if exact == k:
            best, errs, scored = exhaustive_best(index, k, progress=progress, cancel=cancel, n_jobs=self.n_jobs)
            self.search_ = "exhaustive"
        else:
            start, _, scored0 = exhaustive_best(index, exact, keep=self.beam_width, cancel=cancel, n_jobs=self.n_jobs)
            best, errs, scored = beam_best(index, start, k, self.beam_width, progress=progress, cancel=cancel)
            scored += scored0
            self.search_ = "beam"
        self.largest_exact_size_ = exact
        self.pixels_ = best[0].astype(np.intp)
        self.n_candidates_ = int(scored)
        self.train_errors_ = int(errs[0])
        codes = self._codes(X)
        cp = np.bincount(codes[yb], minlength=2**k)
        cn = np.bincount(codes[~yb], minlength=2**k)
        self.counts_ = np.column_stack([cn, cp]).astype(np.int64)
        seen = (cp + cn) > 0
        prior = yb.mean() if len(yb) else 0.0
        self.table_ = np.where(seen, cp > cn, _majority(cp.sum(), cn.sum()))
        with np.errstate(invalid="ignore", divide="ignore"):
            self.rate_ = np.where(seen, cp / np.maximum(cp + cn, 1), prior)
        return self

    def _codes(self, X):
        weights = (1 << np.arange(len(self.pixels_))).astype(np.intp)
        return X[:, self.pixels_].astype(np.intp) @ weights

    def _positive(self, X):
        X = self._check_predict(X)
        return self.table_[self._codes(X)]

    def _score(self, X):
        X = self._check_predict(X)
        return self.rate_[self._codes(X)]


class MemorizeRule(_BinaryRule):
    """A truth table over the whole patch: the largest rule, the other end of the ladder.

    Attributes
    ----------
    patterns_ : ndarray of shape (n_distinct, n_bytes), uint8
        Distinct training patches, bit-packed row by row (``np.packbits``), sorted.
    counts_ : ndarray of shape (n_distinct, 2), int
        Training patches per distinct patch: [negatives, positives].
    default_ : bool
        Label of a patch never seen in training (the training majority; ties negative).
    """

    def fit(self, X, y):
        X, yb = self._check_fit(X, y)
        packed = np.packbits(X, axis=1)
        patterns, inverse = np.unique(packed, axis=0, return_inverse=True)
        inverse = inverse.ravel()
        cp = np.bincount(inverse[yb], minlength=len(patterns))
        cn = np.bincount(inverse[~yb], minlength=len(patterns))
        self.patterns_ = patterns
        self.counts_ = np.column_stack([cn, cp]).astype(np.int64)
        self.default_ = _majority(cp.sum(), cn.sum())
        self.prior_ = float(yb.mean()) if len(yb) else 0.0
        self._index = {row.tobytes(): i for i, row in enumerate(patterns)}
        return self

    def _lookup(self, X):
        X = self._check_predict(X)
        if not hasattr(self, "_index"):
            self._index = {row.tobytes(): i for i, row in enumerate(self.patterns_)}
        packed = np.packbits(X, axis=1)
        return np.array([self._index.get(row.tobytes(), -1) for row in packed], dtype=np.intp)

    def _positive(self, X):
        idx = self._lookup(X)
        cn, cp = self.counts_[idx, 0], self.counts_[idx, 1]
        return np.where(idx >= 0, cp > cn, self.default_)

    def _score(self, X):
        idx = self._lookup(X)
        cn, cp = self.counts_[idx, 0], self.counts_[idx, 1]
        return np.where(idx >= 0, cp / np.maximum(cp + cn, 1), self.prior_)
