"""pixelfit's own estimators keep scikit-learn's estimator contract.

Checks: scikit-learn, sklearn.utils.estimator_checks.parametrize_with_checks.
"""

import numpy as np
import pytest
from sklearn.utils.estimator_checks import parametrize_with_checks

from pixelfit.models import ConstantRule, LutRule, MemorizeRule, SparseLogistic

# check_classifiers_train asks for accuracy above 0.83 on continuous blobs; a constant, a
# one-pixel table and a lookup of exact patches cannot reach it on continuous data by design.
WEAK_BY_DESIGN = {"check_classifiers_train": "needs accuracy > 0.83 on continuous data; a tiny binary rule has less"}


@parametrize_with_checks(
    [ConstantRule(), LutRule(k=1), MemorizeRule(), SparseLogistic(k=2)],
    expected_failed_checks=lambda est: {} if isinstance(est, SparseLogistic) else WEAK_BY_DESIGN,
)
def test_sklearn_contract(estimator, check):
    check(estimator)


@pytest.mark.parametrize("max_steps", [30, 4])
def test_sparse_logistic_reads_exactly_k_pixels(max_steps):
    # Ten informative pixels of decreasing weight among thirty. With 4 bisection steps the search
    # stops between a support under k and one over it; the rung must still read k pixels.
    rng = np.random.default_rng(0)
    X = rng.random((600, 30)) < 0.5
    w = np.r_[np.linspace(2, 0.5, 10), np.zeros(20)]
    y = (X @ w + rng.normal(0, 1, 600)) > w.sum() / 2
    for k in range(1, 9):
        m = SparseLogistic(k=k, max_steps=max_steps).fit(X, y)
        assert m.n_nonzero_ == len(m.support_) == k
