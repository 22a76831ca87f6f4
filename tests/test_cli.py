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


def test_fit_records_the_search_and_announces_a_long_or_inexact_one(class_folder, tmp_path, capsys, monkeypatch):
    import json

    import pixelfit.ladder as ladder

    monkeypatch.setattr(ladder, "NOTICE_SECONDS", 0.0)  # announce every exhaustive search
    out = tmp_path / "ex"
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "lut", "--sizes", "lut=2",
                 "--folds", "0", "--exhaustive"]) == 0
    err = capsys.readouterr().err
    assert "lut-2: exhaustive search of 2,016 pixel sets, estimated" in err  # C(64, 2), 8x8 patches
    summary = json.loads((out / "summary.json").read_text())
    search = summary["rungs"][0]["search"]
    assert search["method"] == "exhaustive" and search["sets"] == search["candidates"] == 2016
    assert search["largest_exact_size"] == 2 and search["estimated_seconds"] >= 0
    assert summary["settings"]["exhaustive"] is True
    rule = json.loads((out / "rules" / "lut-2.json").read_text())
    assert rule["evaluation"]["search"]["method"] == "exhaustive"


def test_fit_without_time_for_an_exhaustive_search_says_beam_everywhere(class_folder, tmp_path, capsys,
                                                                         monkeypatch):
    import json

    from pixelfit.models import lut_engine

    monkeypatch.setattr(lut_engine, "EXHAUSTIVE_SECONDS", 0.0)
    out = tmp_path / "beam"
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "lut", "--sizes", "lut=3",
                 "--folds", "0"]) == 0
    captured = capsys.readouterr()
    err = captured.err
    assert "lut-3: scoring all 41,664 pixel sets would take an estimated" in err and "size 1 instead" in err
    search = json.loads((out / "summary.json").read_text())["rungs"][0]["search"]
    assert search["method"] == "beam" and search["largest_exact_size"] == 1
    # the table marks the beam rung and explains the mark once
    rows = [line for line in captured.out.splitlines() if line.startswith("lut-3")]
    assert len(rows) == 1 and "(beam)" in rows[0]
    assert sum(line.startswith("(beam) ") for line in captured.out.splitlines()) == 1

