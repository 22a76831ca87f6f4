"""Training on data or settings that cannot give the ladder it asks for: each gets a clear answer,
and a ladder stopped part-way keeps what had finished."""
from __future__ import annotations

import json

import numpy as np
import pytest

import pixelfit.ladder as ladder_mod
from pixelfit.cli import main
from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import TrainingError
from pixelfit.families import plan_rungs
from pixelfit.ladder import LadderCancelled, conclude, effective_folds, prepare, run_ladder


def _dataset(n_pos: int, n_neg: int, rng, shape=(6, 6)) -> Dataset:
    n = n_pos + n_neg
    images = (rng.random((n,) + shape) * 100).astype(np.uint8)
    images[:n_pos, 2:4, 2:4] = 230  # positives carry a bright spot
    labels = np.array(["spot"] * n_pos + ["blank"] * n_neg)
    return Dataset(images, labels, [f"#{i}" for i in range(n)], "generated", "npz")


def _save_npz(path, ds: Dataset):
    np.savez(path, images=ds.images, labels=ds.labels)
    return path


def _one_line_refusal(capsys, text: str) -> None:
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("pixelfit: ") and text in err, err


# ---- a class with fewer patches than folds ------------------------------------------------------


def test_fewer_patches_than_folds_reduces_folds_with_a_note(rng):
    prep = prepare(_dataset(4, 40, rng), Binarizer.parse("fixed:128"), test_fraction=0.25, seed=0)
    n_small = int(prep.y_train.sum())
    assert 2 <= n_small < 5
    folds, note = effective_folds(prep.y_train, 5)
    assert folds == n_small
    assert note == (f"cross-validation uses {n_small} folds, not 5: the smaller class has only "
                    f"{n_small} training patches")
    records = list(run_ladder(prep, [("constant", 0), ("lut", 1)], folds=5))
    assert records[0].message == note and records[0].rung is None  # said before any work
    rungs = [r.rung for r in records if r.rung is not None]
    assert [r.cv["folds"] for r in rungs] == [n_small, n_small]
    assert all(note in r.notes for r in rungs)


def test_one_training_patch_in_a_class_turns_cross_validation_off(rng):
    y = np.array([True] + [False] * 20)
    assert effective_folds(y, 5) == (0, "cross-validation is off: the smaller class has only 1 training patch")


def test_fewer_patches_than_folds_through_the_cli(rng, tmp_path, capsys):
    path = _save_npz(tmp_path / "few.npz", _dataset(4, 40, rng))
    out = tmp_path / "run"
    assert main(["fit", str(path), "--out", str(out), "--families", "constant,lut", "--sizes", "lut=1",
                 "--folds", "10"]) == 0
    s = json.loads((out / "summary.json").read_text())
    for r in s["rungs"]:
        assert r["cv"]["folds"] < 10
        assert any(n.startswith(f"cross-validation uses {r['cv']['folds']} folds, not 10") for n in r["notes"])


def test_class_too_small_to_split_refused(rng, tmp_path, capsys):
    path = _save_npz(tmp_path / "one.npz", _dataset(1, 30, rng))
    assert main(["fit", str(path), "--out", str(tmp_path / "r")]) == 2
    _one_line_refusal(capsys, "class 'spot' has 1 patch(es); a stratified split needs at least 2 per class")
    assert not (tmp_path / "r").exists()


def test_folds_of_one_refused(rng, tmp_path, capsys):
    path = _save_npz(tmp_path / "ok.npz", _dataset(10, 30, rng))
    assert main(["fit", str(path), "--out", str(tmp_path / "r"), "--folds", "1"]) == 2
    _one_line_refusal(capsys, "--folds: cross-validation folds must be 0 (off) or at least 2, not 1")
    assert not (tmp_path / "r").exists()


# ---- all patches identical ----------------------------------------------------------------------


def test_all_patches_identical_runs_and_says_so(tmp_path, capsys):
    images = np.full((40, 6, 6), 60, np.uint8)
    images[:, 1:3, 1:3] = 220
    labels = np.array(["spot"] * 12 + ["blank"] * 28)
    ds = Dataset(images, labels, [f"#{i}" for i in range(40)], "generated", "npz")
    # Copies cannot be kept together and still held out: the default split says so in one line ...
    with pytest.raises(TrainingError, match="no held-out patch when identical grey patches stay together"):
        prepare(ds, Binarizer.parse("otsu"), test_fraction=0.25, seed=0)
    # ... and a stratified split measures anyway, with every held-out patch leaked.
    prep = prepare(ds, Binarizer.parse("otsu"), test_fraction=0.25, seed=0, split="stratified")
    assert prep.check.figures["leaked_test_grey"] == len(prep.y_test)
    assert prep.check.figures["duplicate_groups"] == 1 and prep.check.figures["duplicate_patches"] == 40
    plan = [("constant", 0), ("lut", 2), ("nb", 4), ("logistic", 2), ("tree", 3), ("mlp", 2), ("memorize", 36)]
    records = list(run_ladder(prep, plan, folds=3))
    note = ladder_mod.identical_note(prep.X_train)
    assert note is not None and note.startswith("all training patches are the same after binarization")
    assert records[0].message == note
    rungs = [r.rung for r in records if r.rung is not None]
    assert len(rungs) == len(plan)
    for r in rungs:
        assert note in r.notes
        # Every rule gives every (identical) patch the same answer.
        assert len(np.unique(r.test_pred)) == 1
        assert r.train["accuracy"] == pytest.approx(28 / 40, abs=0.05)
    assert conclude(rungs, prep.y_test).family == "constant"
    # Through the CLI: exit 0, the note in summary.json.
    path = tmp_path / "same.npz"
    np.savez(path, images=images, labels=labels)
    assert main(["fit", str(path), "--out", str(tmp_path / "run"), "--families", "constant,lut",
                 "--sizes", "lut=1", "--folds", "3", "--split", "stratified"]) == 0
    s = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert all(note in r["notes"] for r in s["rungs"])


def test_varied_patches_get_no_identical_note(rng):
    prep = prepare(_dataset(10, 30, rng), Binarizer.parse("otsu"), test_fraction=0.25, seed=0)
    assert ladder_mod.identical_note(prep.X_train) is None


# ---- a size larger than the number of pixels ----------------------------------------------------


@pytest.mark.parametrize("family", ["lut", "nb", "logistic"])
def test_size_larger_than_pixels_refused(family):
    with pytest.raises(TrainingError, match=f"{family} size 37 is larger than the 36 pixels of a patch"):
        plan_rungs([family], 36, overrides={family: [1, 37]})


def test_size_larger_than_pixels_refused_by_the_cli(rng, tmp_path, capsys):
    path = _save_npz(tmp_path / "ok.npz", _dataset(10, 30, rng))
    assert main(["fit", str(path), "--out", str(tmp_path / "r"), "--sizes", "lut=2,40"]) == 2
    _one_line_refusal(capsys, "lut size 40 is larger than the 36 pixels of a patch")
    assert not (tmp_path / "r").exists()


# ---- cancel at any point: what finished stays ---------------------------------------------------

PLAN = [("constant", 0), ("lut", 1), ("lut", 2), ("nb", 2), ("tree", 2), ("memorize", 36)]


@pytest.fixture
def prep(rng):
    return prepare(_dataset(14, 30, rng), Binarizer.parse("otsu"), test_fraction=0.25, seed=0)


def test_full_ladder_record_count(prep):
    records = list(run_ladder(prep, PLAN, folds=2))
    assert len(records) == len(PLAN) * 3 and sum(r.rung is not None for r in records) == len(PLAN)


@pytest.mark.parametrize("stop_after", [1, 2, 3, 4, 8, 9, 13, 15, 17])  # every place in a rung
def test_cancel_after_any_record_keeps_finished_rungs(prep, stop_after):
    seen: list = []
    rungs = []
    with pytest.raises(LadderCancelled):
        for pr in run_ladder(prep, PLAN, folds=2, cancel=lambda: len(seen) >= stop_after):
            seen.append(pr)
            if pr.rung is not None:
                rungs.append(pr.rung)
    # The ladder stopped at the first check after the flip: no record after it.
    assert len(seen) == stop_after
    assert [r.key for r in rungs] == [f"{f}-{s}" for f, s in PLAN[: len(rungs)]]
    assert len(rungs) == stop_after // 3
    for r in rungs:  # finished rungs are whole: measured and usable
        assert r.test["tp"] + r.test["fp"] + r.test["fn"] + r.test["tn"] == len(prep.y_test)
        assert r.cv is not None and len(r.cv["f1_folds"]) == 2
    if rungs:
        conclude(rungs, prep.y_test)


@pytest.mark.parametrize("after_calls", [2, 9, 30])
def test_cancel_inside_a_truth_table_search(rng, after_calls):
    # 3 of 144 pixels: 487,344 pixel sets, scored in chunks; the search asks cancel() before
    # each chunk, so a cancel is obeyed at the next chunk, not after the whole search.
    prep16 = prepare(_dataset(14, 30, rng, shape=(12, 12)), Binarizer.parse("otsu"), test_fraction=0.25, seed=0)
    calls = [0]

    def cancel():
        calls[0] += 1
        return calls[0] >= after_calls

    rungs = []
    with pytest.raises(LadderCancelled):
        for pr in run_ladder(prep16, [("constant", 0), ("lut", 3)], folds=0, cancel=cancel):
            if pr.rung is not None:
                rungs.append(pr.rung)
    assert calls[0] == after_calls  # nothing ran past the first check after the flip
    assert [r.key for r in rungs] == ["constant-0"]


def test_interrupted_fit_writes_what_finished(prep, rng, tmp_path, capsys, monkeypatch):
    path = _save_npz(tmp_path / "ok.npz", _dataset(14, 30, rng))
    real = ladder_mod.run_ladder

    def interrupted(*args, **kwargs):  # Ctrl-C after the second rung
        finished = 0
        for pr in real(*args, **kwargs):
            yield pr
            if pr.rung is not None:
                finished += 1
                if finished == 2:
                    raise KeyboardInterrupt

    monkeypatch.setattr(ladder_mod, "run_ladder", interrupted)
    out = tmp_path / "run"
    rc = main(["fit", str(path), "--out", str(out), "--families", "constant,lut,memorize", "--sizes", "lut=1,2",
               "--folds", "2"])
    assert rc == 1
    assert "interrupted: 2 of 4 rungs finished and were written" in capsys.readouterr().err
    s = json.loads((out / "summary.json").read_text())
    assert s["cancelled"] is True
    assert [(r["family"], r["size"]) for r in s["rungs"]] == [("constant", 0), ("lut", 1)]
    assert (out / "summary.csv").read_text().count("\n") == 3  # header and two rungs
