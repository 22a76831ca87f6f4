import itertools

import numpy as np
import pytest

from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import TrainingError
from pixelfit.evaluate import Spec, apply_spec
from pixelfit.families import parse_size_overrides, plan_rungs
from pixelfit.ladder import conclude, prepare, run_ladder, train_rung
from pixelfit.models import LutRule


def brute_force_lut(X, y, k):
    """The definition: every k-subset, majority label per pattern, first strict minimum wins."""
    best = None
    for subset in itertools.combinations(range(X.shape[1]), k):
        codes = X[:, list(subset)].astype(int) @ (1 << np.arange(k))
        pos = np.bincount(codes[y], minlength=2**k)
        neg = np.bincount(codes[~y], minlength=2**k)
        err = int(np.minimum(pos, neg).sum())
        if best is None or err < best[0]:
            best = (err, subset)
    return best


def planted(rng, n=800, p=36, noise=0.05):
    X = rng.random((n, p)) < 0.5
    a, b, c = 4, 17, 29
    y = (X[:, a] & ~X[:, b]) | (X[:, b] & X[:, c])
    y ^= rng.random(n) < noise
    return X, y, (a, b, c)


def test_lut_recovers_planted_pixels(rng):
    X, y, pixels = planted(rng)
    rule = LutRule(k=3).fit(X, y)
    assert tuple(rule.pixels_) == pixels
    err, subset = brute_force_lut(X, y, 3)
    assert rule.train_errors_ == err
    assert int((rule.predict(X) != y).sum()) == err
    assert rule.search_ == "exhaustive" and rule.n_candidates_ == 7140  # C(36, 3)


@pytest.mark.parametrize("k", [1, 2, 3])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_lut_optimal_on_random_data(k, seed):
    rng = np.random.default_rng(seed)
    # few patches and few pixels: many ties between pixel sets
    X = rng.random((40, 9)) < 0.5
    y = rng.random(40) < 0.4
    rule = LutRule(k=k).fit(X, y)
    err, subset = brute_force_lut(X, y, k)
    assert rule.train_errors_ == err
    assert tuple(rule.pixels_) == subset


def test_lut_beam_beyond_budget(rng):
    X, y, pixels = planted(rng)
    rule = LutRule(k=3, max_seconds=0).fit(X, y)  # no time for any exhaustive search: beam from k=1
    assert rule.search_ == "beam"
    assert rule.train_errors_ >= brute_force_lut(X, y, 3)[0]


def test_lut_table_conventions():
    X = np.array([[0], [0], [1], [1]], bool)
    y = np.array([True, False, True, True])
    rule = LutRule(k=1).fit(X, y)
    assert rule.table_.tolist() == [False, True]  # pattern 0 is a 1:1 tie -> negative
    X2 = np.array([[0, 0], [0, 1], [1, 0]], bool)
    rule2 = LutRule(k=2).fit(X2, np.array([True, True, False]))
    assert rule2.table_[3] == True  # noqa: E712 -- unseen pattern: the training majority


def realistic(rng, n=1200, shape=(8, 8)):
    """Blurry bright blob at a jittered place for positives, noise everywhere, 5 % label noise."""
    h, w = shape
    imgs = rng.normal(90, 30, (n,) + shape)
    y = rng.random(n) < 0.4
    rr, cc = np.mgrid[0:h, 0:w]
    for i in np.flatnonzero(y):
        r0, c0 = h / 2 + rng.normal(0, 0.8), w / 2 + rng.normal(0, 0.8)
        imgs[i] += 120 * np.exp(-((rr - r0) ** 2 + (cc - c0) ** 2) / 3.0)
    y ^= rng.random(n) < 0.05
    labels = np.where(y, "blob", "plain")
    return Dataset(np.clip(imgs, 0, 255).astype(np.uint8), labels, [f"#{i}" for i in range(n)], "generated", "npz")


@pytest.fixture(scope="module")
def ladder():
    ds = realistic(np.random.default_rng(5))
    prep = prepare(ds, Binarizer.parse("otsu"), test_fraction=0.3, seed=1)
    plan = plan_rungs(["constant", "lut", "tree", "memorize"], prep.n_pixels,
                      overrides=parse_size_overrides(["lut=1,2,3", "tree=1,3,6"]))
    rungs = [pr.rung for pr in run_ladder(prep, plan, folds=3) if pr.rung]
    rec = conclude(rungs, prep.y_test)
    apply_spec(rungs, prep.y_train, prep.y_test, Spec(precision=0.9))
    return prep, rungs, rec


def test_trade_off_visible(ladder):
    prep, rungs, rec = ladder
    by = {r.key: r for r in rungs}
    mem = by["memorize-64"]
    best = max(rungs, key=lambda r: r.test["f1"] or 0)
    assert mem.train["f1"] >= 0.99
    assert (best.test["f1"] or 0) - (mem.test["f1"] or 0) >= 0.2
    assert rec is not None and rec.recommended and rec.family != "memorize"


def test_bounds_never_below_training_error(ladder):
    _, rungs, _ = ladder
    for r in rungs:
        if r.bound is not None:
            assert r.bound["error_upper"] >= 1 - r.train["accuracy"]


def test_every_rung_measured(ladder):
    prep, rungs, _ = ladder
    for r in rungs:
        assert r.cv["folds"] == 3 and len(r.cv["f1_folds"]) == 3
        assert r.importance["permutation"].shape == prep.shape
        assert r.figures["parameters"] >= 1
    by = {r.key: r for r in rungs}
    search = by["lut-3"].search
    assert search["method"] == "exhaustive" and search["candidates"] == search["sets"] == 41664  # C(64, 3)
    assert search["largest_exact_size"] == 3 and search["estimated_seconds"] >= 0
    native = by["lut-3"].importance["native"]
    assert np.count_nonzero(native) <= 3 and native.max() > 0
    assert by["lut-2"].versus_smaller["size"] == 1
    target = by["lut-3"].spec
    assert target["chosen_on"] == "cv" and target["verdict"] in ("meets", "plausible", "fails")
    assert by["lut-3"].operating_point == {"threshold": target["threshold"], "chosen_on": "cv"}


def test_spec_threshold_never_sees_held_out(ladder):
    """Shuffled held-out labels change the judgement, never the thresholds chosen."""
    prep, rungs, _ = ladder
    spec = Spec(precision=0.8, recall=0.7)
    apply_spec(rungs, prep.y_train, prep.y_test, spec)
    before = {r.key: r.spec["threshold"] for r in rungs}
    shuffled = np.random.default_rng(3).permutation(prep.y_test)
    apply_spec(rungs, prep.y_train, shuffled, spec)
    assert {r.key: r.spec["threshold"] for r in rungs} == before
    assert any(r.spec["test"]["tp"] != 0 for r in rungs)
    apply_spec(rungs, prep.y_train, prep.y_test, Spec(precision=0.9))  # leave the module's state as it was


def test_recommendation_ignores_held_out(ladder):
    prep, rungs, rec = ladder
    flipped = conclude(rungs, ~prep.y_test)  # any held-out truth: same choice
    assert flipped.key == rec.key


def test_size_larger_than_pixels_refused():
    with pytest.raises(TrainingError, match="larger than"):
        plan_rungs(["lut"], 16, overrides={"lut": [17]})


def test_single_rung_without_cv(ladder):
    prep, _, _ = ladder
    r = train_rung(prep, "nb", 4, folds=0)
    assert r.cv is None and r.bound is not None and r.figures["vc_dim"] == 5
