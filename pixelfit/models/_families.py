"""The model families of the ladder, each with its size axis, its size figures and its bound.

A family turns a size into an unfitted scikit-learn estimator; everything else pixelfit needs to
know about a family (how many parameters, how big its rule class is, which bound applies, what
its own importance map is) lives here too, so the ladder treats all families alike.
"""

from __future__ import annotations

import hashlib
import math
import warnings
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.feature_selection import SelectKBest, mutual_info_classif
from sklearn.linear_model import LogisticRegression
from sklearn.naive_bayes import BernoulliNB
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import Pipeline
from sklearn.svm import l1_min_c
from sklearn.tree import DecisionTreeClassifier
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_is_fitted, validate_data

from pixelfit._numeric import linear_decision, sigmoid
from pixelfit.errors import TrainingError
from pixelfit.models._rules import ConstantRule, LutRule, MemorizeRule
from pixelfit.models._sizes import log2_lut_class, log2_memorize_class, log2_tree_class

FAMILY_ORDER = ("constant", "lut", "nb", "logistic", "tree", "mlp", "memorize")


_L1_CACHE: OrderedDict[tuple[bytes, float], np.ndarray] = OrderedDict()


class SparseLogistic(ClassifierMixin, BaseEstimator):
    """Logistic regression on k pixels chosen by an L1 penalty tuned to leave k non-zero weights.

    ``fit`` walks the inverse penalty C of an L1-penalised fit (bisection on log C, liblinear) to
    the largest support of at most k pixels; the weights are then refit on that support with a
    light L2 penalty (C = ``refit_c``), because at the C where the k-th pixel enters, the L1
    weights are shrunk almost to zero. With k >= n_pixels every pixel is used.

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
    def _l1(X, y, C, data_key: bytes):
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
        support = np.flatnonzero(m.coef_.ravel())
        _L1_CACHE[key] = support
        while len(_L1_CACHE) > 4096:
            _L1_CACHE.popitem(last=False)
        return support

    def _support(self, X, y, k: int) -> tuple[np.ndarray, float]:
        lo = l1_min_c(X, y, loss="log") if X.any() else 1.0
        log_lo, log_hi = math.log(lo), math.log(lo * 1e6)
        best: tuple[np.ndarray, float] | None = None
        data_key = _digest(X, y)
        for _ in range(self.max_steps):
            mid = (log_lo + log_hi) / 2
            sup = self._l1(X, y, math.exp(mid), data_key)
            if len(sup) <= k and (best is None or len(sup) > len(best[0])):
                best = (sup, math.exp(mid))
            if len(sup) == k:
                break
            if len(sup) < k:
                log_lo = mid
            else:
                log_hi = mid
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


def _powers_up_to(limit: int, top: int) -> list[int]:
    sizes = [1]
    while sizes[-1] * 2 < limit:
        sizes.append(sizes[-1] * 2)
    sizes = [s for s in sizes if s <= top]
    if limit <= top and limit not in sizes:
        sizes.append(limit)
    return sizes


@dataclass(frozen=True)
class Family:
    """One family of the ladder.

    ``make(size, n_pixels, seed)`` returns an unfitted estimator; ``default_sizes(n_pixels)`` the
    sizes tried by default; ``scored`` says whether the family gives a graded score (probability)
    rather than a hard label only.
    """

    name: str
    description: str
    size_name: str
    make: Callable[[int, int, int], BaseEstimator]
    default_sizes: Callable[[int], list[int]]
    scored: bool = True
    fixed_size: bool = False


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


def _make_nb(k, p, seed):
    return Pipeline([("select", SelectKBest(pixel_mutual_information, k=min(k, p))), ("nb", BernoulliNB(alpha=1.0))])


FAMILIES: dict[str, Family] = {
    "constant": Family("constant", "always the training majority", "size", lambda s, p, seed: ConstantRule(),
                       lambda p: [0], scored=False, fixed_size=True),
    "lut": Family("lut", "truth table over the k best pixels", "pixels", lambda k, p, seed: LutRule(k=k),
                  lambda p: [k for k in (1, 2, 3, 4) if k <= p]),
    "nb": Family("nb", "Bernoulli naive Bayes on the k most informative pixels", "pixels", _make_nb,
                 lambda p: _powers_up_to(p, p)),
    "logistic": Family("logistic", "L1 logistic regression with k non-zero pixel weights", "pixels",
                       lambda k, p, seed: SparseLogistic(k=k), lambda p: _powers_up_to(p, p)),
    "tree": Family("tree", "decision tree of depth d", "depth",
                   lambda d, p, seed: DecisionTreeClassifier(max_depth=d, random_state=seed),
                   lambda p: list(range(1, 9))),
    "mlp": Family("mlp", "one hidden layer of h units", "hidden units",
                  lambda h, p, seed: MLPClassifier(hidden_layer_sizes=(h,), solver="lbfgs", max_iter=400,
                                                   alpha=1e-3, random_state=seed),
                  lambda p: [1, 2, 4, 8, 16, 32, 64]),
    "memorize": Family("memorize", "truth table over the whole patch", "pixels",
                       lambda s, p, seed: MemorizeRule(), lambda p: [p], scored=True, fixed_size=True),
}


def parse_families(text: str | None) -> list[str]:
    """Family names from a comma-separated list (None: all), in ladder order."""
    if text is None or text.strip() in ("", "all"):
        return list(FAMILY_ORDER)
    names = [t.strip() for t in text.split(",") if t.strip()]
    unknown = [n for n in names if n not in FAMILIES]
    if unknown:
        word = "family" if len(unknown) == 1 else "families"
        raise TrainingError(f"unknown {word} {', '.join(unknown)}; choose from {', '.join(FAMILY_ORDER)}")
    return [f for f in FAMILY_ORDER if f in names]


def parse_size_overrides(items: list[str] | None) -> dict[str, list[int]]:
    """``FAMILY=1,2,5`` items into {family: sizes}."""
    out: dict[str, list[int]] = {}
    for item in items or []:
        fam, sep, rest = item.partition("=")
        fam = fam.strip()
        if not sep or fam not in FAMILIES:
            raise TrainingError(f"sizes are given as FAMILY=LIST with a family from {', '.join(FAMILY_ORDER)}; got {item!r}",
                                field="sizes")
        try:
            sizes = sorted({int(s) for s in rest.split(",") if s.strip()})
        except ValueError:
            raise TrainingError(f"sizes {item!r}: sizes must be whole numbers", field="sizes") from None
        if not sizes or min(sizes) < 1:
            raise TrainingError(f"sizes {item!r}: give at least one size, each at least 1", field="sizes")
        out[fam] = sizes
    return out


def plan_rungs(families: list[str], n_pixels: int, max_size: int | None = None,
               overrides: dict[str, list[int]] | None = None) -> list[tuple[str, int]]:
    """(family, size) pairs of the ladder, smallest first within each family.

    ``max_size`` caps every size axis except the two fixed ends (constant and memorize).
    """
    if max_size is not None and max_size < 1:
        raise TrainingError(f"the largest size must be at least 1 (sizes count from 1), not {max_size}",
                            field="max_size")
    overrides = overrides or {}
    rungs: list[tuple[str, int]] = []
    for name in families:
        fam = FAMILIES[name]
        if fam.fixed_size:
            rungs.append((name, fam.default_sizes(n_pixels)[0]))
            continue
        sizes = overrides.get(name, fam.default_sizes(n_pixels))
        if name in ("lut", "nb", "logistic"):
            too_big = [s for s in sizes if s > n_pixels]
            if too_big:
                raise TrainingError(f"{name} size {too_big[0]} is larger than the {n_pixels} pixels of a patch")
        if max_size is not None:
            sizes = [s for s in sizes if s <= max_size]
        rungs.extend((name, s) for s in sizes)
    return rungs


def size_figures(family: str, est, size: int, n_pixels: int) -> dict:
    """Parameters, rule-class size (log2) where finite, VC dimension where that is the measure."""
    log2_h = None
    vc = None
    if family == "constant":
        params, log2_h = 1, 1.0
    elif family == "lut":
        params, log2_h = size + 2**size, log2_lut_class(n_pixels, size)
    elif family == "memorize":
        params, log2_h = int(len(est.patterns_)), log2_memorize_class(n_pixels)
    elif family == "nb":
        k = int(est.named_steps["select"].get_support().sum())
        params, vc = 2 * k + 1, k + 1
    elif family == "logistic":
        k = int(est.n_nonzero_)
        params, vc = k + 1, k + 1
    elif family == "tree":
        params = int(est.tree_.node_count)
        log2_h = log2_tree_class(n_pixels, size)
    elif family == "mlp":
        params = int(sum(c.size for c in est.coefs_) + sum(b.size for b in est.intercepts_))
    else:
        raise TrainingError(f"unknown family {family}")
    return {"parameters": params, "log2_class_size": log2_h, "vc_dim": vc}


def native_importance(family: str, est, X: np.ndarray, y: np.ndarray, shape: tuple[int, int]) -> np.ndarray | None:
    """The family's own per-pixel importance, shape ``shape``; None where the family has none.

    lut: the rise in training error rate when each chosen pixel is dropped (best table on the
    others); logistic: the coefficients; nb: per-pixel log-odds weight of a lit pixel; tree:
    impurity importance.
    """
    p = shape[0] * shape[1]
    out = np.zeros(p)
    if family == "lut":
        base = est.train_errors_ / len(y)
        pix = est.pixels_
        yb = np.asarray(y == est.classes_[-1])
        for j, pixel in enumerate(pix):
            rest = np.delete(pix, j)
            if len(rest) == 0:
                err = min(yb.mean(), 1 - yb.mean())
            else:
                codes = X[:, rest].astype(np.intp) @ (1 << np.arange(len(rest)))
                cp = np.bincount(codes[yb], minlength=2 ** len(rest))
                cn = np.bincount(codes[~yb], minlength=2 ** len(rest))
                err = np.minimum(cp, cn).sum() / len(y)
            out[pixel] = err - base
    elif family == "logistic":
        out = est.coef_.ravel().astype(np.float64)
    elif family == "nb":
        sel = est.named_steps["select"].get_support()
        nb = est.named_steps["nb"]
        lp = nb.feature_log_prob_
        out[sel] = (lp[1] - lp[0]) - (np.log1p(-np.exp(lp[1])) - np.log1p(-np.exp(lp[0])))
    elif family == "tree":
        out = est.feature_importances_.astype(np.float64)
    else:
        return None
    return out.reshape(shape)


def pixels_used(family: str, est, n_pixels: int) -> list[int] | None:
    """Flat indices of the pixels the fitted model reads; None when it reads them all."""
    if family == "constant":
        return []
    if family == "lut":
        return [int(i) for i in est.pixels_]
    if family == "nb":
        return [int(i) for i in np.flatnonzero(est.named_steps["select"].get_support())]
    if family == "logistic":
        return [int(i) for i in np.flatnonzero(est.coef_.ravel())]
    if family == "tree":
        f = est.tree_.feature
        return sorted({int(i) for i in f[f >= 0]})
    return None
