"""Refusals of settings that would train on nothing, and core messages free of any front end's names."""
from __future__ import annotations

import json

import numpy as np
import pytest

from pixelfit.cli import main
from pixelfit.data import Binarizer, Dataset, choose_positive, stratified_split
from pixelfit.errors import PixelfitError
from pixelfit.families import parse_size_overrides, plan_rungs
from pixelfit.ladder import effective_folds, prepare, run_ladder


def _dataset(rng, n_pos=12, n_neg=28, shape=(6, 6)) -> Dataset:
    n = n_pos + n_neg
    images = (rng.random((n,) + shape) * 100).astype(np.uint8)
    images[:n_pos, 2:4, 2:4] = 230
    labels = np.array(["spot"] * n_pos + ["blank"] * n_neg)
    return Dataset(images, labels, [f"#{i}" for i in range(n)], "generated", "npz")


def _refusal(capsys) -> str:
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("pixelfit: "), err
    return err


# ---- a binarization that leaves every training pixel the same bit -------------------------------


@pytest.mark.parametrize("spec", ["fixed:256", "fixed:0,invert"])
def test_threshold_beyond_every_grey_level_is_refused_before_the_ladder(rng, spec):
    ds = _dataset(rng)
    lo, hi = int(ds.images.min()), int(ds.images.max())
    with pytest.raises(PixelfitError) as info:
        prepare(ds, Binarizer.parse(spec), seed=0)
    msg = str(info.value)
    assert info.value.field == "binarize"
    assert msg.startswith(f"{Binarizer.parse(spec).describe()} makes every training pixel 0")
    # The grey range is that of the training patches (the held-out ones may reach further).
    train_lo, train_hi = (int(v) for v in msg.split("grey levels from ")[1].split(";")[0].split(" to "))
    assert lo <= train_lo <= train_hi <= hi and "--" not in msg


@pytest.mark.parametrize("method", ["otsu", "otsu-patch", "mean-patch"])
def test_constant_images_are_refused_for_every_automatic_method(method):
    ds = Dataset(np.full((20, 4, 4), 87, np.uint8), np.array(["a"] * 8 + ["b"] * 12),
                 [f"#{i}" for i in range(20)], "generated", "npz")
    # All copies of one grey patch: the default split keeps them together and refuses first, so
    # the binarization is tested on a stratified split.
    with pytest.raises(PixelfitError, match="identical grey patches stay together"):
        prepare(ds, Binarizer.parse(method))
    with pytest.raises(PixelfitError, match="every training pixel has grey level 87, and no threshold splits them"):
        prepare(ds, Binarizer.parse(method), split="stratified")


def test_blank_binarization_through_the_cli(rng, tmp_path, capsys):
    ds = _dataset(rng)
    path = tmp_path / "set.npz"
    np.savez(path, images=ds.images, labels=ds.labels)
    assert main(["fit", str(path), "--out", str(tmp_path / "r"), "--binarize", "fixed:256"]) == 2
    err = _refusal(capsys)
    assert err.startswith("pixelfit: --binarize: fixed:256 makes every training pixel 0")
    assert not (tmp_path / "r").exists()


def test_one_lit_pixel_is_enough_to_train(rng):
    ds = _dataset(rng)
    ds.images[:] = 10
    ds.images[:12, 0, 0] = 200  # one lit pixel in each positive patch; the split keeps some in training
    # every patch of a class is one grey patch, so only a stratified split can hold some out
    prep = prepare(ds, Binarizer.parse("fixed:100"), test_fraction=0.25, seed=0, split="stratified")
    assert prep.X_train.sum() == prep.y_train.sum() > 0


# ---- seed, largest size, folds, held-out share, sizes, positive class ---------------------------


@pytest.mark.parametrize("seed", [-5, 2**32, 1.5, True])
def test_seed_out_of_range_names_the_range(rng, seed):
    with pytest.raises(PixelfitError, match=r"the seed must be a whole number from 0 to 2\*\*32-1 \(4294967295\)"):
        prepare(_dataset(rng), Binarizer.parse("otsu"), seed=seed)


def test_largest_seed_is_accepted(rng):
    # The top of the range is valid for scikit-learn's random_state (numpy's legacy seed limit).
    prepare(_dataset(rng), Binarizer.parse("otsu"), seed=2**32 - 1)


def test_seed_through_the_cli(rng, tmp_path, capsys):
    ds = _dataset(rng)
    path = tmp_path / "set.npz"
    np.savez(path, images=ds.images, labels=ds.labels)
    assert main(["fit", str(path), "--out", str(tmp_path / "r"), "--seed", "-5"]) == 2
    assert _refusal(capsys) == ("pixelfit: --seed: the seed must be a whole number from 0 to 2**32-1 "
                                "(4294967295), not -5\n")


def test_seed_is_checked_by_the_ladder_too(rng):
    prep = prepare(_dataset(rng), Binarizer.parse("otsu"), seed=0)
    with pytest.raises(PixelfitError, match="the seed must be"):
        list(run_ladder(prep, [("constant", 0)], folds=0, seed=-1))


def test_largest_size_zero_is_refused(rng, tmp_path, capsys):
    with pytest.raises(PixelfitError) as info:
        plan_rungs(["constant", "lut"], 36, max_size=0)
    assert info.value.field == "max_size" and "at least 1" in str(info.value)
    ds = _dataset(rng)
    path = tmp_path / "set.npz"
    np.savez(path, images=ds.images, labels=ds.labels)
    assert main(["fit", str(path), "--out", str(tmp_path / "r"), "--max-size", "0"]) == 2
    assert _refusal(capsys).startswith("pixelfit: --max-size: the largest size must be at least 1")
    assert plan_rungs(["constant", "lut"], 36, max_size=1) == [("constant", 0), ("lut", 1)]


@pytest.mark.parametrize("call, field", [
    (lambda: effective_folds(np.array([True, False] * 5), 1), "folds"),
    (lambda: stratified_split(np.array([True, False] * 5), 1.5), "test_fraction"),
    (lambda: parse_size_overrides(["lut=0"]), "sizes"),
    (lambda: parse_size_overrides(["nothing=1"]), "sizes"),
    (lambda: choose_positive({"a": 3, "b": 4}, "c"), "positive"),
])
def test_core_messages_name_the_setting_not_a_flag(call, field):
    with pytest.raises(PixelfitError) as info:
        call()
    assert info.value.field == field
    assert "--" not in str(info.value), str(info.value)


def test_cli_puts_its_flag_before_a_core_refusal(rng, tmp_path, capsys):
    ds = _dataset(rng)
    path = tmp_path / "set.npz"
    np.savez(path, images=ds.images, labels=ds.labels)
    for args, start in ((["--folds", "1"], "pixelfit: --folds: cross-validation folds must be"),
                        (["--test-fraction", "1.5"], "pixelfit: --test-fraction: the held-out share"),
                        (["--positive", "nope"], "pixelfit: --positive: the class to detect, 'nope',"),
                        (["--sizes", "lut=0"], "pixelfit: --sizes: sizes 'lut=0'")):
        assert main(["fit", str(path), "--out", str(tmp_path / "r"), *args]) == 2
        assert _refusal(capsys).startswith(start)
    assert not (tmp_path / "r").exists()


# ---- apply to a folder whose classes are not the rule's ------------------------------------------


@pytest.fixture
def rule_and_folders(tmp_path, class_folder):
    assert main(["fit", str(class_folder), "--out", str(tmp_path / "run"), "--families", "constant,lut",
                 "--sizes", "lut=1", "--folds", "0"]) == 0
    renamed = tmp_path / "renamed"
    renamed.mkdir()
    for old, new in (("spot", "defect"), ("blank", "ok")):
        (class_folder / old).rename(renamed / new)
    return tmp_path / "run" / "rules" / "lut-1.json", renamed


def test_apply_to_other_class_names_scores_unlabelled_and_says_why(rule_and_folders, tmp_path, capsys):
    rule, folder = rule_and_folders
    capsys.readouterr()
    assert main(["apply", str(rule), str(folder), "--csv", str(tmp_path / "a.csv")]) == 0
    out = capsys.readouterr().out
    assert ("the patches' classes are 'defect', 'ok', but the rule tells 'spot' from 'blank': scored as "
            "unlabelled (--positive NAME says which class is 'spot')") in out
    assert "labels " not in out  # no metrics from labels that mean nothing to this rule
    assert (tmp_path / "a.csv").read_text().splitlines()[0] == "path,score,prediction"


def test_apply_with_positive_maps_the_folder_classes(rule_and_folders, tmp_path, capsys):
    rule, folder = rule_and_folders
    capsys.readouterr()
    assert main(["apply", str(rule), str(folder), "--positive", "defect", "--csv", str(tmp_path / "a.csv")]) == 0
    out = capsys.readouterr().out
    rows = (tmp_path / "a.csv").read_text().splitlines()
    assert rows[0] == "path,score,prediction,label"
    # The metrics are counted from the mapping: a defect called 'spot' is a true positive.
    body = [r.split(",") for r in rows[1:]]
    tp = sum(1 for r in body if r[3] == "defect" and r[2] == "spot")
    fn = sum(1 for r in body if r[3] == "defect" and r[2] == "blank")
    assert f"tp {tp}," in out and f"fn {fn}," in out and tp + fn == len(list((folder / "defect").iterdir()))
    assert main(["apply", str(rule), str(folder), "--positive", "spot"]) == 2
    assert _refusal(capsys).startswith("pixelfit: --positive: 'spot' is not a class of these patches; "
                                       "classes found: defect, ok")


def test_apply_with_the_rules_own_classes_needs_no_mapping(tmp_path, class_folder, capsys):
    assert main(["fit", str(class_folder), "--out", str(tmp_path / "run"), "--families", "lut",
                 "--sizes", "lut=1", "--folds", "0"]) == 0
    capsys.readouterr()
    assert main(["apply", str(tmp_path / "run" / "rules" / "lut-1.json"), str(class_folder)]) == 0
    captured = capsys.readouterr()
    assert "labels " in captured.out and "scored as unlabelled" not in captured.out
    s = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert s["dataset"]["positive"] == "spot"
