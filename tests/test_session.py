"""The window's state driven without any widget: open, prepare, climb, select, threshold, save.

The ladder runs synchronously through the same core call the window's trainer process makes
(`run_ladder` with the session's RunSpec), and the session is fed exactly as the window feeds it.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from pixelfit.app.session import Session
from pixelfit.evaluate import detection_metrics
from pixelfit.ladder import run_ladder
from pixelfit.rulefile import load_rule


@pytest.fixture
def session():
    s = Session()
    s.events = []  # what the session announced, in order: (event, args)
    for name in ("dataset", "prep", "settings", "run", "progress", "rungs", "selection", "threshold", "message"):
        s.subscribe(name, lambda *args, name=name: s.events.append((name, args)))
    return s


def _names(s) -> list[str]:
    return [e for e, _ in s.events]


def _errors(s) -> list[str]:
    return [args[0] for e, args in s.events if e == "message" and args[1]]


def _climb(s: Session, outcome: str = "finished") -> None:
    spec = s.start_run()
    assert spec is not None
    for pr in run_ladder(spec.prep, spec.plan, spec.folds, spec.seed):
        s.report_progress(pr.done, pr.total, pr.message)
        if pr.rung is not None:
            s.add_rung(pr.rung)
    s.end_run(outcome)


def test_open_and_prepare(session, class_folder, patches):
    assert session.open(class_folder)
    assert _names(session)[:2] == ["dataset", "prep"]
    assert session.dataset is not None and len(session.dataset) == len(patches[0])
    prep = session.prep
    assert prep is not None and session.positive == "spot"  # the less frequent class by default
    assert prep.binarizer.method == "otsu" and prep.binarizer.threshold is not None
    counts, thresholds = session.histogram()
    # The histogram covers the training pixels only, each counted once.
    assert counts.sum() == (~prep.test_mask).sum() * 64
    assert thresholds is not None and thresholds.tolist() == [prep.binarizer.threshold]
    bits = session.binarized(np.arange(3))
    assert bits.shape == (3, 8, 8) and bits.dtype == bool
    assert np.array_equal(bits, session.dataset.images[:3] > prep.binarizer.threshold)


def test_bad_open_keeps_the_state_and_says_why(session, class_folder, tmp_path):
    assert session.open(class_folder)
    before = session.dataset
    (tmp_path / "empty").mkdir()
    session.events.clear()
    assert not session.open(tmp_path / "empty")
    assert session.dataset is before and _names(session) == ["message"]
    assert "no readable patches" in _errors(session)[0]


def test_prep_changes_and_the_blank_refusal(session, class_folder):
    session.open(class_folder)
    session.events.clear()
    assert session.set_binarizer("fixed", 100)
    assert _names(session) == ["prep"] and session.prep is not None
    assert session.prep.binarizer.describe() == "fixed:100"
    session.events.clear()
    session.set_binarizer("fixed", 256)  # every training pixel 0: refused by the core, named for the window
    assert session.prep is None
    (err,) = _errors(session)
    assert err.startswith("binarization: fixed:256 makes every training pixel 0: the training patches hold grey levels")
    assert "--" not in err
    session.set_binarizer("otsu")
    session.set_positive("blank")
    assert session.prep is not None and session.prep.positive == "blank" and session.prep.negative == "spot"
    assert session.plan()  # prepared again: a ladder can be planned


def test_settings_refusals_name_the_window_controls(session, class_folder):
    session.open(class_folder)
    session.set_ladder(families=["constant", "lut"], max_size=0, folds=0)
    assert session.start_run() is None and not session.running
    assert _errors(session)[-1] == "largest size: the largest size must be at least 1 (sizes count from 1), not 0"
    session.set_ladder(max_size=1, folds=1)
    assert session.start_run() is None
    assert _errors(session)[-1] == "folds: cross-validation folds must be 0 (off) or at least 2, not 1"
    session.set_ladder(families=[])
    assert session.start_run() is None and _errors(session)[-1] == "choose at least one family"


def test_climb_select_threshold_and_save(session, class_folder, tmp_path):
    session.open(class_folder)
    session.set_ladder(families=["constant", "lut", "nb"], max_size=2, folds=3)
    assert session.plan() == [("constant", 0), ("lut", 1), ("lut", 2), ("nb", 1), ("nb", 2)]
    session.events.clear()
    _climb(session)
    names = _names(session)
    assert names.count("run") == 2 and names.count("rungs") == 5 and "progress" in names
    assert [r.key for r in session.rungs] == ["constant-0", "lut-1", "lut-2", "nb-1", "nb-2"]
    assert not session.running and session.unsaved
    # The recommended rung is selected at the end, as nobody chose one.
    assert session.recommended is not None and session.selected is session.recommended
    assert names[-1] == "selection"

    session.select("nb-2")
    r = session.selected
    assert r is not None and r.key == "nb-2" and r.test_scores is not None
    prep = session.run_prep
    assert prep is not None
    # Metrics at a threshold are the core's metrics of the scores cut at that threshold.
    for t in (0.2, 0.5, 0.9):
        session.set_threshold(t)
        expected = detection_metrics(prep.y_test, r.test_scores >= t)
        assert session.threshold_metrics() == expected
    fp, fn = session.misses()
    pred = r.test_scores >= 0.9
    rows = np.flatnonzero(prep.test_mask)
    assert fp.tolist() == rows[pred & ~prep.y_test].tolist() and fn.tolist() == rows[~pred & prep.y_test].tolist()
    session.set_threshold(7)  # clamped to the score range
    assert session.threshold == 1.0

    session.select("lut-1")  # a rule without scores: its own decision, whatever the threshold
    assert session.held_out_predictions() is not None
    assert np.array_equal(session.held_out_predictions(), np.asarray(session.selected.test_pred, bool))

    saved = session.save_selected(tmp_path / "rules" / "lut-1.json")
    assert saved is not None and not session.unsaved
    rule = load_rule(saved)
    assert rule.family == "lut" and rule.size == 1 and rule.positive == "spot"
    X = prep.binarizer.transform(prep.dataset.images[prep.test_mask]).reshape(int(prep.test_mask.sum()), -1)
    assert np.array_equal(rule.predict(X), session.held_out_predictions())
    assert json.loads(saved.read_text())["training_data"]["fingerprint"] == prep.train_fingerprint


def test_cancelled_climb_keeps_the_finished_rungs(session, class_folder):
    session.open(class_folder)
    session.set_ladder(families=["constant", "lut"], max_size=3, folds=0)
    spec = session.start_run()
    assert spec is not None
    for pr in run_ladder(spec.prep, spec.plan, spec.folds, spec.seed):
        if pr.rung is not None:
            session.add_rung(pr.rung)
            if len(session.rungs) == 2:
                break  # the user halts after two rungs
    session.end_run("cancelled")
    assert [r.key for r in session.rungs] == ["constant-0", "lut-1"]
    assert session.events[-1][0] in ("message", "selection")
    assert any(e == "message" and a[0] == "ladder stopped: 2 of 4 rungs finished and kept" for e, a in session.events)


def test_nothing_selected_means_nothing_to_show(session, class_folder, tmp_path):
    assert session.held_out_predictions() is None and session.threshold_metrics() is None
    assert [m.size for m in session.misses()] == [0, 0]
    assert session.save_selected(tmp_path / "x.json") is None
    assert _errors(session) == ["select a rung to save first"]
    assert session.heatmap() == (None, "no rung selected")
    session.set_map_kind("mean_difference")
    assert session.heatmap() == (None, "no data")
    session.open(class_folder)
    values, caption = session.heatmap()
    assert values is not None and values.shape == (8, 8) and caption.startswith("data:")
