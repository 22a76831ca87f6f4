"""Large sets: the slow families train on a stratified subsample of the training part, and say so."""

import json

import numpy as np
import pytest
from conftest import make_patches
from sklearn.base import clone

import pixelfit.ladder as ladder
from pixelfit.cli import main
from pixelfit.conventions import SUBSAMPLE_PATCHES, SUBSAMPLED_FAMILIES
from pixelfit.data import Binarizer, Dataset
from pixelfit.ladder import prepare, run_ladder, stratified_subsample, subsample_for, training_sample
from pixelfit.robustness import CheckSettings, run_checks
from pixelfit.text import SUBSAMPLE_MARK, ladder_table


@pytest.mark.parametrize("n", [1, 7, 50, 99])
def test_stratified_subsample_by_definition(n):
    y = np.array([0] * 70 + [1] * 25 + [2] * 5)
    rows = stratified_subsample(y, n, seed=4)
    assert len(rows) == n and len(np.unique(rows)) == n and np.all(np.diff(rows) > 0)
    counts = np.bincount(y[rows], minlength=3)
    share = np.bincount(y) * n / len(y)  # each class its share, rounded (and at least one when there is room)
    if n >= 3:  # room for every class
        assert np.all(np.abs(counts - share) < 1) and counts.min() >= 1
    assert np.array_equal(rows, stratified_subsample(y, n, seed=4))  # seeded
    assert np.array_equal(stratified_subsample(y, 200, seed=4), np.arange(100))  # larger than the set: all rows


def test_only_the_slow_families_above_the_threshold():
    y = np.zeros(SUBSAMPLE_PATCHES + 1, bool)
    y[::3] = True
    assert set(SUBSAMPLED_FAMILIES) == {"logistic", "mlp"}
    assert len(subsample_for("logistic", y, 0)) == SUBSAMPLED_FAMILIES["logistic"] == SUBSAMPLE_PATCHES
    # the networks' subsample is smaller, drawn from the rows every family's CV folds use
    mlp = subsample_for("mlp", y, 0)
    assert len(mlp) == SUBSAMPLED_FAMILIES["mlp"] < SUBSAMPLE_PATCHES
    assert set(mlp) <= set(training_sample(y, 0)) and np.all(np.diff(mlp) > 0)
    assert subsample_for("lut", y, 0) is None and subsample_for("tree", y, 0) is None
    n = SUBSAMPLED_FAMILIES["mlp"]
    assert subsample_for("mlp", y[:n], 0) is None  # at the threshold: every patch
    assert len(subsample_for("mlp", y[:n + 1], 0)) == n and training_sample(y[:n + 1], 0) is None


@pytest.fixture
def small_threshold(monkeypatch):
    monkeypatch.setattr(ladder, "SUBSAMPLE_PATCHES", 90)
    monkeypatch.setattr(ladder, "SUBSAMPLED_FAMILIES", {"logistic": 90, "mlp": 60})


def test_a_subsampled_rung_fits_the_subsample_and_is_measured_on_all_held_out(rng, small_threshold):
    imgs, labels = make_patches(rng, n=240)
    prep = prepare(Dataset(imgs, labels, [], "generated", "npz"), Binarizer("otsu"), seed=2, split="stratified")
    n_train, n_test = len(prep.y_train), len(prep.y_test)
    rungs = {pr.rung.key: pr.rung for pr in run_ladder(prep, [("lut", 2), ("logistic", 2), ("mlp", 2)], folds=3)
             if pr.rung}
    lut = rungs["lut-2"]
    # A family outside SUBSAMPLED_FAMILIES: final fit on every training patch, CV on the subsample
    assert lut.subsample is None and sum(lut.train[k] for k in ("tp", "fp", "fn", "tn")) == n_train
    assert lut.cv["subsample"] == {"n": 90, "of": n_train}
    assert any("cross-validated on a stratified subsample of 90 of the" in n for n in lut.notes)
    rows = stratified_subsample(prep.y_train, 90, 0)
    assert lut.chosen_on == "cv" and len(lut.choice_scores) == 90
    assert np.array_equal(lut.choice_labels, prep.y_train[rows])
    # out-of-fold scores exist on the subsample's rows only
    assert np.isnan(lut.oof_scores).sum() == n_train - 90 and not np.isnan(lut.oof_scores[rows]).any()
    # the CV figures are those of a 3-fold CV on the subsample alone, refitted here by hand
    from sklearn.model_selection import StratifiedKFold

    Xs, ys = prep.X_train[rows], prep.y_train[rows]
    f1s = []
    for tr, va in StratifiedKFold(3, shuffle=True, random_state=0).split(Xs, ys):
        pred = clone(lut.estimator).fit(Xs[tr], ys[tr]).predict(Xs[va])
        tp = np.sum(pred & ys[va])
        f1s.append(2 * tp / (np.sum(pred) + np.sum(ys[va])) if tp else 0.0)
    assert lut.cv["f1_mean"] == pytest.approx(np.mean(f1s))
    for key, m in (("logistic-2", 90), ("mlp-2", 60)):
        r = rungs[key]
        assert r.subsample == {"n": m, "of": n_train}
        assert any(f"stratified subsample of {m} of the" in n for n in r.notes)
        assert sum(r.train[k] for k in ("tp", "fp", "fn", "tn")) == m
        assert sum(r.test[k] for k in ("tp", "fp", "fn", "tn")) == n_test
        # every training patch keeps an out-of-sample score: out-of-fold, or never fitted at all
        assert r.chosen_on == "cv" and len(r.choice_scores) == n_train and not np.isnan(r.choice_scores).any()
        assert r.summary(prep.shape)["subsample"] == {"n": m, "of": n_train}
        assert r.cv["subsample"] == {"n": m, "of": n_train}
        # the final model is the one trained on the subsample: refit it there and compare
        sub = subsample_for(r.family, prep.y_train, 0)
        assert len(sub) == m
        again = clone(r.estimator).fit(prep.X_train[sub], prep.y_train[sub])
        assert np.array_equal(again.predict(prep.X_test), r.test_pred)
    summary = {"rungs": [r.summary(prep.shape) for r in rungs.values()]}
    table = ladder_table(summary)
    assert f"mlp-2{SUBSAMPLE_MARK}" in table and "lut-2 " in table and f"lut-2{SUBSAMPLE_MARK}" not in table
    assert f"stratified subsample of the {n_train:,} training patches (logistic 90, mlp 60)" in table
    assert f"CV F1 of the rungs not marked (subsample) on a stratified subsample of 90 of the {n_train:,}" in table
    # the checks refit a subsampled rung on subsamples too, and finish
    checks = None
    for pr in run_checks(prep, list(rungs.values()), None, rungs["lut-2"], CheckSettings(bias_variance=2)):
        checks = pr.checks or checks
    assert checks is not None and checks.bias_variance["mlp-2"] is not None


def test_fit_says_so_in_summary_json_and_the_table(npz_file, tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(ladder, "SUBSAMPLE_PATCHES", 40)
    monkeypatch.setattr(ladder, "SUBSAMPLED_FAMILIES", {"logistic": 40, "mlp": 30})
    out = tmp_path / "run"
    assert main(["fit", str(npz_file), "--out", str(out), "--families", "constant,logistic", "--sizes",
                 "logistic=1", "--folds", "2", "--bias-variance", "0"]) == 0
    s = json.loads((out / "summary.json").read_text())
    by = {r["family"]: r for r in s["rungs"]}
    assert by["constant"]["subsample"] is None
    assert s["sampling"]["cv_and_checks"] == {"n": 40, "of": s["split"]["n_train"]}
    assert by["constant"]["cv"]["subsample"] == {"n": 40, "of": s["split"]["n_train"]}
    assert by["logistic"]["subsample"] == {"n": 40, "of": s["split"]["n_train"]}
    assert any("stratified subsample of 40" in n for n in by["logistic"]["notes"])
    text = capsys.readouterr().out
    assert f"logistic-1{SUBSAMPLE_MARK}" in text and "(subsample) trained" in text


def test_checks_and_importance_of_a_large_set_run_on_its_subsamples(rng, monkeypatch):
    monkeypatch.setattr(ladder, "SUBSAMPLE_PATCHES", 90)
    monkeypatch.setattr(ladder, "HELD_OUT_SAMPLE", 40)
    imgs, labels = make_patches(rng, n=240)
    prep = prepare(Dataset(imgs, labels, [], "generated", "npz"), Binarizer("otsu"), seed=2, split="stratified")
    n_train, n_test = len(prep.y_train), len(prep.y_test)
    assert n_test > 40
    r = next(pr.rung for pr in run_ladder(prep, [("tree", 2)], folds=3) if pr.rung)
    few = stratified_subsample(prep.y_test, 40, 0)
    # the permutation map is that of the held-out subsample
    from pixelfit.evaluate import permutation_map

    expect = permutation_map(r.estimator, prep.X_test[few], prep.y_test[few], prep.shape, pixels=r.pixels, seed=0)
    assert np.array_equal(r.importance["permutation"], expect)
    grey_test = prep.dataset.images[prep.test_mask]
    checks = None
    for pr in run_checks(prep, [r], grey_test, r, CheckSettings(bias_variance=2)):
        checks = pr.checks or checks
    # stress: on the held-out subsample
    from pixelfit.robustness import stress_inputs, stress_rung

    grey = grey_test[few]
    assert checks.stress["tree-2"] == stress_rung(r, prep.binarizer, grey, prep.y_test[few],
                                                  stress_inputs(prep.binarizer, grey, 0))
    # bias and variance: replicates of the 90-patch training subsample, predicted on every held-out patch
    from pixelfit.evaluate import bias_variance_01
    from pixelfit.robustness import bootstrap_indices

    rows = stratified_subsample(prep.y_train, 90, 0)
    Xs, ys = prep.X_train[rows], prep.y_train[rows]
    preds = np.array([clone(r.estimator).fit(Xs[i], ys[i]).predict(prep.X_test)
                      for i in bootstrap_indices(ys, 2, 0)], bool)
    assert checks.bias_variance["tree-2"] == bias_variance_01(preds, prep.y_test)
    # the learning curve's largest training fold is two thirds of the subsample, not of the training part
    assert checks.learning_curve is not None
    from pixelfit.ladder import sampling_facts

    assert sampling_facts(n_train, n_test) == {"cv_and_checks": {"n": 90, "of": n_train},
                                               "subsampled_families": {},  # both families' sizes are larger
                                               "importance_and_stress": {"n": 40, "of": n_test}}
    assert sampling_facts(90, 40) == {"cv_and_checks": None, "subsampled_families": {},
                                      "importance_and_stress": None}
