import copy
import csv
import json

import numpy as np
import pytest
from conftest import two_rule_patches

from pixelfit.cli import main
from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import RuleFileError
from pixelfit.ladder import prepare, train_rung
from pixelfit.rulefile import load_rule, parse_rule, rule_document, save_rung

FAMILY_SIZES = [("constant", 0), ("lut", 3), ("nb", 4), ("logistic", 6), ("tree", 4), ("mlp", 4), ("memorize", 36)]


@pytest.fixture(scope="module")
def prepared():
    imgs, lab = two_rule_patches(7, 500, "open", "capped")
    ds = Dataset(imgs, lab, [f"#{i}" for i in range(len(imgs))], "generated", "npz")
    return prepare(ds, Binarizer.parse("fixed:128"))


@pytest.fixture(scope="module")
def rungs(prepared):
    return {fam: train_rung(prepared, fam, size, folds=2) for fam, size in FAMILY_SIZES}


@pytest.mark.parametrize("family", [f for f, _ in FAMILY_SIZES])
def test_round_trip_identical_predictions(prepared, rungs, family, tmp_path):
    rung = rungs[family]
    path = save_rung(tmp_path / f"{family}.json", prepared, rung)
    rule = load_rule(path)
    X = np.vstack([prepared.X_train, prepared.X_test])
    expected = np.asarray(rung.estimator.predict(X), bool)
    assert np.array_equal(rule.predict(X), expected)
    if hasattr(rung.estimator, "predict_proba"):
        assert np.allclose(rule.scores(X), rung.estimator.predict_proba(X)[:, 1], atol=1e-12)
    doc = json.loads(path.read_text())
    assert doc["operating"] == {"threshold": 0.5, "chosen_on": "default"}
    assert doc["schema_version"] == 2 and doc["model"]["family"] == family
    assert len(doc["training_data"]["fingerprint"]) == 64
    assert "caution" in doc and "validate" in doc["caution"].lower()
    assert "bound_convention" in doc["evaluation"]


def test_rule_applies_its_own_binarization(prepared, rungs):
    rule = parse_rule(rule_document(prepared, rungs["lut"]))
    imgs = prepared.dataset.images
    X = rule.binarize(imgs)
    assert np.array_equal(X, Binarizer.parse("fixed:128").transform(imgs).reshape(len(imgs), -1))


@pytest.fixture
def valid_doc(prepared, rungs):
    return rule_document(prepared, rungs["lut"])


def _mutate(doc, path, value=KeyError):
    d = copy.deepcopy(doc)
    target = d
    for key in path[:-1]:
        target = target[key]
    if value is KeyError:
        del target[path[-1]]
    else:
        target[path[-1]] = value
    return d


@pytest.mark.parametrize("path,value,match", [
    (("format",), "other-tool", "format"),
    (("schema_version",), 3, "newer"),
    (("model",), KeyError, "model"),
    (("patch_shape",), KeyError, "patch_shape"),
    (("model", "table"), [0, 1], "model/table"),
    (("model", "pixels"), [[0, 0], [1, 1], [9, 9]], "outside"),
    (("model", "scores"), [0.5] * 7, "model/scores"),
    (("training_data", "fingerprint"), "abc", "fingerprint"),
    (("binarize", "method"), "magic", "binarize"),
])
def test_refusals(valid_doc, path, value, match):
    with pytest.raises(RuleFileError, match=match):
        parse_rule(_mutate(valid_doc, path, value))


def test_refuses_bad_json_and_nan(valid_doc, tmp_path):
    with pytest.raises(RuleFileError, match="invalid JSON"):
        parse_rule("{not json")
    text = json.dumps(valid_doc).replace('"bias"', '"bias"')
    doc = json.loads(text)
    doc["model"]["scores"][0] = float("nan")
    with pytest.raises(RuleFileError, match="NaN"):
        parse_rule(json.dumps(doc))  # json.dumps writes NaN, which a rule file may not hold
    with pytest.raises(RuleFileError, match="JSON object"):
        parse_rule("[1, 2]")


def test_refuses_wrong_weight_shape(prepared, rungs):
    doc = rule_document(prepared, rungs["logistic"])
    doc["model"]["weights"] = doc["model"]["weights"][:-1]
    with pytest.raises(RuleFileError, match="model/weights"):
        parse_rule(doc)
    doc = rule_document(prepared, rungs["mlp"])
    doc["model"]["layers"][0]["bias"] = [float("inf")] * len(doc["model"]["layers"][0]["bias"])
    with pytest.raises(RuleFileError, match="infinity"):
        parse_rule(doc)


def test_cli_load_error_is_one_line(tmp_path, capsys):
    bad = tmp_path / "bad.json"
    bad.write_text('{"format": "pixelfit-rule"}')
    assert main(["show", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_fit_writes_rules_and_apply_reproduces_split_metrics(presplit_folder, tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["fit", str(presplit_folder), "--out", str(out), "--families", "constant,lut,tree",
                 "--sizes", "lut=1,2", "--sizes", "tree=2", "--folds", "2"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    for r in summary["rungs"]:
        assert (out / r["rule_file"]).is_file()
    rule_path = out / "rules" / "lut-2.json"
    recorded = json.loads(rule_path.read_text())["evaluation"]
    for part, sub in (("train", "train"), ("test", "test")):
        csv_out = tmp_path / f"{part}.csv"
        capsys.readouterr()
        assert main(["apply", str(rule_path), str(presplit_folder / sub), "--csv", str(csv_out)]) == 0
        rows = list(csv.DictReader(open(csv_out)))
        assert len(rows) == recorded[part]["n"]
        pos = json.loads(rule_path.read_text())["classes"]["positive"]
        tp = sum(r["prediction"] == pos and r["label"] == pos for r in rows)
        fp = sum(r["prediction"] == pos and r["label"] != pos for r in rows)
        assert (tp, fp) == (recorded[part]["tp"], recorded[part]["fp"])
    assert main(["show", str(rule_path)]) == 0
    shown = capsys.readouterr().out
    assert "lut-2" in shown and "caution" in shown and shown.count("#") >= 2


def test_apply_refuses_wrong_shape_per_file(presplit_folder, tmp_path, capsys):
    from PIL import Image

    out = tmp_path / "run"
    assert main(["fit", str(presplit_folder), "--out", str(out), "--families", "lut", "--sizes", "lut=1",
                 "--folds", "0"]) == 0
    folder = tmp_path / "mixed"
    folder.mkdir()
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(folder / "good.png")
    Image.fromarray(np.zeros((9, 9), np.uint8)).save(folder / "odd.png")
    capsys.readouterr()
    assert main(["apply", str(out / "rules" / "lut-1.json"), str(folder), "--csv", "-"]) == 0
    captured = capsys.readouterr()
    assert "good.png" in captured.out and "odd.png" not in captured.out
    assert "odd.png: patch is 9x9, expected 8x8" in captured.err


def test_apply_prints_the_summary_and_rows_only_when_asked(tmp_path, presplit_folder, capsys):
    out = tmp_path / "run"
    assert main(["fit", str(presplit_folder), "--out", str(out), "--families", "lut", "--sizes", "lut=1",
                 "--folds", "0"]) == 0
    rule, patches = str(out / "rules" / "lut-1.json"), str(presplit_folder / "test")
    capsys.readouterr()
    assert main(["apply", rule, patches]) == 0
    quiet = capsys.readouterr()
    assert ".png," not in quiet.out and quiet.err == ""
    assert "applied lut-1 to" in quiet.out and "--csv" in quiet.out
    assert main(["apply", rule, patches, "--verbose"]) == 0
    loud = capsys.readouterr()
    rows = [line for line in loud.out.splitlines() if ".png," in line]
    assert len(rows) == int(quiet.out.split(" to ")[1].split()[0]) and "applied lut-1 to" in loud.err
