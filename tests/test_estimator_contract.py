"""pixelfit's own estimators keep scikit-learn's estimator contract.

Checks: scikit-learn, sklearn.utils.estimator_checks.parametrize_with_checks.
"""

import numpy as np
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


def test_sparse_logistic_reads_exactly_k_pixels():
    # Ten informative pixels of decreasing weight among thirty.
    rng = np.random.default_rng(0)
    X = rng.random((600, 30)) < 0.5
    w = np.r_[np.linspace(2, 0.5, 10), np.zeros(20)]
    y = (X @ w + rng.normal(0, 1, 600)) > w.sum() / 2
    for k in range(1, 9):
        m = SparseLogistic(k=k).fit(X, y)
        assert m.n_nonzero_ == len(m.support_) == k
    # A constant pixel never enters; a label no pixel explains still reads k pixels
    assert 0 not in SparseLogistic(k=3).fit(np.c_[np.zeros(600, bool), X[:, 1:]], y).support_
    flat = SparseLogistic(k=2).fit(np.tile(X[:2], (300, 1)), np.tile([True, False], 300))
    assert flat.n_nonzero_ <= 2
