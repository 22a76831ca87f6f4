"""pixelfit's own estimators keep scikit-learn's estimator contract.

Checks: scikit-learn, sklearn.utils.estimator_checks.parametrize_with_checks.
"""

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
