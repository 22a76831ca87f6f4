"""The data check: exact counts on hand-made data, against brute force written from the definitions."""

from __future__ import annotations

import csv
import json
from collections import defaultdict

import numpy as np
import pytest

from pixelfit.cli import main
from pixelfit.data import CHECK_KEYS, Binarizer, Dataset, check_data, grouped_split, pack_binarized, stratified_split
from pixelfit.errors import TrainingError
from pixelfit.ladder import leak_free_test, prepare, run_ladder, suspect_labels


def brute_force(images, labels, target, B, test_mask):
    """Every figure from its definition, comparing patches pairwise (small data only)."""
    n = len(images)
    grey = defaultdict(list)
    for i in range(n):
        grey[images[i].tobytes()].append(i)
    dups = [g for g in grey.values() if len(g) > 1]
    bits = defaultdict(list)
    for i in range(n):
        bits[B[i].tobytes()].append(i)
    conflicts = [g for g in bits.values() if len({bool(target[i]) for i in g}) == 2]
    train = [i for i in range(n) if not test_mask[i]]
    test = [i for i in range(n) if test_mask[i]]
    tb = defaultdict(list)
    for i in train:
        tb[B[i].tobytes()].append(bool(target[i]))
    errors = sum(min(sum(v), len(v) - sum(v)) for v in tb.values())
    return {
        "duplicate_groups": len(dups),
        "duplicate_patches": sum(len(g) for g in dups),
        "cross_class_duplicate_groups": sum(len({labels[i] for i in g}) > 1 for g in dups),
        "conflict_groups": len(conflicts),
        "conflict_patches": sum(len(g) for g in conflicts),
        "error_floor": errors / len(train),
        "leaked_test_grey": sum(any((images[t] == images[j]).all() for j in train) for t in test),
        "leaked_test_binary": sum(any((B[t] == B[j]).all() for j in train) for t in test),
        "near_duplicate_test": sum(any((B[t] != B[j]).sum() <= 1 for j in train) for t in test),
    }


def _figures(images, labels, target, test_mask, threshold=128):
    B = images.reshape(len(images), -1) >= threshold
    c = check_data(images, labels, target, pack_binarized(B), B.shape[1], test_mask)
    return c, B


def planted():
    """4x4 patches at grey 0/255 with planted copies; the positive class 'pos' is the first label."""
    rng = np.random.default_rng(3)
    base = (rng.random((12, 4, 4)) < 0.5).astype(np.uint8) * 200 + 20
    rows, labels, test = [], [], []

    def add(img, label, held):
        rows.append(img.copy())
        labels.append(label)
        test.append(held)

    for k in range(12):  # twelve distinct patches, alternating classes, every third held out
        add(base[k], "pos" if k % 2 else "neg", k % 3 == 0)
    add(base[1], "pos", False)       # within-class copy of a training patch: 1 group
    add(base[1], "pos", True)        # ... and one held out: grey leak, binary leak, near-duplicate
    add(base[2], "pos", True)        # cross-class copy of a training patch (base[2] is 'neg'): conflict, leaks
    dim = base[4].copy()
    dim[dim > 100] = 180             # another grey, the same bits as base[4] (training): binary leak only
    add(dim, "neg", True)
    one_bit = base[5].copy()
    one_bit[0, 0] = 220 if one_bit[0, 0] < 100 else 20  # one bit from base[5] (training): near-duplicate only
    add(one_bit, "pos", True)
    return np.array(rows, np.uint8), np.array(labels), np.array(test)


def test_planted_counts_are_exact_and_match_brute_force():
    images, labels, test = planted()
    target = labels == "pos"
    c, B = _figures(images, labels, target, test)
    f = c.figures
    assert f == brute_force(images, labels, target, B, test)
    assert (f["duplicate_groups"], f["duplicate_patches"], f["cross_class_duplicate_groups"]) == (2, 5, 1)
    assert (f["conflict_groups"], f["conflict_patches"]) == (1, 2)
    assert (f["leaked_test_grey"], f["leaked_test_binary"], f["near_duplicate_test"]) == (2, 3, 4)
    # Training: base[2] 'neg' only once in training (its 'pos' copy is held out) -> no training conflict.
    assert f["error_floor"] == 0.0
    assert set(c.counts()) == set(CHECK_KEYS) and c.counts()["suspects"] is None
    assert {g for i, kind, g in c.findings if kind == "duplicate"} == {"grey-1", "grey-2"}
    assert list(c.members("grey-1")) == [1, 12, 13]


@pytest.mark.parametrize("seed", range(6))
def test_random_sets_with_many_copies_match_brute_force(seed):
    rng = np.random.default_rng(seed)
    n_base = int(rng.integers(3, 30))
    base = (rng.random((n_base, 3, 5)) < 0.4).astype(np.uint8) * int(rng.integers(130, 256))
    base[rng.random(base.shape) < 0.1] += 1  # grey differences under the same bits
    pick = rng.integers(0, n_base, int(rng.integers(10, 80)))
    images = base[pick]
    labels = np.where(rng.random(len(pick)) < 0.4, "a", "b")
    test = rng.random(len(pick)) < 0.3
    test[0], test[1] = False, True
    c, B = _figures(images, labels, labels == "a", test)
    assert c.figures == brute_force(images, labels, labels == "a", B, test)


def test_error_floor_is_the_memorizing_rungs_training_error():
    images, labels, _ = planted()
    images = np.concatenate([images, images[:6]])
    labels = np.concatenate([labels, np.where(labels[:6] == "pos", "neg", "pos")])  # flipped copies
    ds = Dataset(images, labels, [f"#{i}" for i in range(len(labels))], "hand-made", "npz")
    prep = prepare(ds, Binarizer.parse("fixed:128"), positive="pos", split="stratified")
    assert prep.check.figures["error_floor"] > 0
    rung = next(p.rung for p in run_ladder(prep, [("memorize", 16)], folds=0) if p.rung)
    assert 1 - rung.train["accuracy"] == pytest.approx(prep.check.figures["error_floor"])


def test_group_split_leaves_no_grey_leak_and_keeps_class_counts():
    rng = np.random.default_rng(0)
    images = rng.integers(0, 256, (300, 4, 4), dtype=np.uint8)
    labels = np.where(np.arange(300) % 3 == 0, "mark", "clean")
    images[1:40] = images[0]               # a huge group, all 'mark' or 'clean' alike
    images[100:104] = images[99]           # small groups within a class ...
    images[201] = images[200]              # ... and across classes (200 mark, 201 clean)
    ds = Dataset(images, labels, [f"#{i}" for i in range(300)], "hand-made", "npz")
    strat = prepare(ds, Binarizer.parse("otsu"), split="stratified")
    grouped = prepare(ds, Binarizer.parse("otsu"))
    assert grouped.split_method == "group-duplicates" and strat.split_method == "stratified"
    assert strat.check.figures["leaked_test_grey"] > 0
    assert grouped.check.figures["leaked_test_grey"] == 0
    assert grouped.check.figures["duplicate_groups"] == 3
    assert grouped.check.figures["duplicate_patches"] == 40 + 5 + 2
    for cls in ("mark", "clean"):
        a = int((strat.test_mask & (labels == cls)).sum())
        b = int((grouped.test_mask & (labels == cls)).sum())
        assert abs(a - b) <= 1
    # No duplicates: the same draw as the stratified split, patch for patch.
    y = labels == "mark"
    assert (grouped_split(y, np.arange(300), 0.25, 7) == stratified_split(y, 0.25, 7)).all()


def test_group_split_on_an_unsplittable_set_says_why():
    y = np.array([True] * 4 + [False] * 8)
    with pytest.raises(TrainingError, match="use --split stratified"):
        grouped_split(y, np.zeros(12, int), 0.25, 0)


def test_cv_folds_keep_copies_together(monkeypatch):
    import pixelfit.ladder as ladder_mod

    rng = np.random.default_rng(1)
    images = rng.integers(0, 256, (120, 3, 3), dtype=np.uint8)
    images[10:30] = images[9]
    labels = np.where(np.arange(120) % 2 == 0, "a", "b")
    ds = Dataset(images, labels, [f"#{i}" for i in range(120)], "hand-made", "npz")
    prep = prepare(ds, Binarizer.parse("otsu"))
    groups = prep.train_groups
    assert groups is not None
    seen = []
    real = ladder_mod.StratifiedGroupKFold

    class Spy(real):
        def split(self, X, y, g):
            for tr, va in super().split(X, y, g):
                seen.append((tr, va))
                yield tr, va

    monkeypatch.setattr(ladder_mod, "StratifiedGroupKFold", Spy)
    list(run_ladder(prep, [("nb", 2)], folds=4))
    assert len(seen) == 4
    for tr, va in seen:
        assert not set(groups[tr]) & set(groups[va])


def test_planted_label_flips_are_the_suspects():
    rng = np.random.default_rng(5)
    n = 400
    y = rng.random(n) < 0.4
    images = rng.integers(0, 256, (n, 4, 4), dtype=np.uint8)
    images[:, 0, :] = np.where(y, 230, 20)[:, None]  # the top row says the class outright
    labels = np.where(y, "pos", "neg")
    subset = np.where(np.arange(n) % 4 == 0, "test", "train")
    flipped = np.array([1, 2, 3, 5, 6])  # training rows
    labels[flipped] = np.where(labels[flipped] == "pos", "neg", "pos")
    ds = Dataset(images, labels, [f"p{i}" for i in range(n)], "hand-made", "pre-split", subset=subset)
    prep = prepare(ds, Binarizer.parse("fixed:128"), positive="pos")
    rungs = [p.rung for p in run_ladder(prep, [("nb", 4), ("logistic", 4), ("tree", 2), ("constant", 0)],
                                        folds=5) if p.rung]
    found = suspect_labels(prep, rungs)
    assert sorted(s["path"] for s in found) == sorted(f"p{i}" for i in flipped)
    assert all(s["score"] >= 0.9 and s["label"] == labels[int(s["path"][1:])] for s in found)
    # The constant's score is its training rate: it disputes no label with a high score.
    assert suspect_labels(prep, [r for r in rungs if r.family == "constant"]) == []
    no_cv = [p.rung for p in run_ladder(prep, [("nb", 4)], folds=0) if p.rung]
    assert suspect_labels(prep, no_cv) is None  # no out-of-fold scores without cross-validation
    # Leak-free held-out figures leave out exactly the held-out patches with a binarized copy in training.
    leaked = prep.check.figures["leaked_test_binary"]
    assert leaked > 0
    assert all(leak_free_test(prep, r)["left_out"] == leaked for r in rungs)


def test_check_command_and_fit_write_the_contract(tmp_path, capsys):
    images, labels, _ = planted()
    path = tmp_path / "planted.npz"
    rng = np.random.default_rng(2)
    images = np.concatenate([images] * 4 + [rng.integers(0, 256, (60, 4, 4), dtype=np.uint8)])
    labels = np.concatenate([labels] * 4 + [np.array(["pos", "neg"] * 30)])
    np.savez(path, images=images, labels=labels)
    assert main(["check", str(path), "--out", str(tmp_path / "c"), "--binarize", "fixed:128"]) == 0
    doc = json.loads((tmp_path / "c" / "check.json").read_text())
    assert list(doc["check"]) == list(CHECK_KEYS)
    assert doc["split"]["method"] == "group-duplicates"
    assert doc["check"]["leaked_test_grey"] == 0
    rows = list(csv.DictReader(open(tmp_path / "c" / "check.csv")))
    assert list(rows[0]) == ["path", "label", "finding", "group"]
    assert sum(r["finding"] == "duplicate" for r in rows) == doc["check"]["duplicate_patches"]
    assert main(["scan", str(path)]) == 0
    out = capsys.readouterr().out
    assert f"{doc['check']['duplicate_groups']} group(s) of identical grey patches" in out
    assert "binarized with otsu, the default" in out
    assert main(["fit", str(path), "--out", str(tmp_path / "f"), "--families", "constant,nb", "--max-size", "2",
                 "--split", "stratified", "--binarize", "fixed:128"]) == 0
    out = capsys.readouterr().out
    s = json.loads((tmp_path / "f" / "summary.json").read_text())
    assert s["split"]["method"] == "stratified"
    chk = s["dataset"]["check"]
    assert list(chk) == list(CHECK_KEYS) and isinstance(chk["suspects"], list)
    assert chk["leaked_test_grey"] > 0 and chk["conflict_groups"] > 0
    warning = [line for line in out.splitlines() if line.startswith("warning:")]
    assert len(warning) == 1 and "held-out patches with a copy in training" in warning[0]
    assert "held-out F1 without the" in out
    assert all(r["held_out_without_leaked"]["left_out"] == chk["leaked_test_binary"] for r in s["rungs"])
    split_rows = list(csv.DictReader(open(tmp_path / "f" / "split.csv")))
    assert list(split_rows[0]) == ["path", "label", "subset", "group"]


def test_presplit_keeps_its_split_and_reports_leaks(tmp_path):
    images, labels, test = planted()
    ds = Dataset(images, labels, [f"#{i}" for i in range(len(labels))], "hand-made", "pre-split",
                 subset=np.where(test, "test", "train"))
    prep = prepare(ds, Binarizer.parse("fixed:128"), positive="pos")
    assert prep.split_method == "given" and (prep.test_mask == test).all()
    assert prep.check.figures["leaked_test_grey"] == 2


def test_one_patch_and_identical_patches_get_one_line(tmp_path, capsys):
    np.savez(tmp_path / "one.npz", images=np.zeros((1, 4, 4), np.uint8), labels=np.array(["a"]))
    assert main(["check", str(tmp_path / "one.npz"), "--out", str(tmp_path / "o")]) == 2
    np.savez(tmp_path / "same.npz", images=np.zeros((8, 4, 4), np.uint8), labels=np.array(["a", "b"] * 4))
    assert main(["check", str(tmp_path / "same.npz"), "--out", str(tmp_path / "s")]) == 2
    assert main(["scan", str(tmp_path / "same.npz")]) == 0
    captured = capsys.readouterr()
    errs = [line for line in captured.err.splitlines() if line]
    assert len(errs) == 2 and "use --split stratified" in errs[1]
    assert "1 group(s) of identical grey patches holding 8 patches" in captured.out
    assert "error floor 50.0 %" in captured.out
