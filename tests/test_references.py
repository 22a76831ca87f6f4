"""pixelfit's main computations checked against sources outside the project.

Each check names its source beside it: a library function computed independently, or a published
worked example. Values recalled from memory are marked "from memory"; facts of the trade without a
written source are marked "common practice".
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from skimage import data as skdata
from skimage.color import rgb2gray
from skimage.filters import threshold_mean, threshold_otsu
from skimage.util import img_as_ubyte
from sklearn.metrics import (
    accuracy_score,
    f1_score,
    matthews_corrcoef,
    precision_score,
    recall_score,
)
from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar
from statsmodels.stats.proportion import proportion_confint

from pixelfit.data import Binarizer, otsu_threshold
from pixelfit.evaluate import (
    clopper_pearson_interval,
    consistent_sample_size,
    detection_metrics,
    hoeffding_bound,
    log2_lut_class,
    log2_memorize_class,
    mcnemar,
    mcnemar_from_counts,
    vc_bound,
    vc_confidence,
    wilson_interval,
)
from pixelfit.models import LutRule, MemorizeRule

# Images that ship inside the scikit-image wheel (no download needed), greyscale and colour.
SKIMAGE_IMAGES = ("camera", "coins", "moon", "page", "text", "horse", "clock", "microaneurysms", "astronaut",
                  "coffee", "chelsea", "rocket", "logo", "immunohistochemistry", "brick", "grass", "gravel")


def _gray_uint8(name: str) -> np.ndarray:
    img = getattr(skdata, name)()
    if img.ndim == 3:
        img = rgb2gray(img[..., :3])
    return img_as_ubyte(img) if img.dtype != np.uint8 else img


# --- Otsu -------------------------------------------------------------------------------------
# Convention: the Otsu threshold t belongs to the dark class and a pixel is 1 when value > t,
# which is scikit-image's convention: skimage.filters.threshold_otsu documents that pixels
# "higher than this value are assumed to be foreground" (i.e. ``image > thresh``).

@pytest.mark.parametrize("name", SKIMAGE_IMAGES)
def test_otsu_equals_skimage_on_its_images(name):
    # Reference: scikit-image, skimage.filters.threshold_otsu, on images of skimage.data.
    img = _gray_uint8(name)
    t = otsu_threshold(img)
    assert t == threshold_otsu(img)
    b = Binarizer("otsu").fit(img[None])
    assert b.threshold == t
    np.testing.assert_array_equal(b.transform(img), img > threshold_otsu(img))


def _random_histogram_values(rng, kind: str) -> np.ndarray:
    if kind == "dirichlet":  # arbitrary histogram over a random set of occupied levels
        levels = rng.choice(256, size=rng.integers(2, 257), replace=False)
        counts = rng.multinomial(rng.integers(20, 3000), rng.dirichlet(np.full(len(levels), 0.3)))
        values = np.repeat(levels, counts)
    elif kind == "bimodal":
        n = rng.integers(20, 3000)
        centres = rng.uniform(0, 255, 2)
        which = rng.random(n) < rng.uniform(0.05, 0.95)
        values = np.where(which, rng.normal(centres[0], rng.uniform(1, 40), n),
                          rng.normal(centres[1], rng.uniform(1, 40), n))
    elif kind == "narrow":  # few neighbouring levels, where ties between thresholds are likely
        lo = rng.integers(0, 250)
        values = rng.integers(lo, lo + rng.integers(2, 6), rng.integers(2, 200))
    else:  # two levels only
        a, b = rng.choice(256, 2, replace=False)
        values = np.where(rng.random(rng.integers(2, 100)) < 0.5, a, b)
    return np.clip(np.round(values), 0, 255).astype(np.uint8)


@pytest.mark.parametrize("kind", ["dirichlet", "bimodal", "narrow", "two-level"])
def test_otsu_equals_skimage_on_random_histograms(rng, kind):
    # Reference: scikit-image, skimage.filters.threshold_otsu.
    for _ in range(300):
        values = _random_histogram_values(rng, kind)
        assert otsu_threshold(values) == threshold_otsu(values), np.bincount(values, minlength=256).nonzero()


def _patches(rng, side: int, n: int) -> np.ndarray:
    """Crops of real images plus flat and two-level patches (the edge cases of per-patch methods)."""
    out = []
    for name in ("camera", "coins", "page", "text", "moon"):
        img = _gray_uint8(name)
        r = rng.integers(0, img.shape[0] - side, n)
        c = rng.integers(0, img.shape[1] - side, n)
        out.extend(img[i : i + side, j : j + side] for i, j in zip(r, c))
    out.append(np.full((side, side), 77, np.uint8))
    out.append(np.zeros((side, side), np.uint8))
    two = np.full((side, side), 10, np.uint8)
    two[0, :3] = 240
    out.append(two)
    return np.stack(out)


@pytest.mark.parametrize("side", [8, 16, 32])
def test_otsu_patch_equals_skimage_per_patch(rng, side):
    # Reference: scikit-image, skimage.filters.threshold_otsu applied to each patch separately.
    patches = _patches(rng, side, 40)
    b = Binarizer("otsu-patch")
    expect = np.array([threshold_otsu(p) for p in patches], dtype=np.float64)
    np.testing.assert_array_equal(b.patch_thresholds(patches), expect)
    np.testing.assert_array_equal(b.transform(patches), patches > expect[:, None, None])
    assert not b.transform(patches[-3:-1]).any()  # a flat patch is all 0


@pytest.mark.parametrize("side", [8, 16, 32])
def test_mean_patch_equals_skimage_per_patch(rng, side):
    # Reference: scikit-image, skimage.filters.threshold_mean applied to each patch separately.
    patches = _patches(rng, side, 40)
    b = Binarizer("mean-patch")
    expect = np.array([threshold_mean(p) for p in patches])
    np.testing.assert_allclose(b.patch_thresholds(patches), expect, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(b.transform(patches), patches > expect[:, None, None])


# --- Binomial intervals -----------------------------------------------------------------------

def _count_pairs():
    pairs = [(0, 1), (1, 1), (0, 2), (1, 2), (2, 2), (0, 5), (5, 5), (81, 263), (0, 1000), (1000, 1000),
             (1, 1000), (999, 1000), (3, 7), (50, 100)]
    rng = np.random.default_rng(7)
    for n in rng.integers(1, 5000, 60):
        pairs.append((int(rng.integers(0, n + 1)), int(n)))
    return pairs


def test_wilson_equals_statsmodels():
    # Reference: statsmodels, statsmodels.stats.proportion.proportion_confint(method="wilson").
    for x, n in _count_pairs():
        lo, hi = wilson_interval(x, n)
        slo, shi = proportion_confint(x, n, alpha=0.05, method="wilson")
        assert lo == pytest.approx(slo, abs=1e-12), (x, n)
        assert hi == pytest.approx(shi, abs=1e-12), (x, n)


def test_clopper_pearson_equals_statsmodels():
    # Reference: statsmodels, statsmodels.stats.proportion.proportion_confint(method="beta").
    for x, n in _count_pairs():
        lo, hi = clopper_pearson_interval(x, n)
        slo, shi = proportion_confint(x, n, alpha=0.05, method="beta")
        assert lo == pytest.approx(slo, abs=1e-12), (x, n)
        assert hi == pytest.approx(shi, abs=1e-12), (x, n)
    assert clopper_pearson_interval(0, 0) is None


def test_one_sided_lower_bound_equals_statsmodels():
    # Reference: statsmodels, statsmodels.stats.proportion.proportion_confint(method="beta"): the
    # lower end of the two-sided interval at alpha = 2 (1 - confidence) is the one-sided lower
    # bound at that confidence.
    from pixelfit.evaluate import lower_bound

    for conf in (0.8, 0.9, 0.95, 0.99):
        for x, n in _count_pairs():
            slo, _ = proportion_confint(x, n, alpha=2 * (1 - conf), method="beta")
            assert lower_bound(x, n, conf) == pytest.approx(slo, abs=1e-12), (x, n, conf)


def test_clopper_pearson_published_and_closed_form():
    # Newcombe (1998), "Two-sided confidence intervals for the single proportion: comparison of
    # seven methods", Statistics in Medicine 17, 857-872, Table I, exact (Clopper-Pearson) method,
    # from memory: 81/263 -> 0.2527 to 0.3676.
    lo, hi = clopper_pearson_interval(81, 263)
    assert lo == pytest.approx(0.2527, abs=5e-5) and hi == pytest.approx(0.3676, abs=5e-5)
    # Clopper & Pearson (1934), Biometrika 26: with no success the upper bound solves
    # (1 - p)^n = alpha / 2, so it is 1 - (alpha / 2)^(1 / n) (closed form).
    for n in (1, 20, 263):
        lo, hi = clopper_pearson_interval(0, n)
        assert lo == 0.0 and hi == pytest.approx(1 - 0.025 ** (1 / n), rel=1e-12)
        lo, hi = clopper_pearson_interval(n, n)
        assert hi == 1.0 and lo == pytest.approx(0.025 ** (1 / n), rel=1e-12)
    # Exact intervals are never narrower than Wilson's here (Newcombe 1998, Table I).
    w = wilson_interval(81, 263)
    assert clopper_pearson_interval(81, 263)[0] < w[0] and clopper_pearson_interval(81, 263)[1] > w[1]


# --- Detection metrics ------------------------------------------------------------------------

def _label_vectors(rng):
    for n in (1, 2, 5, 17, 100, 1000):
        for p_true, p_pred in ((0.5, 0.5), (0.1, 0.3), (0.0, 0.4), (0.4, 0.0), (0.0, 0.0), (1.0, 1.0),
                               (1.0, 0.5), (0.5, 1.0)):
            yield rng.random(n) < p_true, rng.random(n) < p_pred


def test_detection_metrics_equal_sklearn(rng):
    # Reference: scikit-learn, sklearn.metrics precision_score, recall_score, f1_score,
    # matthews_corrcoef, accuracy_score. Our convention: a ratio with a zero denominator is None
    # where scikit-learn gives nan (zero_division=np.nan), and MCC is None when a margin of the
    # confusion matrix is empty, where scikit-learn returns 0.
    for y, p in _label_vectors(rng):
        m = detection_metrics(y, p)
        tp, fp, fn, tn = int(np.sum(y & p)), int(np.sum(~y & p)), int(np.sum(y & ~p)), int(np.sum(~y & ~p))
        assert (m["tp"], m["fp"], m["fn"], m["tn"]) == (tp, fp, fn, tn)
        assert m["accuracy"] == pytest.approx(accuracy_score(y, p))
        for key, fn_ in (("precision", precision_score), ("recall", recall_score), ("f1", f1_score)):
            ref = fn_(y, p, zero_division=np.nan)
            if math.isnan(ref):
                assert m[key] is None, (key, tp, fp, fn, tn)
            else:
                assert m[key] == pytest.approx(ref), (key, tp, fp, fn, tn)
        if min(tp + fp, tp + fn, tn + fp, tn + fn) == 0:
            assert m["mcc"] is None
        else:
            assert m["mcc"] == pytest.approx(matthews_corrcoef(y, p))
        # The intervals are Wilson's on the same counts (statsmodels proportion_confint, "wilson").
        for key, x, k in (("precision_ci", tp, tp + fp), ("recall_ci", tp, tp + fn), ("accuracy_ci", tp + tn, len(y))):
            if k == 0:
                assert m[key] is None
            else:
                assert m[key] == pytest.approx(list(proportion_confint(x, k, method="wilson")), abs=1e-12)


def test_no_predicted_positive_convention():
    # Degenerate case named in the convention: nothing predicted positive. scikit-learn
    # (precision_score with zero_division=np.nan) gives nan; we give None; recall and F1 stay 0.
    y = np.array([1, 1, 0, 0, 0], bool)
    p = np.zeros(5, bool)
    m = detection_metrics(y, p)
    assert math.isnan(precision_score(y, p, zero_division=np.nan)) and m["precision"] is None
    assert m["recall"] == recall_score(y, p) == 0.0
    assert m["f1"] == f1_score(y, p, zero_division=np.nan) == 0.0
    assert matthews_corrcoef(y, p) == 0.0 and m["mcc"] is None


# --- Generalization bounds --------------------------------------------------------------------
# Convention (pixelfit.evaluate._bounds and summary.json "conventions"): one-sided upper bounds on
# the true error rate, holding with probability >= 1 - delta, with ln(1/delta) in the finite-class
# bounds (not ln(2/delta): the bounds are one-sided) and ln(delta/4) inside Vapnik's bound.

def test_consistent_sample_size_textbook_example():
    # Mitchell (1997), Machine Learning, McGraw-Hill, ch. 7 (Eq. 7.2 and its example on
    # conjunctions of boolean literals; equation number from memory): n = 10 variables,
    # |H| = 3^10, epsilon = 0.1, delta = 0.05 -> m = 140.
    assert consistent_sample_size(10 * math.log2(3), 0.1, 0.05) == 140


def test_hoeffding_bound_is_the_textbook_form():
    # Mitchell (1997), ch. 7, the agnostic bound from Hoeffding's inequality (Eq. 7.3, number from
    # memory): error_D(h) <= error_S(h) + sqrt((ln|H| + ln(1/delta)) / (2m)), one-sided.
    for err, log2_h, m, delta in ((0.0, 10.0, 100, 0.05), (0.1, 40.0, 1000, 0.01), (0.02, 1.0, 50, 0.1)):
        expect = err + math.sqrt((log2_h * math.log(2) + math.log(1 / delta)) / (2 * m))
        assert hoeffding_bound(err, log2_h, m, delta) == pytest.approx(min(1.0, expect), rel=1e-12)
        two_sided = err + math.sqrt((log2_h * math.log(2) + math.log(2 / delta)) / (2 * m))
        assert hoeffding_bound(err, log2_h, m, delta) < two_sided  # ln(1/delta), not ln(2/delta)


def test_hoeffding_bound_monotone():
    # From the form above: larger class -> larger bound; more patches or larger delta (less
    # confidence) -> smaller bound; never below the training error, never above 1.
    sizes = [1.0, 4.0, 16.0, 64.0, 256.0]
    ms = [10, 30, 100, 300, 1000, 10000]
    deltas = [0.001, 0.01, 0.05, 0.1, 0.5]
    for err in (0.0, 0.05, 0.3):
        by_size = [hoeffding_bound(err, s, 500) for s in sizes]
        by_m = [hoeffding_bound(err, 16.0, m) for m in ms]
        by_delta = [hoeffding_bound(err, 16.0, 500, d) for d in deltas]
        assert all(a < b for a, b in itertools.pairwise(by_size))
        assert all(a > b for a, b in itertools.pairwise(by_m))
        assert all(a > b for a, b in itertools.pairwise(by_delta))
        for b in by_size + by_m + by_delta:
            assert err <= b <= 1.0


def _burges_eq3_confidence(h: int, l: int, eta: float) -> float:
    # Burges (1998), "A Tutorial on Support Vector Machines for Pattern Recognition", Data Mining
    # and Knowledge Discovery 2, 121-167, Eq. 3: the "VC confidence"
    # sqrt((h (log(2l/h) + 1) - log(eta/4)) / l), natural logarithms.
    return math.sqrt((h * (math.log(2 * l / h) + 1) - math.log(eta / 4)) / l)


@pytest.mark.parametrize("h,l,eta", [(1, 10, 0.05), (3, 100, 0.05), (10, 1000, 0.01), (65, 5000, 0.05),
                                     (200, 1797, 0.1), (3700, 10000, 0.05)])
def test_vc_confidence_is_burges_eq3(h, l, eta):
    assert vc_confidence(h, l, eta) == pytest.approx(_burges_eq3_confidence(h, l, eta), rel=1e-12)
    assert vc_bound(0.01, h, l, eta) == pytest.approx(min(1.0, 0.01 + _burges_eq3_confidence(h, l, eta)), rel=1e-12)
    # A union over 2^u classes is Eq. 3 at eta / 2^u (Bonferroni; common practice).
    for u in (1.0, 5.0, 20.0):
        assert vc_confidence(h, l, eta, u) == pytest.approx(_burges_eq3_confidence(h, l, eta / 2**u), rel=1e-12)


def test_vc_confidence_crosses_one_where_burges_shows():
    # Burges (1998), Fig. 2 and its text, from memory: for l = 10,000 and eta = 0.05 the VC
    # confidence exceeds unity for h / l above about 0.37, and it grows with h.
    l = 10000
    assert vc_confidence(3600, l, 0.05) < 1.0 < vc_confidence(3800, l, 0.05)
    values = [vc_confidence(h, l, 0.05) for h in range(10, 5000, 250)]
    assert all(a < b for a, b in itertools.pairwise(values))


@pytest.mark.parametrize("h,m", [(1, 2), (10, 100), (99, 100), (100, 100), (201, 100), (257, 47), (65, 11),
                                 (65, 10), (10_000, 14)])
def test_vc_bound_vacuous_from_h_equal_m(h, m):
    # Burges (1998), Eq. 3 and the text after it (from memory): the bound is only of use for h < l;
    # with h >= l points a class of VC dimension h can shatter some set of l points, so the
    # training error says nothing (common practice: report the bound as vacuous, 1). Past h = 2l
    # the formula's ln(2l/h) is negative and the term falls as h grows; near h = 5.4 l the value
    # under the root is negative.
    if h < m:
        assert vc_confidence(h, m, 0.05) == pytest.approx(_burges_eq3_confidence(h, m, 0.05), rel=1e-12)
        assert vc_bound(0.0, h, m) == pytest.approx(min(1.0, _burges_eq3_confidence(h, m, 0.05)), rel=1e-12)
    else:
        assert vc_confidence(h, m, 0.05) == math.inf
        for err in (0.0, 0.2, 0.5):
            assert vc_bound(err, h, m) == 1.0
            assert vc_bound(err, h, m, 0.05, log2_union=30.0) == 1.0


def test_vc_bound_never_falls_as_h_grows():
    # From the definition of a bound over nested classes (common practice): a larger VC dimension
    # can never give a smaller bound at the same training error; the bug was a bound falling past
    # h = 2m (16x16 random labels, m = 47, h = 257 gave 0.248).
    for m in (11, 47, 300):
        values = [vc_bound(0.0, h, m) for h in range(1, 20 * m)]
        assert all(a <= b for a, b in itertools.pairwise(values))
    assert vc_bound(0.0, 257, 47) == 1.0
    assert vc_bound(0.0, 20, 5000) < 0.25


# --- McNemar ----------------------------------------------------------------------------------

def test_mcnemar_equals_statsmodels():
    # Dietterich (1998), "Approximate Statistical Tests for Comparing Supervised Classification
    # Learning Algorithms", Neural Computation 10(7), 1895-1923: (|b - c| - 1)^2 / (b + c) against
    # chi-square with 1 degree of freedom. Reference values: statsmodels,
    # statsmodels.stats.contingency_tables.mcnemar(table, exact=False, correction=True).
    r = mcnemar_from_counts(25, 15)
    assert r["statistic"] == pytest.approx(2.025, rel=1e-12)
    ref = sm_mcnemar([[40, 25], [15, 120]], exact=False, correction=True)
    assert ref.statistic == pytest.approx(2.025, rel=1e-12)
    assert r["p_value"] == pytest.approx(ref.pvalue, rel=1e-12)
    rng = np.random.default_rng(3)
    for _ in range(200):
        b, c = (int(v) for v in rng.integers(0, 60, 2))
        if b + c == 0:
            continue
        ref = sm_mcnemar([[int(rng.integers(0, 50)), b], [c, int(rng.integers(0, 50))]], exact=False,
                         correction=True)
        r = mcnemar_from_counts(b, c)
        assert r["statistic"] == pytest.approx(ref.statistic, rel=1e-12, abs=1e-15)
        assert r["p_value"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_mcnemar_from_predictions_counts_the_discordant_patches(rng):
    # Reference: statsmodels mcnemar on the 2x2 table of (A right?, B right?) built here.
    y = rng.random(300) < 0.4
    pa = np.where(rng.random(300) < 0.85, y, ~y)
    pb = np.where(rng.random(300) < 0.75, y, ~y)
    ra, rb = pa == y, pb == y
    table = [[int(np.sum(ra & rb)), int(np.sum(ra & ~rb))], [int(np.sum(~ra & rb)), int(np.sum(~ra & ~rb))]]
    ref = sm_mcnemar(table, exact=False, correction=True)
    r = mcnemar(y, pa, pb)
    assert (r["b"], r["c"]) == (table[0][1], table[1][0])
    assert r["statistic"] == pytest.approx(ref.statistic) and r["p_value"] == pytest.approx(ref.pvalue)


# --- Sizes of rule classes --------------------------------------------------------------------

def _all_patterns(p: int) -> np.ndarray:
    return np.array(list(itertools.product([False, True], repeat=p)), dtype=bool)


@pytest.mark.parametrize("p", [1, 2, 3])
def test_memorize_class_is_every_boolean_function(p):
    # There are 2^(2^k) Boolean functions of k inputs (common combinatorics: one output bit per
    # each of the 2^k input patterns). Enumerated here as the functions our memorizing table
    # realises when trained on every labelling of every pattern.
    X = _all_patterns(p)
    seen = set()
    for labels in itertools.product([0, 1], repeat=len(X)):
        y = np.array(labels)
        pred = MemorizeRule().fit(X, y).predict(X)
        np.testing.assert_array_equal(pred, y)
        seen.add(tuple(pred))
    assert len(seen) == 2 ** (2**p) == 2 ** log2_memorize_class(p)


@pytest.mark.parametrize("p,k", [(1, 1), (2, 1), (3, 1), (4, 1), (2, 2), (3, 2), (4, 2), (3, 3), (4, 3)])
def test_lut_class_size_by_brute_counting(p, k):
    # C(p, k) * 2^(2^k): a choice of k pixels times a truth table over them (common
    # combinatorics). Counted here by listing every (pixel set, table) pair and the function of
    # the whole patch that each computes.
    X = _all_patterns(p)
    pairs = 0
    functions = set()
    for pixels in itertools.combinations(range(p), k):
        codes = X[:, list(pixels)].astype(int) @ (1 << np.arange(k))
        for table in itertools.product([False, True], repeat=2**k):
            pairs += 1
            functions.add(tuple(np.array(table)[codes]))
    assert pairs == round(2 ** log2_lut_class(p, k))
    # Different pairs can compute the same function, so the count is an upper bound on the number
    # of distinct rules, which only loosens the bound built on it.
    assert len(functions) <= pairs
    if k == 1:
        # 2p single-pixel rules, counting both polarities (pixel lit / pixel dark), plus the two
        # constants (common combinatorics).
        constants = {tuple([False] * len(X)), tuple([True] * len(X))}
        assert len(functions - constants) == 2 * p


@pytest.mark.parametrize("p,k", [(3, 1), (3, 2)])
def test_lut_rule_fits_exactly_the_functions_of_its_class(p, k):
    # The exhaustive truth-table search reaches zero training error on a labelling of all 2^p
    # patterns exactly when the labelling depends on at most k pixels, i.e. lies in the class
    # counted above.
    X = _all_patterns(p)
    in_class = set()
    for pixels in itertools.combinations(range(p), k):
        codes = X[:, list(pixels)].astype(int) @ (1 << np.arange(k))
        for table in itertools.product([0, 1], repeat=2**k):
            in_class.add(tuple(np.array(table)[codes]))
    perfect = set()
    for labels in itertools.product([0, 1], repeat=len(X)):
        y = np.array(labels)
        if len(set(labels)) < 2:
            perfect.add(labels)  # one class: the rule is a constant, which the class holds
            continue
        rule = LutRule(k=k).fit(X, y)
        if rule.train_errors_ == 0:
            np.testing.assert_array_equal(rule.predict(X), y)
            perfect.add(labels)
    assert perfect == in_class


# --- One-standard-error rule ------------------------------------------------------------------
# Hastie, Tibshirani & Friedman (2009), The Elements of Statistical Learning, 2nd ed., section 7.10
# (and Fig. 7.9): pick the most parsimonious model whose CV error is no more than one standard
# error above that of the best model; the standard error is that of the best model's CV estimate,
# the standard deviation of its K fold values / sqrt(K) (sample standard deviation, ddof = 1; the
# ddof from memory). For F1 (higher is better) "above the error" reads "below the best score".

def _one_se_by_definition(fold_scores: list[list[float] | None], complexity: list[float]) -> int | None:
    scored = [i for i, f in enumerate(fold_scores) if f is not None]
    if not scored:
        return None
    mean = {i: sum(fold_scores[i]) / len(fold_scores[i]) for i in scored}
    best = max(scored, key=lambda i: mean[i])
    k = len(fold_scores[best])
    sd = math.sqrt(sum((v - mean[best]) ** 2 for v in fold_scores[best]) / (k - 1))
    reach = [i for i in scored if mean[i] >= mean[best] - sd / math.sqrt(k)]
    least = min(complexity[i] for i in reach)
    return min(i for i in reach if complexity[i] == least)  # ties in size: the earlier model


def test_one_standard_error_choice_follows_the_definition():
    from pixelfit.evaluate import one_standard_error_choice

    rng = np.random.default_rng(11)
    for _ in range(500):
        n, k = int(rng.integers(1, 9)), int(rng.integers(2, 11))
        folds = [list(rng.uniform(0.3, 0.9) + rng.normal(0, rng.uniform(0.001, 0.2), k)) for _ in range(n)]
        folds = [None if rng.random() < 0.15 else f for f in folds]
        complexity = [float(c) for c in rng.permutation(n)] if rng.random() < 0.7 else \
            [float(c) for c in rng.integers(1, 4, n)]
        means = [None if f is None else float(np.mean(f)) for f in folds]
        sds = [None if f is None else float(np.std(f, ddof=1)) for f in folds]
        assert one_standard_error_choice(means, sds, k, complexity) == _one_se_by_definition(folds, complexity)


def test_recommendation_in_summary_is_the_one_standard_error_choice(tmp_path):
    # The same definition applied to the per-fold F1 a real `pixelfit fit` writes, with the
    # parameters as the measure of parsimony (what summary.json's conventions name).
    import json

    from pixelfit.cli import main

    rng = np.random.default_rng(4)
    imgs = rng.integers(0, 256, (240, 6, 6), dtype=np.uint8)
    noisy = (imgs[:, 1, 1] > 127) ^ (imgs[:, 4, 3] > 127) ^ (rng.random(240) < 0.15)
    np.savez(tmp_path / "s.npz", images=imgs, labels=np.where(noisy, "yes", "no"))
    assert main(["fit", str(tmp_path / "s.npz"), "--out", str(tmp_path / "o"), "--families",
                 "constant,lut,nb,tree", "--max-size", "4"]) == 0
    s = json.loads((tmp_path / "o" / "summary.json").read_text())
    rungs = s["rungs"]
    pick = _one_se_by_definition([r["cv"]["f1_folds"] if r["cv"] else None for r in rungs],
                                 [r["parameters"] for r in rungs])
    assert pick is not None and s["recommended"] == {"family": rungs[pick]["family"], "size": rungs[pick]["size"]}
    for r in rungs:  # the reported spread is the sample standard deviation of the folds
        assert r["cv"]["f1_std"] == pytest.approx(float(np.std(r["cv"]["f1_folds"], ddof=1)), rel=1e-12)


# --- Naive Bayes rung: VC dimension and bound ---------------------------------------------------
# A Bernoulli naive Bayes over k binary pixels scores log P(1|x) - log P(0|x) = w.x + b, a linear
# threshold function of the k bits (common knowledge), so its class lies inside the halfspaces of
# R^k, whose VC dimension is k + 1 (Vapnik (1998), Statistical Learning Theory, Wiley; the
# standard result for halfspaces, from memory): h = k + 1.

def _separable(points: np.ndarray, labels: np.ndarray) -> bool:
    # Feasibility of s_i (w.x_i + b) >= 1 by linear programming (scipy's linprog).
    from scipy.optimize import linprog

    s = np.where(labels, 1.0, -1.0)
    a = -s[:, None] * np.hstack([points, np.ones((len(points), 1))])
    res = linprog(np.zeros(points.shape[1] + 1), A_ub=a, b_ub=-np.ones(len(points)),
                  bounds=[(None, None)] * (points.shape[1] + 1), method="highs")
    return res.status == 0


@pytest.mark.parametrize("k", [1, 2, 3])
def test_halfspaces_on_k_bits_shatter_k_plus_1_points_and_no_more(k):
    cube = np.array(list(itertools.product((0.0, 1.0), repeat=k)))
    origin_and_units = np.vstack([np.zeros(k), np.eye(k)])  # k + 1 points
    for labels in itertools.product((False, True), repeat=k + 1):
        assert _separable(origin_and_units, np.array(labels))
    for subset in itertools.combinations(range(len(cube)), k + 2):  # brute force over the cube
        pts = cube[list(subset)]
        assert not all(_separable(pts, np.array(lab)) for lab in itertools.product((False, True), repeat=k + 2))


def test_nb_rung_is_linear_in_its_bits_and_reports_h_k_plus_1(rng):
    from pixelfit.families import FAMILIES

    X = rng.random((300, 25)) < 0.4
    y = (X[:, 3] & ~X[:, 7]) ^ (rng.random(300) < 0.1)
    for k in (1, 3, 6, 25):
        est = FAMILIES["nb"].make(k, 25, 0).fit(X, y)
        proba = est.predict_proba(X)
        logit = np.log(proba[:, 1]) - np.log(proba[:, 0])
        bits = X[:, est.named_steps["select"].get_support()].astype(float)
        design = np.hstack([bits, np.ones((len(X), 1))])
        coef, *_ = np.linalg.lstsq(design, logit, rcond=None)
        assert np.max(np.abs(design @ coef - logit)) < 1e-9  # affine in the k selected bits
        assert FAMILIES["nb"].size_figures(est, k, 25)["vc_dim"] == k + 1


@pytest.mark.parametrize("k,m", [(1, 200), (4, 60), (9, 10), (10, 10), (40, 10), (64, 11)])
def test_nb_rung_bound_recomputed_by_hand(k, m):
    # Burges (1998), Eq. 3 with h = k + 1, eta = 0.05 / C(p, k) (one class per choice of the k
    # pixels; Bonferroni, common practice), vacuous (1) when h >= m.
    from pixelfit.evaluate import generalization_bound

    p, err, h = 64, 0.125, k + 1
    b = generalization_bound("nb", {"log2_class_size": None, "vc_dim": h, "parameters": 2 * k + 1}, err, m, p)
    if h >= m:
        assert b["error_upper"] == 1.0 and "vacuous" in b["method"]
    else:
        eta = 0.05 / math.comb(p, k)
        by_hand = err + math.sqrt((h * (math.log(2 * m / h) + 1) - math.log(eta / 4)) / m)
        assert b["error_upper"] == pytest.approx(min(1.0, by_hand), rel=1e-12)
        assert "vacuous" not in b["method"]


# --- Threshold for a target precision or recall ---------------------------------------------------
# Reference: scikit-learn's precision_recall_curve (it calls positive when score >= t; pixelfit's
# one decision rule is score > t, so pixelfit's point at t must equal scikit-learn's at the next
# distinct score above t) and a brute force over every candidate threshold computing precision and
# recall from the definition; the choice among them is checked against the documented rule
# (pixelfit.evaluate._spec): largest smallest margin, or the most of the other measure for one target.

def _brute_points(y: np.ndarray, scores: np.ndarray) -> dict[float, tuple[float, float]]:
    out = {}
    for t in np.concatenate([[0.0], np.unique(scores)]):
        pred = scores > t
        if pred.any():
            tp = int(np.sum(pred & y))
            out[float(t)] = (tp / int(pred.sum()), tp / int(y.sum()))
    return out


def test_operating_points_and_target_search_against_brute_force():
    from sklearn.metrics import precision_recall_curve

    from pixelfit.evaluate import choose_threshold, operating_points

    rng = np.random.default_rng(8)
    for _trial in range(300):
        n = int(rng.integers(2, 60))
        y = rng.random(n) < rng.uniform(0.1, 0.9)
        if not y.any():
            continue
        scores = np.round(np.clip(y * rng.uniform(0, 0.5) + rng.random(n) * 0.7, 0, 1), int(rng.integers(1, 4)))
        brute = _brute_points(y, scores)
        pts = operating_points(y, scores)
        assert {pt["threshold"] for pt in pts} == set(brute)
        ref_p, ref_r, ref_t = precision_recall_curve(y, scores)
        ref = {float(t): (p, r) for p, r, t in zip(ref_p, ref_r, ref_t)}
        distinct = np.unique(scores)
        for pt in pts:
            assert (pt["precision"], pt["recall"]) == pytest.approx(brute[pt["threshold"]])
            above = distinct[distinct > pt["threshold"]][0]
            if float(above) in ref:
                assert (pt["precision"], pt["recall"]) == pytest.approx(ref[float(above)])
        for targets in ({"precision": 0.5}, {"precision": 0.95}, {"recall": 0.9}, {"precision": 0.7, "recall": 0.6},
                        {"precision": 1.0, "recall": 1.0}):
            got = choose_threshold(pts, targets)
            assert got is not None
            ok = {t: pr for t, pr in brute.items()
                  if all(dict(zip(("precision", "recall"), pr))[k] >= v for k, v in targets.items())}

            def margin(pr, targets=targets):
                return min(dict(zip(("precision", "recall"), pr))[k] - v for k, v in targets.items())

            if not ok:  # the smallest largest shortfall
                assert margin(brute[got["threshold"]]) == pytest.approx(max(margin(pr) for pr in brute.values()))
            elif len(targets) == 1:  # the most of the other measure among those meeting the target
                other = 1 if "precision" in targets else 0
                assert brute[got["threshold"]][other] == pytest.approx(max(pr[other] for pr in ok.values()))
            else:
                assert margin(brute[got["threshold"]]) == pytest.approx(max(margin(pr) for pr in ok.values()))
            assert brute[got["threshold"]] == pytest.approx((got["precision"], got["recall"]))


def test_pixel_mutual_information_equals_scikit_learns_discrete_estimate():
    # Reference: scikit-learn's mutual_info_classif with discrete features (per-column contingency
    # tables, natural log). Our count-based version must give the same numbers, constant pixels
    # (MI 0) and a label given as text included.
    from sklearn.feature_selection import mutual_info_classif

    from pixelfit.models import pixel_mutual_information

    rng = np.random.default_rng(11)
    X = rng.random((500, 40)) < rng.random(40)
    X[:, 3] = False
    X[:, 7] = True
    y = (X[:, 0] ^ (rng.random(500) < 0.2)) | X[:, 5]
    ref = mutual_info_classif(X.astype(np.int8), y, discrete_features=True, random_state=0)
    np.testing.assert_allclose(pixel_mutual_information(X, y), ref, rtol=1e-12, atol=1e-15)
    labels = np.where(y, "part", "gap")
    np.testing.assert_allclose(pixel_mutual_information(X.astype(np.uint8), labels), ref, rtol=1e-12, atol=1e-15)
    assert pixel_mutual_information(X, y)[[3, 7]].tolist() == [0.0, 0.0]
