"""Bias and variance, learning curves, stress tests and --augment shift1, on small generated data."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.model_selection import learning_curve

from pixelfit.cli import main
from pixelfit.data import Binarizer, Dataset, grey_perturbations, shift_patches, with_shifts
from pixelfit.evaluate import VERDICT_FLAT, VERDICT_HELPS, VERDICT_UNCLEAR, bias_variance_01, slope_verdict
from pixelfit.families import FAMILIES
from pixelfit.ladder import LadderCancelled, prepare, run_ladder
from pixelfit.ladder_process import run_ladder_in_process
from pixelfit.robustness import (
    FRACTIONS,
    CheckProgress,
    CheckSettings,
    augment,
    curve_sizes,
    curve_splits,
    run_checks,
)
from pixelfit.rulefile import load_rule

STRESS_NAMES = [f"shift:{dx},{dy}" for dy in (-1, 0, 1) for dx in (-1, 0, 1) if (dx, dy) != (0, 0)] + [
    "gain:0.9", "gain:1.1", "offset:-10", "offset:+10", "noise:4", "noise:8", "stuck:0", "stuck:255"]
BV_KEYS = {"replicates", "loss", "bias", "variance", "unbiased_variance", "biased_variance"}


def dataset(imgs, labels) -> Dataset:
    return Dataset(images=np.asarray(imgs, np.uint8), labels=np.asarray(labels), names=[f"p{i}" for i in range(len(imgs))],
                   source="generated", layout="generated")


def planted(rng, n=400):
    """5x5 patches of random bits; positive when at least two of pixels (1,1), (2,3), (3,2) are lit."""
    bits = rng.random((n, 5, 5)) < 0.5
    y = bits[:, 1, 1].astype(int) + bits[:, 2, 3] + bits[:, 3, 2] >= 2
    return np.where(bits, 200, 40), np.where(y, "yes", "no")


def moving(rng, n=600):
    """7x7 dark noise; positives hold a bright 3x3 square whose center moves by up to one pixel."""
    imgs = (rng.random((n, 7, 7)) * 60).astype(np.uint8)
    y = rng.random(n) < 0.5
    for i in np.flatnonzero(y):
        dy, dx = rng.integers(-1, 2, 2)
        imgs[i, 2 + dy:5 + dy, 2 + dx:5 + dx] = 200
    return imgs, np.where(y, "yes", "no")


def checks_of(prep, plan, grey=None, settings=None, folds=0, recommended=None):
    rungs = [p.rung for p in run_ladder(prep, plan, folds=folds) if p.rung is not None]
    records = list(run_checks(prep, rungs, grey, recommended, settings or CheckSettings(0, False, True)))
    assert all(isinstance(r, CheckProgress) for r in records)
    return rungs, records[-1].checks


# ---- bias and variance ------------------------------------------------------------------------

def brute_force_domingos(P: np.ndarray, y: np.ndarray) -> dict:
    """Domingos, P. (2000). A Unified Bias-Variance Decomposition and its Applications. ICML.

    Written from the paper's definitions, patch by patch, with noise taken as zero: the main
    prediction y_m minimises the expected loss over the training sets (ties: the negative class,
    as pixelfit states); B(x) = L(t, y_m); V(x) = E_D[L(y_m, y_D)]; for the two-class 0-1 loss the
    loss is B(x) + c2 V(x) with c2 = 1 where B(x) = 0 and c2 = -1 where B(x) = 1 (Theorem 2,
    recalled from memory). Averages over x.
    """
    b, n = P.shape
    rows = []
    for i in range(n):
        preds = [bool(P[d, i]) for d in range(b)]
        cost = {c: sum(p != c for p in preds) for c in (False, True)}
        main = False if cost[False] <= cost[True] else True
        bias = float(main != bool(y[i]))
        var = sum(p != main for p in preds) / b
        loss = sum(p != bool(y[i]) for p in preds) / b
        c2 = 1.0 if bias == 0 else -1.0
        assert loss == pytest.approx(bias + c2 * var, abs=1e-12)
        rows.append((loss, bias, var, var if bias == 0 else 0.0, var if bias == 1 else 0.0))
    loss, bias, var, unb, bia = (sum(col) / n for col in zip(*rows))
    return {"loss": loss, "bias": bias, "variance": var, "unbiased_variance": unb, "biased_variance": bia}


@pytest.mark.parametrize("b", [1, 2, 5, 8, 25])
def test_decomposition_matches_brute_force_and_the_identity(rng, b):
    P = rng.random((b, 120)) < rng.random(120)  # patches of every stability
    y = rng.random(120) < 0.4
    got = bias_variance_01(P, y)
    want = brute_force_domingos(P, y)
    assert set(got) == BV_KEYS and got["replicates"] == b
    for k, v in want.items():
        assert got[k] == pytest.approx(v, abs=1e-12)
    assert abs(got["loss"] - (got["bias"] + got["unbiased_variance"] - got["biased_variance"])) <= 1e-12
    assert got["variance"] == pytest.approx(got["unbiased_variance"] + got["biased_variance"], abs=1e-12)


def test_decomposition_by_hand():
    # Patch 0: votes 1,1,0 -> main 1, truth 1: bias 0, variance 1/3. Patch 1: votes 0,0,0, truth 1:
    # bias 1, variance 0. Patch 2: votes 1,0,0 -> main 0, truth 1: bias 1, variance 1/3.
    P = np.array([[1, 0, 1], [1, 0, 0], [0, 0, 0]], bool)
    got = bias_variance_01(P, np.array([1, 1, 1], bool))
    assert got["bias"] == pytest.approx(2 / 3)
    assert got["variance"] == pytest.approx(2 / 9)
    assert got["unbiased_variance"] == pytest.approx(1 / 9) and got["biased_variance"] == pytest.approx(1 / 9)
    assert got["loss"] == pytest.approx((1 / 3 + 1 + 2 / 3) / 3)
    assert bias_variance_01(np.zeros((3, 0), bool), np.zeros(0, bool))["loss"] is None


def test_identity_holds_for_every_rung(rng):
    imgs, labels = planted(rng, 240)
    prep = prepare(dataset(imgs, labels), Binarizer("fixed", 128))
    plan = [("constant", 0), ("lut", 1), ("lut", 3), ("tree", 2), ("nb", 4), ("memorize", 25)]
    _, checks = checks_of(prep, plan, settings=CheckSettings(6, False, False))
    for key, bv in checks.bias_variance.items():
        assert bv["replicates"] == 6, key
        assert abs(bv["loss"] - (bv["bias"] + bv["unbiased_variance"] - bv["biased_variance"])) <= 1e-12, key
    assert checks.bias_variance["constant-0"]["variance"] == 0.0  # the class counts stay in every replicate


def test_memorizing_end_varies_most_where_patterns_repeat(rng):
    # 3x3 patches: 512 patterns for 900 training patches, so held-out patterns were mostly seen,
    # a few times each, with 20 % of labels flipped. The label is pixel (1,1): the small rungs find
    # it in every replicate; the whole-patch table follows each replicate's few noisy labels.
    bits = rng.random((1200, 3, 3)) < 0.5
    y = bits[:, 1, 1] ^ (rng.random(1200) < 0.2)
    # A stratified split: the default keeps identical patches on one side, so no held-out pattern
    # would have been seen in training and the whole-patch table would fall back to one answer.
    prep = prepare(dataset(np.where(bits, 200, 40), np.where(y, "yes", "no")), Binarizer("fixed", 128),
                   split="stratified")
    plan = [("constant", 0), ("lut", 1), ("lut", 3), ("tree", 2), ("memorize", 9)]
    _, checks = checks_of(prep, plan, settings=CheckSettings(9, False, False))
    var = {k: v["variance"] for k, v in checks.bias_variance.items()}
    assert max(var, key=var.get) == "memorize-9"
    assert var["memorize-9"] > 0.05 and var["constant-0"] == 0.0


# ---- stress tests -----------------------------------------------------------------------------

def test_shift_replicates_edges():
    img = np.arange(9, dtype=np.uint8).reshape(1, 3, 3)
    # content moved one to the right: the first column is repeated
    assert shift_patches(img, 0, 1)[0].tolist() == [[0, 0, 1], [3, 3, 4], [6, 6, 7]]
    assert shift_patches(img, -1, 0)[0].tolist() == [[3, 4, 5], [6, 7, 8], [6, 7, 8]]
    names = [n for n, _ in grey_perturbations(img)]
    assert names == STRESS_NAMES[:-2]
    assert with_shifts(img).shape == (9, 3, 3)


def test_one_pixel_shifts_hurt_a_planted_truth_table(rng):
    imgs, labels = planted(rng)
    prep = prepare(dataset(imgs, labels), Binarizer("fixed", 128))
    rungs, checks = checks_of(prep, [("lut", 3)], grey=imgs[prep.test_mask])
    st = checks.stress["lut-3"]
    assert sorted(rungs[0].pixels) == [6, 13, 17]  # found the planted pixels
    assert set(STRESS_NAMES + ["threshold:-5", "threshold:+5", "worst"]) == set(st)
    assert rungs[0].test["f1"] == 1.0
    for name in STRESS_NAMES[:8]:
        assert st[name]["f1"] < 0.8, name  # every shift moves the three pixels off the planted ones
    for name in ("gain:0.9", "gain:1.1", "offset:-10", "offset:+10", "noise:4", "noise:8"):
        assert st[name]["f1"] == 1.0, name  # levels 40 and 200 stay on their side of 128
    assert st["worst"]["name"].startswith("shift:") and st["worst"]["f1_drop"] > 0.3
    assert st["stuck:0"]["pixel"] in ([1, 1], [2, 3], [3, 2])


def test_augment_shift1_buys_robustness_to_shifts(rng):
    imgs, labels = moving(rng)
    drops = {}
    for mode in ("none", "shift1"):
        prep = augment(prepare(dataset(imgs, labels), Binarizer("fixed", 128)), mode)
        _, checks = checks_of(prep, [("lut", 4)], grey=imgs[prep.test_mask])
        st = checks.stress["lut-4"]
        base = st["worst"]["f1_unperturbed"]
        drops[mode] = np.mean([base - st[n]["f1"] for n in STRESS_NAMES[:8]])
    assert drops["none"] > 0.05
    assert drops["shift1"] < drops["none"] / 2


def test_augment_keeps_the_held_out_part(rng):
    imgs, labels = moving(rng, 80)
    plain = prepare(dataset(imgs, labels), Binarizer("fixed", 128))
    aug = augment(plain, "shift1")
    assert len(aug.y_train) == 9 * len(plain.y_train) and aug.augment == "shift1"
    assert np.array_equal(aug.X_test, plain.X_test) and np.array_equal(aug.X_train[: len(plain.y_train)], plain.X_train)
    assert aug.train_fingerprint != plain.train_fingerprint


# ---- learning curves --------------------------------------------------------------------------

def test_learning_curve_matches_scikit_learn(rng):
    """The CV error is what scikit-learn's learning_curve measures on the same folds and sizes."""
    imgs, labels = planted(rng, 300)
    prep = prepare(dataset(imgs, labels), Binarizer("fixed", 128))
    rungs, checks = checks_of(prep, [("tree", 1), ("tree", 2), ("tree", 3), ("tree", 4)],
                              settings=CheckSettings(0, True, False), folds=3)
    center = rungs[1]
    records = list(run_checks(prep, rungs, None, center, CheckSettings(0, True, False)))
    lc = records[-1].checks.learning_curve
    assert lc["rungs"] == ["tree-1", "tree-2", "tree-3"] and lc["fractions"] == list(FRACTIONS)
    splits = curve_splits(prep, 0)
    for key in lc["rungs"]:
        size = int(key.split("-")[1])
        est = clone(FAMILIES["tree"].make(size, prep.n_pixels, 0))
        sizes = curve_sizes(len(splits[0][0]))
        assert all(len(tr) == len(splits[0][0]) for tr, _ in splits)
        _, _, val = learning_curve(est, prep.X_train, prep.y_train, train_sizes=sizes, cv=splits, shuffle=False,
                                   scoring="accuracy")
        ours = [p for p in lc["points"] if p["rung"] == key]
        for j, p in enumerate(ours):
            assert p["cv_error"] == pytest.approx(1 - val[j].mean(), abs=1e-12)
            assert p["cv_error_std"] == pytest.approx(np.std(1 - val[j], ddof=1), abs=1e-12)
            assert 0 <= p["test_error"] <= 1
        assert lc["verdict"][key] in (VERDICT_HELPS, VERDICT_FLAT, VERDICT_UNCLEAR)


def test_slope_verdicts_by_hand():
    assert slope_verdict(-0.05, 0.01) == VERDICT_HELPS
    assert slope_verdict(0.001, 0.002) == VERDICT_FLAT
    assert slope_verdict(-0.02, 0.02) == VERDICT_UNCLEAR
    assert slope_verdict(-0.05, None) == VERDICT_UNCLEAR


# ---- progress, cancel, the trainer process ----------------------------------------------------

def test_checks_cancel_between_fits(rng):
    imgs, labels = planted(rng, 200)
    prep = prepare(dataset(imgs, labels), Binarizer("fixed", 128))
    rungs = [p.rung for p in run_ladder(prep, [("tree", 2), ("tree", 3)], folds=0) if p.rung]
    calls = []

    def cancel():
        calls.append(1)
        return len(calls) > 3

    seen = []
    with pytest.raises(LadderCancelled):
        for pr in run_checks(prep, rungs, imgs[prep.test_mask], None, CheckSettings(5), cancel):
            seen.append(pr)
    assert seen and seen[0].checks is not None and "tree-2" in seen[0].checks.stress


def test_trainer_process_relays_the_checks(rng):
    imgs, labels = planted(rng, 160)
    prep = prepare(dataset(imgs, labels), Binarizer("fixed", 128))
    records = list(run_ladder_in_process(prep, [("constant", 0), ("lut", 2)], folds=2,
                                         checks=CheckSettings(3), grey_test=imgs[prep.test_mask]))
    last = records[-1]
    assert isinstance(last, CheckProgress) and last.done == last.total
    assert set(last.checks.stress) == {"constant-0", "lut-2"}
    assert last.checks.bias_variance["constant-0"]["variance"] == 0.0


# ---- command line and files -------------------------------------------------------------------

def test_fit_writes_the_contract(tmp_path, class_folder):
    out = tmp_path / "out"
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant,lut,tree", "--max-size", "3",
                 "--bias-variance", "3", "--folds", "3"]) == 0
    s = json.loads((out / "summary.json").read_text())
    for name in ("bias_variance.png", "learning_curve.png", "stress.png"):
        assert (out / name).stat().st_size > 1000
    assert s["settings"]["augment"] == "none" and s["split"]["augment"] == "none"
    for r in s["rungs"]:
        assert set(r["bias_variance"]) == BV_KEYS and r["bias_variance"]["replicates"] == 3
        assert set(STRESS_NAMES) <= set(r["stress"]) and set(r["stress"]["worst"]) >= {"name", "f1_drop"}
        for name in STRESS_NAMES:
            assert set(r["stress"][name]) >= {"precision", "recall", "f1"}
    lc = s["learning_curve"]
    assert set(lc) >= {"rungs", "fractions", "points", "verdict"} and lc["fractions"] == [0.1, 0.2, 0.4, 0.7, 1.0]
    assert len(lc["points"]) == 5 * len(lc["rungs"]) and set(lc["verdict"]) == set(lc["rungs"])
    assert set(lc["points"][0]) >= {"rung", "fraction", "cv_error", "cv_error_std", "test_error"}
    rule = load_rule(out / "rules" / "lut-2.json")
    assert rule.doc["stress"] == s["rungs"][2]["stress"]
    assert rule.doc["bias_variance"] == s["rungs"][2]["bias_variance"]


def test_fit_with_checks_off_and_augment(tmp_path, class_folder, capsys):
    out = tmp_path / "out"
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant", "--bias-variance", "2",
                 "--folds", "2"]) == 0
    assert (out / "bias_variance.png").exists()  # an earlier run with the check on
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant,tree", "--max-size", "2",
                 "--bias-variance", "0", "--augment", "shift1", "--folds", "2"]) == 0
    s = json.loads((out / "summary.json").read_text())
    assert all(r["bias_variance"] is None for r in s["rungs"]) and not (out / "bias_variance.png").exists()
    assert (out / "stress.png").exists()
    assert s["settings"]["augment"] == "shift1" and s["split"]["augment"] == "shift1"
    import csv

    with open(out / "split.csv", newline="") as fh:
        n_train = sum(row["subset"] == "train" for row in csv.DictReader(fh))
    assert s["split"]["n_train"] == 9 * n_train
    assert main(["fit", str(class_folder), "--out", str(out), "--bias-variance", "1"]) == 2
    assert "--bias-variance" in capsys.readouterr().err
