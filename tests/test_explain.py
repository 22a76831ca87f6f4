"""Explaining one call and comparing two rungs: the core facts, checked against the rule file and
against brute force or statsmodels, and the `pixelfit explain` / `pixelfit compare` commands."""
from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest

from pixelfit.cli import main
from pixelfit.data import load_dataset
from pixelfit.errors import PixelfitError
from pixelfit.evaluate import compare_calls, mcnemar_exact
from pixelfit.explain import compare_run, explain_call
from pixelfit.rulefile import load_rule, parse_rule

FAMILIES = "constant,lut,nb,logistic,tree,mlp,memorize"


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """One small fit of every family on generated patches (tests/conftest.make_patches)."""
    from conftest import SEED, make_patches, write_class_folders

    root = tmp_path_factory.mktemp("explain")
    folder = write_class_folders(root / "classes", *make_patches(np.random.default_rng(SEED), n=160))
    out = root / "run"
    assert main(["fit", str(folder), "--out", str(out), "--families", FAMILIES, "--max-size", "3",
                 "--folds", "2", "--bias-variance", "0"]) == 0
    return folder, out


def _train(run, rule):
    """Training bits and labels of the run, rebuilt from split.csv with the rule's binarization."""
    folder, out = run
    ds = load_dataset(folder)
    with open(out / "split.csv", newline="", encoding="utf-8") as fh:
        subset = {r["path"]: r["subset"] for r in csv.DictReader(fh)}
    train = np.array([subset[n] == "train" for n in ds.names])
    return ds, rule.binarize(ds.images[train]), ds.labels[train] == rule.positive, train


def test_truth_table_code_and_counts_are_the_patch_and_the_training_data(run):
    rule = load_rule(run[1] / "rules" / "lut-3.json")
    ds, Xtr, ytr, _ = _train(run, rule)
    pixels = [r * rule.shape[1] + c for r, c in rule.doc["model"]["pixels"]]
    for i in range(6):
        e = explain_call(rule, ds.images[i])
        bits = rule.binarize(ds.images[i : i + 1])[0]
        code = sum(int(bits[p]) << j for j, p in enumerate(pixels))  # the rule file's bit order, by hand
        assert e["why"]["code"] == code
        same = (Xtr[:, pixels] == bits[pixels]).all(axis=1)  # training patches with this pattern
        assert (e["why"]["row"]["negative"], e["why"]["row"]["positive"]) == (int((same & ~ytr).sum()),
                                                                            int((same & ytr).sum()))
        assert e["score"] == pytest.approx(float(rule.scores(bits[None])[0]))
        assert e["positive"] == bool(rule.predict(bits[None])[0]) == (e["score"] > e["threshold"])
        assert e["call"] == (rule.positive if e["positive"] else rule.negative)


def test_a_rule_file_without_counts_still_explains_and_says_so(run):
    doc = json.loads((run[1] / "rules" / "lut-2.json").read_text())
    del doc["model"]["counts"]
    rule = parse_rule(doc)
    e = explain_call(rule, bits=np.zeros(rule.n_pixels, bool))
    assert e["why"]["row"]["negative"] is None and "records no counts" in e["why"]["note"]


def test_tree_path_is_the_walk_of_the_rule_file_and_the_leaf_counts_the_training_patches(run):
    rule = load_rule(run[1] / "rules" / "tree-3.json")
    ds, Xtr, ytr, _ = _train(run, rule)
    nodes = rule.doc["model"]["nodes"]
    w = rule.shape[1]
    for i in range(6):
        bits = rule.binarize(ds.images[i : i + 1])[0]
        e = explain_call(rule, bits=bits)
        node, steps = 0, []
        while nodes[node]["pixel"] is not None:
            r, c = nodes[node]["pixel"]
            steps.append((node, [r, c], int(bits[r * w + c])))
            node = nodes[node]["right"] if bits[r * w + c] else nodes[node]["left"]
        assert [(s["node"], s["pixel"], s["value"]) for s in e["why"]["path"]] == steps
        leaf = e["why"]["leaf"]
        assert leaf["node"] == node
        reach = np.ones(len(Xtr), bool)  # training patches that take the same path
        for _, (r, c), v in steps:
            reach &= Xtr[:, r * w + c] == bool(v)
        assert (leaf["negative"], leaf["positive"]) == (int((reach & ~ytr).sum()), int((reach & ytr).sum()))


@pytest.mark.parametrize("name", ["nb-2", "logistic-2"])
def test_linear_contributions_add_up_to_the_score(run, name):
    rule = load_rule(run[1] / "rules" / f"{name}.json")
    ds = load_dataset(run[0])
    bits = rule.binarize(ds.images[:5])
    for x in bits:
        why = explain_call(rule, bits=x)["why"]
        z = why["bias"] + sum(c["contribution"] for c in why["contributions"])
        assert 1 / (1 + math.exp(-z)) == pytest.approx(float(rule.scores(x[None])[0]), abs=1e-9)
        mags = [abs(c["contribution"]) for c in why["contributions"]]
        assert mags == sorted(mags, reverse=True)
        assert {tuple(c["pixel"]) for c in why["contributions"]} == {
            (i // rule.shape[1], i % rule.shape[1]) for i in rule.pixels_used()}


def test_network_flips_are_those_that_change_the_call_by_brute_force(run):
    rule = load_rule(run[1] / "rules" / "mlp-2.json")
    ds = load_dataset(run[0])
    w = rule.shape[1]
    for x in rule.binarize(ds.images[:4]):
        e = explain_call(rule, bits=x)
        expected = set()
        for i in range(rule.n_pixels):
            y = x.copy()
            y[i] = ~y[i]
            if bool(rule.predict(y[None])[0]) != e["positive"]:
                expected.add((i // w, i % w))
        assert {tuple(f["pixel"]) for f in e["why"]["flips_that_change_call"]} == expected


def test_memorizing_rule_says_whether_the_pattern_was_seen_and_its_labels(run):
    rule = load_rule(run[1] / "rules" / f"memorize-{64}.json")
    ds, Xtr, ytr, train = _train(run, rule)
    x = Xtr[0]
    e = explain_call(rule, bits=x)
    same = (Xtr == x).all(axis=1)
    assert e["why"]["seen"] is True
    assert (e["why"]["negative"], e["why"]["positive"]) == (int((same & ~ytr).sum()), int((same & ytr).sum()))
    unseen = np.ones(rule.n_pixels, bool)
    assert not (Xtr == unseen).all(axis=1).any()
    e = explain_call(rule, bits=unseen)
    assert e["why"]["seen"] is False and e["why"]["negative"] is None


@pytest.mark.parametrize("b, c", [(0, 0), (1, 0), (3, 9), (12, 12), (40, 25), (0, 17)])
def test_mcnemar_exact_is_statsmodels(b, c):
    # Reference: statsmodels.stats.contingency_tables.mcnemar(table, exact=True), the binomial test on
    # the off-diagonal counts of the 2x2 table of (A right?, B right?).
    from statsmodels.stats.contingency_tables import mcnemar

    ref = mcnemar(np.array([[5, b], [c, 7]]), exact=True)
    got = mcnemar_exact(b, c)
    assert got["p_value"] == pytest.approx(float(ref.pvalue), rel=1e-12)
    assert (got["b"], got["c"]) == (b, c) and min(b, c) == ref.statistic


def test_compare_calls_counts_by_definition(rng):
    y = rng.random(300) < 0.4
    pa = np.where(rng.random(300) < 0.8, y, ~y)
    pb = np.where(rng.random(300) < 0.7, y, ~y)
    c = compare_calls(y, pa, pb)
    assert c["mcnemar"]["b"] == int(((pa == y) & (pb != y)).sum()) == len(c["only_a_right"])
    assert c["mcnemar"]["c"] == int(((pa != y) & (pb == y)).sum()) == len(c["only_b_right"])
    assert c["a"]["tp"] + c["a"]["fp"] + c["a"]["fn"] + c["a"]["tn"] == 300
    assert c["both_right"] + c["both_wrong"] + c["mcnemar"]["discordant"] == 300


def test_explain_command_text_and_json(run, capsys):
    folder, out = run
    ds = load_dataset(folder)
    patch = folder / ds.names[0]
    rule_path = out / "rules" / "lut-3.json"
    assert main(["explain", str(rule_path), str(patch)]) == 0
    text = capsys.readouterr().out
    rule = load_rule(rule_path)
    e = explain_call(rule, ds.images[0])
    assert f"pattern code {e['why']['code']}:" in text and f"-> {e['call']}" in text
    assert main(["explain", str(rule_path), str(patch), str(folder / ds.names[1]), "--json"]) == 0
    facts = json.loads(capsys.readouterr().out)
    assert [f["why"]["code"] for f in facts] == [e["why"]["code"], explain_call(rule, ds.images[1])["why"]["code"]]
    assert main(["explain", str(out / "rules" / "tree-2.json"), str(patch)]) == 0
    assert "node 0: pixel" in capsys.readouterr().out
    assert main(["explain", str(rule_path), str(out / "summary.json")]) == 2  # not an image: one line
    assert "summary.json" in capsys.readouterr().err


def test_compare_command_matches_statsmodels(run, capsys):
    from statsmodels.stats.contingency_tables import mcnemar  # reference, as above

    _, out = run
    assert main(["compare", str(out), "lut-1", "tree-3", "--json"]) == 0
    c = json.loads(capsys.readouterr().out)
    assert c == json.loads(json.dumps(compare_run(out, "lut-1", "tree-3")))
    m = c["mcnemar"]
    ref = mcnemar(np.array([[c["both_right"], m["b"]], [m["c"], c["both_wrong"]]]), exact=True)
    assert m["p_value"] == pytest.approx(float(ref.pvalue))
    summary = json.loads((out / "summary.json").read_text())
    test_counts = {f"{r['family']}-{r['size']}": r["test"] for r in summary["rungs"]}
    for side, key in (("a", "lut-1"), ("b", "tree-3")):  # the run's own held-out confusion at 0.5
        assert {k: c[side][k] for k in ("tp", "fp", "fn", "tn")} == {k: test_counts[key][k] for k in ("tp", "fp", "fn", "tn")}
    assert main(["compare", str(out), "lut-1", "tree-3"]) == 0
    text = capsys.readouterr().out
    assert f"only lut-1 right {m['b']}, only tree-3 right {m['c']}" in text and "McNemar" in text
    assert main(["compare", str(out), "lut-1", "lut-9"]) == 2
    assert "no rung 'lut-9'" in capsys.readouterr().err
    with pytest.raises(PixelfitError):
        compare_run(out, "lut-1", "lut-1")
