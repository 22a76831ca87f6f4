"""An open dataset through the whole tool: scikit-learn's bundled handwritten digits.

sklearn.datasets.load_digits (scikit-learn; a copy of the UCI "Optical Recognition of Handwritten
Digits" test set): 1797 patches of 8x8 with values 0..16, ten classes. The test writes them as a
folder of PNG files (one sub-folder per digit), trains digit 0 against the rest through the
ordinary ``pixelfit fit`` command and checks the result against scikit-learn fitted directly on
the same split, and the figures of summary.json against their textbook formulas.
"""

from __future__ import annotations

import csv
import json
import math
import warnings

import numpy as np
import pytest
from PIL import Image
from skimage.filters import threshold_otsu
from sklearn.datasets import load_digits
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import Lasso, LogisticRegression
from statsmodels.stats.proportion import proportion_confint

from pixelfit.cli import main
from pixelfit.models import SparseLogistic

DIGIT_NAMES = ("zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine")

# A short ladder and 3 folds keep the whole file to a few seconds on two shared cores: the full
# default ladder (every family, every size, 5 folds) adds nothing to what is checked here. The
# ladder still offers a real choice: small truth tables, a shallow tree and the full logistic rung.
FIT_ARGS = ["--positive", "zero", "--families", "constant,lut,logistic,tree", "--sizes", "lut=1,2",
            "--sizes", "logistic=64", "--sizes", "tree=4", "--folds", "3", "--no-rules"]


def _digit_patches() -> tuple[np.ndarray, np.ndarray]:
    digits = load_digits()
    # 0..16 scaled to the full 0..255 range of an 8-bit grey image.
    images = np.round(digits.images * (255 / 16)).astype(np.uint8)
    return images, digits.target


@pytest.fixture(scope="module")
def digits_run(tmp_path_factory):
    """Write the digits as PNG folders, run ``pixelfit fit`` once; shared by the tests below."""
    images, target = _digit_patches()
    root = tmp_path_factory.mktemp("digits") / "patches"
    for i, (img, t) in enumerate(zip(images, target)):
        d = root / DIGIT_NAMES[t]
        d.mkdir(parents=True, exist_ok=True)
        Image.fromarray(img).save(d / f"d{i:04d}.png")
    out = root.parent / "run"
    assert main(["fit", str(root), "--out", str(out), *FIT_ARGS]) == 0
    summary = json.loads((out / "summary.json").read_text())
    with open(out / "split.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    return {"root": root, "out": out, "summary": summary, "rows": rows, "images": images, "target": target}


def _rung(summary: dict, family: str, size: int) -> dict:
    return next(r for r in summary["rungs"] if r["family"] == family and r["size"] == size)


def _split_arrays(run) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Grey patches (n, 8, 8), bits (n, 64), targets (n,) and held-out mask (n,).

    Rebuilt from split.csv and the PNG files, binarized with the threshold recorded in summary.json
    (pixel is 1 when value > t)."""
    s = run["summary"]
    gray = np.stack([np.asarray(Image.open(run["root"] / r["path"])) for r in run["rows"]])
    X = gray.reshape(len(gray), -1) > s["binarize"]["threshold"]
    y = np.array([r["label"] == s["dataset"]["positive"] for r in run["rows"]])
    test = np.array([r["subset"] == "test" for r in run["rows"]])
    return gray, X, y, test


def test_import_keeps_every_digit_patch(digits_run):
    s, images, target = digits_run["summary"], digits_run["images"], digits_run["target"]
    assert s["dataset"]["shape"] == [8, 8] and not s["dataset"]["skipped"]
    assert s["dataset"]["counts"] == {DIGIT_NAMES[t]: int(np.sum(target == t)) for t in range(10)}
    assert s["dataset"]["positive"] == "zero" and s["dataset"]["negative"] == "not-zero"
    # Every written patch is read back unchanged.
    gray, _, y, test = _split_arrays(digits_run)
    index = [int(r["path"].rsplit("/", 1)[-1][1:5]) for r in digits_run["rows"]]
    np.testing.assert_array_equal(gray, images[index])
    np.testing.assert_array_equal(y, target[index] == 0)
    assert test.sum() == s["split"]["n_test"] and (~test).sum() == s["split"]["n_train"]
    # The global threshold is scikit-image's Otsu threshold of the training patches
    # (skimage.filters.threshold_otsu), the part it is fitted on.
    assert s["binarize"] == {"method": "otsu", "threshold": float(threshold_otsu(gray[~test])), "invert": False}


def test_digit_zero_is_found(digits_run):
    s = digits_run["summary"]
    best = max((r for r in s["rungs"] if r["cv"]), key=lambda r: r["cv"]["f1_mean"])
    rec = _rung(s, s["recommended"]["family"], s["recommended"]["size"])
    # The acceptance level set for this check: both held-out precision and recall at least 0.95,
    # for the rung with the best CV F1 and for the recommended one (chosen without held-out data).
    for r in (best, rec):
        assert r["test"]["precision"] >= 0.95, (r["family"], r["size"], r["test"])
        assert r["test"]["recall"] >= 0.95, (r["family"], r["size"], r["test"])


def test_logistic_rung_agrees_with_sklearn(digits_run):
    s = digits_run["summary"]
    rung = _rung(s, "logistic", 64)
    _, X, y, test = _split_arrays(digits_run)
    # Rebuild our rung from the files alone; identical held-out counts show that split.csv and the
    # recorded threshold reproduce the run.
    ours = SparseLogistic(k=64).fit(X[~test], y[~test])
    pred = ours.predict(X[test])
    counts = {"tp": int(np.sum(pred & y[test])), "fp": int(np.sum(pred & ~y[test])),
              "fn": int(np.sum(~pred & y[test])), "tn": int(np.sum(~pred & ~y[test]))}
    assert counts == {k: rung["test"][k] for k in counts}
    # Reference: scikit-learn's sklearn.linear_model.LogisticRegression fitted exactly as the rung
    # fits its weights: with k = 64 on every pixel of the patch, with the rung's L2 penalty
    # C = refit_c = 10 and scikit-learn's default solver (lbfgs), max_iter = 2000. Same problem,
    # same solver: the weights, the scores and every held-out prediction must agree, and the counts
    # summary.json reports must be the reference's.
    assert SparseLogistic().refit_c == 10.0
    support = np.arange(64)
    np.testing.assert_array_equal(ours.support_, support)
    Xtr = X[~test][:, support].astype(np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        ref = LogisticRegression(C=10.0, max_iter=2000).fit(Xtr, y[~test])
    np.testing.assert_allclose(ours.coef_[0, support], ref.coef_[0], rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(ours.intercept_, ref.intercept_, rtol=1e-6, atol=1e-8)
    Xte = X[test][:, support].astype(np.float64)
    np.testing.assert_allclose(ours.decision_function(X[test]), ref.decision_function(Xte), rtol=1e-6, atol=1e-8)
    ref_pred = ref.predict(Xte)
    # The pixels the rung reports are those with a weight in the reference (pixels never lit in
    # training keep a zero weight).
    assert sorted(r * 8 + c for r, c in rung["pixels"]) == list(np.flatnonzero(ref.coef_[0]))
    np.testing.assert_array_equal(pred, ref_pred)
    ref_counts = {"tp": int(np.sum(ref_pred & y[test])), "fp": int(np.sum(ref_pred & ~y[test])),
                  "fn": int(np.sum(~ref_pred & y[test])), "tn": int(np.sum(~ref_pred & ~y[test]))}
    assert {k: rung["test"][k] for k in ref_counts} == ref_counts
    ref_train = ref.predict(Xtr)
    assert rung["train"]["accuracy"] == pytest.approx(float(np.mean(ref_train == y[~test])), abs=1e-12)


def test_sparse_logistic_rung_agrees_with_sklearn(digits_run):
    # A rung with fewer pixels than the patch: the support is the lasso's at the penalty the rung
    # reports (checked with scikit-learn's coordinate-descent Lasso, an independent solver of the
    # same problem: least squares of the 0/1 label with an L1 penalty, intercept not penalised),
    # and the weights are scikit-learn's L2 logistic fit (C = refit_c, default solver) on exactly
    # those pixels.
    _, X, y, test = _split_arrays(digits_run)
    Xtr = X[~test].astype(np.float64)
    for k in (3, 8):
        ours = SparseLogistic(k=k).fit(X[~test], y[~test])
        assert len(ours.support_) == k
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            l1 = Lasso(alpha=ours.alpha_, tol=1e-12, max_iter=100_000).fit(Xtr, y[~test].astype(np.float64))
            ref = LogisticRegression(C=10.0, max_iter=2000).fit(Xtr[:, ours.support_], y[~test])
        np.testing.assert_array_equal(np.flatnonzero(np.abs(l1.coef_) > 1e-9), ours.support_)
        np.testing.assert_allclose(ours.coef_[0, ours.support_], ref.coef_[0], rtol=1e-6, atol=1e-8)
        np.testing.assert_array_equal(ours.predict(X[test]), ref.predict(X[test][:, ours.support_].astype(float)))


def test_summary_figures_follow_their_formulas(digits_run):
    s = digits_run["summary"]
    # The convention is stated in the output itself.
    conv = s["conventions"]["bound"]
    assert "one-sided" in conv and "ln(1/delta)" in conv and "delta = 0.05" in conv
    m = s["split"]["n_train"]
    for r in s["rungs"]:
        t = r["test"]
        # Wilson intervals: statsmodels, proportion_confint(method="wilson").
        if t["precision_ci"] is not None:
            ref = proportion_confint(t["tp"], t["tp"] + t["fp"], method="wilson")
            assert t["precision_ci"] == pytest.approx(list(ref), abs=1e-12)
        ref = proportion_confint(t["tp"], t["tp"] + t["fn"], method="wilson")
        assert t["recall_ci"] == pytest.approx(list(ref), abs=1e-12)
        err = 1 - r["train"]["accuracy"]
        b = r["bound"]
        if r["log2_class_size"] is not None:
            # Mitchell (1997), Machine Learning, ch. 7, Hoeffding form (Eq. 7.3, number from
            # memory): err + sqrt((ln|H| + ln(1/delta)) / (2m)).
            expect = err + math.sqrt((r["log2_class_size"] * math.log(2) + math.log(1 / 0.05)) / (2 * m))
            assert "one-sided" in b["method"] and "ln(1/delta)" in b["method"]
        else:
            # Burges (1998), A Tutorial on Support Vector Machines for Pattern Recognition, Eq. 3,
            # with eta = 0.05 spread over the C(64, k) choices of k pixels (union bound, common
            # practice) and h = k + 1.
            h = r["vc_dim"]
            eta = 0.05 / math.comb(64, h - 1)
            expect = err + math.sqrt((h * (math.log(2 * m / h) + 1) - math.log(eta / 4)) / m)
        assert b["error_upper"] == pytest.approx(min(1.0, expect), rel=1e-9)
