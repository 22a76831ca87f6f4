"""The spec: parsing, threshold choice, verdicts, the answer, and the CLI on the demo sets."""

from __future__ import annotations

import itertools
import json
import types

import numpy as np
import pytest
from scipy.stats import beta

from pixelfit.cli import main
from pixelfit.errors import PixelfitError
from pixelfit.evaluate import (
    Spec,
    answer,
    choose_threshold,
    held_out_result,
    lower_bound,
    operating_points,
    parse_spec,
    patches_needed,
    verdict,
)

# ---- parsing --------------------------------------------------------------------------------

def test_parse_spec_terms():
    s = parse_spec("precision>=0.90, recall >= 0.85", 0.9, 512)
    assert (s.precision, s.recall, s.confidence, s.budget_bytes) == (0.90, 0.85, 0.9, 512)
    assert parse_spec("recall>=1").to_dict() == {"precision": None, "recall": 1.0, "confidence": 0.95,
                                                 "budget_bytes": None}


@pytest.mark.parametrize("text,kw,match", [
    ("precision>0.9", {}, "cannot read"),
    ("precision>=0.9,", {}, "cannot read"),
    ("accuracy>=0.9", {}, "cannot read"),
    ("precision>=0.9,precision>=0.8", {}, "twice"),
    ("precision>=0", {}, r"\(0, 1\]"),
    ("recall>=1.5", {}, r"\(0, 1\]"),
    ("precision>=0.9", {"confidence": 1.0}, "confidence"),
    ("precision>=0.9", {"confidence": 0.0}, "confidence"),
    ("precision>=0.9", {"budget_bytes": -1}, "budget"),
])
def test_parse_spec_refusals(text, kw, match):
    with pytest.raises(PixelfitError, match=match):
        parse_spec(text, **kw)


# ---- operating points and the threshold choice ------------------------------------------------

def test_operating_points_brute_force():
    # Written from the definition: positive when score > t, for every candidate t.
    rng = np.random.default_rng(1)
    y = rng.random(60) < 0.4
    s = np.round(rng.random(60), 1)  # many ties
    pts = operating_points(y, s)
    cands = sorted(set(s.tolist()) | ({0.0} if s.min() > 0 else set()))
    expect = []
    for t in cands:
        pred = s > t
        if pred.sum():
            expect.append((t, (pred & y).sum() / pred.sum(), (pred & y).sum() / y.sum()))
    got = np.array([(p["threshold"], p["precision"], p["recall"]) for p in pts])
    assert np.allclose(got, np.array(expect, float), atol=1e-12)


def test_choice_largest_smallest_margin_then_smallest_shortfall():
    pts = [{"threshold": 0.2, "precision": 0.80, "recall": 0.99},
           {"threshold": 0.4, "precision": 0.92, "recall": 0.90},
           {"threshold": 0.6, "precision": 0.97, "recall": 0.86},
           {"threshold": 0.8, "precision": 1.00, "recall": 0.50}]
    # Margins (P - 0.9, R - 0.85): 0.4 -> (0.02, 0.05), 0.6 -> (0.07, 0.01): 0.4 has the larger smaller one.
    assert choose_threshold(pts, {"precision": 0.9, "recall": 0.85})["threshold"] == 0.4
    # One target: the most of the other measure.
    assert choose_threshold(pts, {"precision": 0.9})["threshold"] == 0.4
    assert choose_threshold(pts, {"recall": 0.85})["threshold"] == 0.6
    # None meets (0.99, 0.95): shortfalls 0.2, 0.07, 0.09, 0.45 -> 0.4.
    assert choose_threshold(pts, {"precision": 0.99, "recall": 0.95})["threshold"] == 0.4


# ---- lower bounds, verdicts, sample sizes ----------------------------------------------------

def test_lower_bound_definition():
    # One-sided Clopper-Pearson: P(X >= x | p = L) = alpha, with X ~ Binomial(n, L) (the definition).
    from scipy.stats import binom
    for x, n in [(1, 5), (9, 10), (40, 57), (100, 100)]:
        lo = lower_bound(x, n, 0.95)
        assert binom.sf(x - 1, n, lo) == pytest.approx(0.05, abs=1e-9)
    assert lower_bound(0, 10, 0.95) == 0.0 and lower_bound(0, 0, 0.95) is None


def _test(tp, fp, fn, tn, conf=0.95):
    return held_out_result({"tp": tp, "fp": fp, "fn": fn, "tn": tn}, conf)


def test_verdicts_on_hand_made_counts():
    spec = Spec(precision=0.9, recall=0.85)
    # 380/400 precision: lower bound about 0.93; 380/420 recall: lower about 0.88 -> meets.
    assert verdict(_test(380, 20, 40, 500), spec, None) == "meets"
    # 19/20 and 19/21 meet on point estimates only.
    assert verdict(_test(19, 1, 2, 30), spec, None) == "plausible"
    assert verdict(_test(10, 10, 0, 30), spec, None) == "fails"
    # No predicted positive: precision undefined, never meets.
    assert verdict(_test(0, 0, 20, 30), spec, None) == "fails"
    # A target left out is ignored.
    # 40 of 40 positives found: the recall lower bound is 0.05 ** (1 / 40) = 0.928 (closed form for x = n).
    assert verdict(_test(40, 40, 0, 30), Spec(recall=0.85), None) == "meets"
    budget = Spec(precision=0.9, recall=0.85, budget_bytes=100)
    assert verdict(_test(380, 20, 40, 500), budget, {"flash_bytes": 101, "ram_bytes": 0, "ops": 1}) == "over-budget"
    assert verdict(_test(380, 20, 40, 500), budget, {"flash_bytes": 100, "ram_bytes": 0, "ops": 1}) == "meets"
    assert verdict(_test(380, 20, 40, 500), budget, None) == "meets"  # unknown cost: never claimed over


def test_patches_needed_is_the_smallest_that_clears():
    spec = Spec(precision=0.9, recall=0.85)
    t = _test(19, 1, 2, 30)
    n = 52
    total = patches_needed(t, spec)
    assert total is not None and total > n

    def clears(m):
        s = m / n
        return beta.ppf(0.05, 19 * s, 20 * s - 19 * s + 1) >= 0.9 and beta.ppf(0.05, 19 * s, 21 * s - 19 * s + 1) >= 0.85
    assert clears(total) and not clears(total - 1)
    assert patches_needed(_test(9, 1, 0, 10), Spec(precision=0.9)) is None  # point estimate at the target


def _rung(key, verdict_, test, params, flash=None):
    fam, size = key.split("-")
    return types.SimpleNamespace(key=key, family=fam, size=int(size), figures={"parameters": params},
                                 cost=None if flash is None else {"flash_bytes": flash, "ram_bytes": 0, "ops": 0},
                                 spec={"threshold": 0.5, "chosen_on": "cv", "test": test, "verdict": verdict_})


def test_answer_cheapest_by_flash_when_costs_known():
    spec = Spec(precision=0.9, recall=0.85, budget_bytes=500)
    good = _test(380, 20, 40, 500)
    rungs = [_rung("mlp-2", "meets", good, 40, flash=300), _rung("tree-3", "meets", good, 15, flash=400),
             _rung("lut-4", "over-budget", good, 16, flash=600)]
    a = answer(rungs, spec)
    assert a["rung"] == "mlp-2" and a["verdict"] == "meets" and a["extra_test_patches"] == 0
    for r in rungs:
        r.cost = None  # unknown cost: parameters order the rungs, and the reason says so
    a = answer(rungs, spec)
    assert a["rung"] == "tree-3" and "cost is unknown" in a["reason"]


def test_answer_plausible_and_nothing():
    spec = Spec(precision=0.9, recall=0.85)
    rungs = [_rung("lut-2", "fails", _test(10, 10, 0, 30), 4), _rung("tree-4", "plausible", _test(19, 1, 2, 30), 31)]
    a = answer(rungs, spec)
    assert a["rung"] == "tree-4" and a["verdict"] == "plausible"
    assert a["extra_test_patches"] == patches_needed(rungs[1].spec["test"], spec) - 52
    rungs = [_rung("lut-2", "fails", _test(10, 10, 0, 30), 4), _rung("tree-4", "fails", _test(16, 4, 4, 30), 31)]
    a = answer(rungs, spec)
    assert a["rung"] is None and a["verdict"] == "fails" and a["reason"].startswith("nothing meets it")
    # tree-4: precision 0.8 (short by 0.1), recall 0.8 (short 0.05); lut-2 is short of precision by 0.4.
    assert "tree-4" in a["reason"] and "precision is furthest away, by 0.100" in a["reason"]


# ---- the command line on the demo sets ------------------------------------------------------

FAST = ["--families", "constant,lut,tree", "--sizes", "lut=1,2,3", "--sizes", "tree=2,4,6", "--folds", "3"]


def _lower(x, n, conf):
    # Re-derived from the printed counts with scipy's Beta quantile (the one-sided Clopper-Pearson definition).
    return 0.0 if x == 0 else beta.ppf(1 - conf, x, n - x + 1)


@pytest.mark.parametrize("demo,spec_text", [("bottle-caps", "precision>=0.75,recall>=0.70"),
                                            ("solder-bridges", "precision>=0.80,recall>=0.70")])
def test_demo_spec_met_and_rederived(demo, spec_text, tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["fit", demo, "--out", str(out), *FAST, "--spec", spec_text]) == 0
    printed = capsys.readouterr().out
    s = json.loads((out / "summary.json").read_text())
    spec = parse_spec(spec_text)
    assert s["spec"] == spec.to_dict()
    a = s["answer"]
    assert a["verdict"] == "meets" and a["rung"] is not None
    assert printed.rstrip().splitlines()[-2].startswith("answer to ") and a["rung"] in printed.splitlines()[-2]
    by = {f"{r['family']}-{r['size']}": r for r in s["rungs"]}
    t = by[a["rung"]]["spec"]["test"]
    assert f"tp {t['tp']}, fp {t['fp']}, fn {t['fn']}, tn {t['tn']}" in a["reason"]
    assert _lower(t["tp"], t["tp"] + t["fp"], 0.95) >= spec.precision
    assert _lower(t["tp"], t["tp"] + t["fn"], 0.95) >= spec.recall
    # Every cheaper rung (by parameters: the cost is not known here) does not meet it.
    cheaper = [r for r in s["rungs"] if r["parameters"] < by[a["rung"]]["parameters"]]
    assert all(r["spec"]["verdict"] != "meets" for r in cheaper)
    for r in s["rungs"]:
        e = r["spec"]
        assert set(e) == {"threshold", "chosen_on", "cv", "test", "verdict"} and e["chosen_on"] == "cv"
        assert set(e["test"]) == {"tp", "fp", "fn", "tn", "precision", "recall", "precision_lower", "recall_lower"}
        assert r["operating"]["threshold"] == e["threshold"] and "cost" in r
    rule = json.loads((out / "rules" / f"{a['rung']}.json").read_text())
    assert rule["operating"] == {"threshold": by[a["rung"]]["spec"]["threshold"], "chosen_on": "cv"}
    assert rule["evaluation"]["verdict"] == "meets" and rule["evaluation"]["spec"] == by[a["rung"]]["spec"]
    header = (out / "summary.csv").read_text().splitlines()[0].split(",")
    assert {"spec_threshold", "spec_verdict", "spec_test_precision_lower", "flash_bytes", "ram_bytes", "ops"} <= set(header)


def test_demo_impossible_spec(tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["fit", "solder-bridges", "--out", str(out), *FAST, "--spec", "precision>=0.999,recall>=0.999"]) == 0
    last = capsys.readouterr().out.rstrip().splitlines()[-1]
    s = json.loads((out / "summary.json").read_text())
    assert s["answer"]["rung"] is None and s["answer"]["verdict"] == "fails"
    assert "nothing meets it" in last and "furthest away, by" in last


def test_no_spec_keeps_keys_null(tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["fit", "solder-bridges", "--out", str(out), "--families", "constant,lut", "--sizes", "lut=1",
                 "--folds", "3"]) == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["spec"] is None and s["answer"] is None and all(r["spec"] is None for r in s["rungs"])
    assert all(r["operating"]["chosen_on"] == "default" for r in s["rungs"])


@pytest.mark.parametrize("args,match", [(["--spec", "precision=0.9"], "cannot read"),
                                        (["--confidence", "0.9"], "go with --spec"),
                                        (["--spec", "recall>=0.8", "--budget-bytes", "-5"], "budget")])
def test_cli_spec_refusals(args, match, tmp_path, capsys):
    assert main(["fit", "solder-bridges", "--out", str(tmp_path / "o"), *args]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and match in err


def test_candidate_thresholds_are_all_distinct_scores():
    y = np.array([True, False, True, False])
    s = np.array([0.5, 0.5, 0.9, 0.1])
    pts = operating_points(y, s)
    assert [p["threshold"] for p in pts] == [0.0, 0.1, 0.5]  # 0.9 calls nothing positive: left out
    assert list(itertools.chain.from_iterable((p["tp"], p["fp"]) for p in pts)) == [2, 2, 2, 1, 1, 0]


# ---- the operating threshold that ships, and the one decision rule -------------------------------

@pytest.fixture(scope="module")
def bottle_tree4():
    from pixelfit.data import Binarizer, load_dataset
    from pixelfit.demo import resolve_dataset_path
    from pixelfit.ladder import prepare, train_rung

    prep = prepare(load_dataset(resolve_dataset_path("bottle-caps")), Binarizer.parse("otsu"))
    return prep, train_rung(prep, "tree", 4, folds=3)


def test_tie_at_half_is_one_decision_everywhere(bottle_tree4, tmp_path):
    """A held-out patch scoring exactly 0.5: negative for the rung, the rule file, apply and the C vectors."""
    from pixelfit.evaluate import detection_metrics
    from pixelfit.firmware import export_c
    from pixelfit.rulefile import load_rule, save_rung

    prep, rung = bottle_tree4
    ties = rung.test_scores == 0.5
    assert ties.any() and not rung.test_pred[ties].any()  # the tie exists here, and the rule calls it negative
    at_half = detection_metrics(prep.y_test, rung.test_scores > 0.5)
    assert at_half["recall"] == rung.test["recall"] and at_half["precision"] == rung.test["precision"]
    rule = load_rule(save_rung(tmp_path / "t.json", prep, rung))
    assert np.array_equal(rule.predict(prep.X_test), rung.test_pred)
    _, vectors = export_c(rule, tmp_path / "t.h", prep.X_test[ties])
    expected = vectors.read_text().split("_vector_expected")[1]
    assert "1" not in expected.split("{")[1].split("}")[0]


def test_operating_threshold_round_trips_and_apply_uses_it(bottle_tree4, tmp_path, capsys):
    from pixelfit.rulefile import load_rule, save_rung

    prep, rung = bottle_tree4
    path = save_rung(tmp_path / "t.json", prep, rung, {"threshold": 0.3, "chosen_on": "held-out"})
    rule = load_rule(path)
    assert (rule.operating_threshold, rule.operating_chosen_on) == (0.3, "held-out")
    s = rule.scores(prep.X_test)
    assert np.array_equal(rule.predict(prep.X_test), s > 0.3) and (s > 0.3).sum() > rung.test_pred.sum()
    # apply on the folder: predictions follow the stored threshold (score > 0.3).
    out = tmp_path / "a.csv"
    assert main(["apply", str(path), "bottle-caps", "--csv", str(out)]) == 0
    assert "score above threshold 0.3, the rule's, chosen on held-out" in capsys.readouterr().out
    import csv
    rows = list(csv.DictReader(open(out)))
    assert all((float(r["score"]) > 0.3) == (r["prediction"] == rule.positive) for r in rows)
    # A schema-1 file (no operating entry) still loads, with the rule's own decision.
    doc = json.loads(path.read_text())
    doc["schema_version"] = 1
    del doc["operating"]
    old = tmp_path / "old.json"
    old.write_text(json.dumps(doc))
    r1 = load_rule(old)
    assert r1.operating_threshold == 0.5 and np.array_equal(r1.predict(prep.X_test), rung.test_pred)


def test_window_tie_rows_agree(bottle_tree4):
    """The inspector's "held-out" and "held-out @ 0.500" rows are one decision (tree-4 on bottle-caps)."""
    from pixelfit.app.session import Session

    prep, rung = bottle_tree4
    s = Session()
    s.run_prep = prep
    s.add_rung(rung)
    s.select(rung.key)
    assert s.threshold == 0.5 and s.threshold_chosen_on == "default"
    m = s.threshold_metrics()
    assert (m["tp"], m["fp"], m["fn"], m["tn"]) == tuple(rung.test[k] for k in ("tp", "fp", "fn", "tn"))
    # With a spec the window starts the rung at the threshold chosen on CV scores, as the CLI does.
    assert s.set_spec(0.7, 0.7, 0.95, None)
    assert s.threshold == rung.spec["threshold"] and s.threshold_chosen_on == "cv"
    assert s.answer is not None and s.answer["verdict"] in ("meets", "plausible", "fails")


def test_operating_points_thinned_keep_rows_of_the_full_curve():
    from pixelfit.evaluate import operating_points

    rng = np.random.default_rng(3)
    y = rng.random(5000) < 0.3
    s = np.clip(y * 0.3 + rng.random(5000) * 0.7, 0, 1)
    full = operating_points(y, s)
    assert len(full) > 4000
    thin = operating_points(y, s, max_points=100)
    assert len(thin) == 100 and thin[0] == full[0] and thin[-1] == full[-1]
    assert all(pt in full for pt in thin)  # every kept row is a row of the full curve, unchanged
    assert operating_points(y, s, max_points=10_000) == full  # fewer candidates than the cap: all of them
