import csv
import json

from pixelfit.cli import main


def test_scan_text_and_json(class_folder, capsys):
    assert main(["scan", str(class_folder)]) == 0
    out = capsys.readouterr().out
    assert "8x8" in out and "spot" in out
    assert main(["scan", str(class_folder), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["shape"] == [8, 8] and rep["default_positive"] == "spot"


def test_scan_nothing_usable(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["scan", str(tmp_path / "empty")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no readable patches" in err


def test_fit_writes_contract(class_folder, tmp_path, capsys):
    out = tmp_path / "run"
    rc = main(["fit", str(class_folder), "--out", str(out), "--families", "constant,lut,memorize",
               "--sizes", "lut=1,2", "--folds", "3"])
    assert rc == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["version"] == 1 and s["format"]
    assert s["dataset"]["shape"] == [8, 8] and s["dataset"]["positive"] == "spot"
    assert len(s["dataset"]["fingerprint"]) == 64
    assert s["binarize"]["method"] == "otsu" and s["binarize"]["threshold"] is not None
    assert [(r["family"], r["size"]) for r in s["rungs"]] == [("constant", 0), ("lut", 1), ("lut", 2), ("memorize", 64)]
    for r in s["rungs"]:
        for part in ("train", "test"):
            assert set(r[part]) >= {"tp", "fp", "fn", "tn", "precision", "recall", "f1", "accuracy", "mcc",
                                    "precision_ci", "recall_ci"}
    assert s["rungs"][1]["pixels"] and len(s["rungs"][1]["pixels"][0]) == 2
    assert sum(r["recommended"] for r in s["rungs"]) == 1
    rows = list(csv.DictReader(open(out / "split.csv")))
    assert len(rows) == s["split"]["n_train"] + s["split"]["n_test"]
    assert {r["subset"] for r in rows} == {"train", "test"}
    assert (out / "summary.csv").read_text().startswith("family,size")
    assert (out / "ladder.png").stat().st_size > 0


def test_fit_same_seed_same_split(class_folder, tmp_path):
    for name in ("a", "b"):
        assert main(["fit", str(class_folder), "--out", str(tmp_path / name), "--families", "constant", "--folds", "0"]) == 0
    assert (tmp_path / "a" / "split.csv").read_text() == (tmp_path / "b" / "split.csv").read_text()


def test_fit_npz_split_names(npz_file, tmp_path):
    out = tmp_path / "n"
    assert main(["fit", str(npz_file), "--out", str(out), "--families", "constant", "--folds", "0"]) == 0
    first = list(csv.DictReader(open(out / "split.csv")))[0]
    assert first["path"] == "#0"


def test_bad_arguments(class_folder, tmp_path, capsys):
    assert main(["fit", str(class_folder), "--out", str(tmp_path / "x"), "--binarize", "wobble"]) == 2
    assert "unknown binarize method" in capsys.readouterr().err
    assert main(["fit", str(class_folder), "--out", str(tmp_path / "x"), "--families", "magic"]) == 2
    assert "unknown family" in capsys.readouterr().err


def test_beam_rungs_are_marked_in_the_table(tmp_path, capsys):
    # 12x12 patches: C(144, 3) = 487,344 pixel sets are all tried, C(144, 4) = 17,610,000 are more
    # than the exhaustive budget, so lut-4 comes from the beam search and must say so.
    import json

    import numpy as np

    rng = np.random.default_rng(2)
    imgs = rng.integers(0, 256, (120, 12, 12), dtype=np.uint8)
    labels = np.where((imgs[:, 3, 3] > 127) ^ (imgs[:, 6, 8] > 127), "x", "y")
    np.savez(tmp_path / "b.npz", images=imgs, labels=labels)
    out = tmp_path / "o"
    assert main(["fit", str(tmp_path / "b.npz"), "--out", str(out), "--families", "lut", "--sizes", "lut=3,4",
                 "--folds", "0", "--no-rules"]) == 0
    text = capsys.readouterr().out
    search = {r["size"]: r["search"]["method"] for r in json.loads((out / "summary.json").read_text())["rungs"]}
    assert search == {3: "exhaustive", 4: "beam"}
    rows = {line.split()[0]: line for line in text.splitlines() if line.startswith("lut-")}
    assert "(beam)" in rows["lut-4"] and "(beam)" not in rows["lut-3"]
    footnote = [line for line in text.splitlines() if line.startswith("(beam) ")]
    assert len(footnote) == 1 and "beam search" in footnote[0] and "4,000,000" in footnote[0]
