"""The desktop application, driven offscreen with pytest-qt. Assertions are on the session and
its data, not on pixels (except the one row-major check, which is about pixels by design)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")
from conftest import make_patches, write_class_folders  # noqa: E402

from pixelfit.app._qt import QtCore, QtGui, QtWidgets  # noqa: E402  (before any widget is built)
from pixelfit.app.main_window import RECENT_KEY, MainWindow  # noqa: E402
from pixelfit.app.widgets.inspector import SLIDER_STEPS, PixelMap  # noqa: E402
from pixelfit.evaluate import detection_metrics  # noqa: E402
from pixelfit.rulefile import load_rule  # noqa: E402

SMALL = dict(families=["constant", "lut", "tree"], max_size=2, folds=2)


class Answers:
    """Stands in for the confirmation dialogs: records each question, answers ``self.reply``."""

    def __init__(self):
        self.asked: list[str] = []
        self.reply = True

    def __call__(self, title: str, question: str) -> bool:
        self.asked.append(title)
        return self.reply


@pytest.fixture
def answers():
    return Answers()


@pytest.fixture
def window(qtbot, tmp_path, answers):
    settings = QtCore.QSettings(str(tmp_path / "settings.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=answers)
    w.show()
    yield w
    w.stop_worker()
    answers.reply = True
    w.close()
    assert w.worker is None
    assert not w.session.running
    w.deleteLater()


def climb(qtbot, w: MainWindow, **settings) -> None:
    """Apply ladder settings through the panel's widgets, press climb, wait for the end."""
    panel = w.climb
    fams = settings.get("families", w.session.families)
    for name, cb in panel.checks.items():
        cb.setChecked(name in fams)
    panel.max_size.setValue(settings.get("max_size") or 0)
    panel.folds.setValue(settings.get("folds", w.session.folds))
    with qtbot.waitSignal(w.act_climb.triggered, timeout=1000):
        w.act_climb.trigger()
    qtbot.waitUntil(lambda: not w.session.running, timeout=60_000)


def test_session_model_imports_without_qt():
    """The window's state lives in a plain-Python model (tests/test_layering.py covers the core)."""
    import subprocess
    import sys

    code = ("import sys, pixelfit.app, pixelfit.app.session; "
            "bad = [m for m in ('PySide6', 'pyqtgraph') if m in sys.modules]; print(bad); sys.exit(1 if bad else 0)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr


def test_full_flow(qtbot, window, class_folder, tmp_path, monkeypatch, answers):
    w, s = window, window.session
    assert w.open_path(class_folder)
    ds = s.dataset
    assert ds.counts == {"blank": int((ds.labels == "blank").sum()), "spot": int((ds.labels == "spot").sum())}
    assert w.report.positive.currentData() == s.positive == "spot"
    assert w.gallery.model.rowCount() == len(ds)
    assert w.recent_sources()[0].endswith("classes")

    # Binarization: pick the fixed method and a level through the panel; the bits follow.
    prep = w.prep_panel
    prep.method.setCurrentIndex(prep.method.findData("fixed"))
    prep.method.activated.emit(prep.method.currentIndex())
    prep.level.setValue(150)
    assert s.binarizer.method == "fixed" and s.binarizer.threshold == 150
    assert np.array_equal(s.prep.X_train.reshape(-1, 8, 8), ds.images[~s.prep.test_mask] >= 150)
    counts, thresholds = s.histogram()
    assert counts.sum() == (~s.prep.test_mask).sum() * 64 and list(thresholds) == [150.0]
    pix = w.gallery.model.data(w.gallery.model.index(0), QtCore.Qt.ItemDataRole.DecorationRole)
    assert pix.width() == 2 * 8 * w.gallery.model.scale + 2
    # The class filter shows only that class.
    w.gallery.filter.setCurrentIndex(w.gallery.filter.findData("spot"))
    w.gallery.filter.activated.emit(w.gallery.filter.currentIndex())
    assert w.gallery.model.rowCount() == ds.counts["spot"]

    climb(qtbot, w, **SMALL)
    plan = s.plan()
    assert [r.key for r in s.rungs] == [f"{f}-{k}" for f, k in plan]
    assert w.table.model().rowCount() == len(plan)
    assert sum(r.recommended for r in s.rungs) == 1 and s.selected is s.recommended
    assert s.unsaved

    assert w.climb.bar.value() == w.climb.bar.maximum() == s.progress_state[1] > 0

    # Clicking a point of the error plot selects that rung; so does a row of the table.
    plot = w.error_plot.points
    spot = next(p for p in plot.points() if p.data() == "tree-1")
    plot.sigClicked.emit(plot, [spot], None)
    assert s.selected.key == "tree-1"
    assert w.table.selectionModel().currentIndex().row() == [r.key for r in s.rungs].index("tree-1")
    row = next(i for i, r in enumerate(s.rungs) if r.key == "lut-2")
    w.table.selectRow(row)
    assert s.selected.key == "lut-2"
    assert w.inspector.title.text().startswith("<b>lut-2</b>")
    assert w.inspector.pixmap.values.shape == (8, 8)

    # The threshold slider: held-out metrics follow, computed by the core (score above the threshold).
    w.inspector.slider.setValue(int(0.2 * SLIDER_STEPS))
    assert s.threshold == pytest.approx(0.2) and s.threshold_chosen_on == "held-out"
    expect = detection_metrics(s.run_prep.y_test, s.selected.test_scores > 0.2)
    assert s.threshold_metrics() == expect
    assert w.inspector.confusion.item(0, 0).text() == str(expect["tp"])
    assert w.inspector.pr_table.item(3, 2).text() == f"{expect['f1']:.3f}"
    fp, fn = s.misses()
    assert len(fp) == expect["fp"] and len(fn) == expect["fn"]
    assert w.inspector.fp_list.count() == min(len(fp), 48)
    # The threshold is kept per rung: another rung starts at its own, and this one's comes back.
    w.table.selectRow(next(i for i, r in enumerate(s.rungs) if r.key == "tree-1"))
    assert s.threshold == 0.5 and s.threshold_chosen_on == "default"
    w.table.selectRow(row)
    assert s.threshold == pytest.approx(0.2) and s.threshold_chosen_on == "held-out"

    # The spec, in the climb panel: the same core call as `pixelfit fit --spec` judges every rung,
    # and the answer is stated, marked in the table and the plot.
    from pixelfit.evaluate import Spec, answer, evaluate_spec

    w.climb.spec_precision.setValue(0.6)
    assert s.spec == Spec(0.6, None, 0.95, None)  # the command line's default confidence
    w.climb.spec_recall.setValue(0.5)
    w.climb.spec_confidence.setValue(0.9)
    assert s.spec == Spec(0.6, 0.5, 0.9, None)
    for r in s.rungs:
        assert r.spec == evaluate_spec(r.choice_scores, s.run_prep.y_train, r.chosen_on, r.test_scores,
                                       s.run_prep.y_test, s.spec, r.cost)
    assert s.answer == answer(s.rungs, s.spec)
    shown = s.answer["rung"] or "none"
    assert f"answer: {shown}" in w.climb.answer.text()
    if s.answer["rung"] is not None:
        i = [r.key for r in s.rungs].index(s.answer["rung"])
        assert w.table.model().item(i, 0).text().startswith("◆ ")
        qtbot.waitUntil(lambda: next(p for p in plot.points() if p.data() == s.answer["rung"]).symbol() == "d",
                        timeout=2000)  # the plot redraws on the next turns of the event loop
    # "move there": the threshold chosen for the spec on CV scores (held-out only confirms it).
    w.inspector.go_target.click()
    assert s.threshold == s.selected.spec["threshold"] and s.threshold_chosen_on == "cv"
    assert f"{s.selected.spec['threshold']:.3f} chosen on cv" in w.inspector.target_label.text()
    w.inspector.slider.setValue(int(0.35 * SLIDER_STEPS))
    assert s.threshold_chosen_on == "held-out"

    # Switching the map to a data map and back.
    w.inspector.kind.setCurrentIndex(w.inspector.kind.findData("mean_difference"))
    w.inspector.kind.activated.emit(w.inspector.kind.currentIndex())
    assert s.map_kind == "mean_difference"
    assert np.allclose(w.inspector.pixmap.values, s.run_prep.data_maps()["mean_difference"], atol=1e-6)

    # Save through the action (the file dialog answered by the test) and load the file back.
    target = tmp_path / "rules" / "lut-2.json"
    monkeypatch.setattr(QtWidgets.QFileDialog, "getSaveFileName", lambda *a, **k: (str(target), ""))
    w.act_save.trigger()
    rule = load_rule(target)
    assert (rule.family, rule.size) == ("lut", 2)
    # The threshold picked in the window is what the rule file ships, with where it was chosen.
    assert (rule.operating_threshold, rule.operating_chosen_on) == (pytest.approx(0.35), "held-out")
    assert np.array_equal(rule.predict(s.run_prep.X_test), s.selected.test_scores > s.threshold)
    assert not s.unsaved and str(target) in w.strip.text.text()
    header = tmp_path / "c" / "lut-2.h"
    offered = []
    monkeypatch.setattr(QtWidgets.QFileDialog, "getSaveFileName",
                        lambda *a, **k: offered.append(a[2]) or (str(header), ""))
    w.act_export.trigger()
    # One naming scheme for a rung's files: the header offered and its rule file are named like the rule.
    assert Path(offered[0]).name == "lut-2.h" and Path(offered[0]).parent == target.parent
    assert header.is_file() and (header.parent / "lut-2.json").is_file()
    assert not (header.parent / "lut_2.json").exists()
    assert "exported" in w.strip.text.text() and not w.strip.error
    assert answers.asked == []


def test_halt_keeps_finished_rungs(qtbot, window, tmp_path):
    imgs, labels = make_patches(np.random.default_rng(3), n=600, shape=(12, 12))
    w, s = window, window.session
    assert w.open_path(write_class_folders(tmp_path / "big", imgs, labels))
    w.session.set_ladder(families=["constant", "lut", "logistic", "tree", "mlp"], max_size=None, folds=5)
    assert w.start_climb()
    qtbot.waitUntil(lambda: len(s.rungs) >= 1, timeout=30_000)
    assert s.running and w.table.model().rowCount() == len(s.rungs)  # rungs show as they finish
    locked = (w.prep_panel.method, w.prep_panel.invert, w.report.positive, w.climb.folds)
    assert not any(c.isEnabled() for c in locked)  # the data and settings stay put while it climbs
    w.act_halt.trigger()
    qtbot.waitUntil(lambda: not s.running, timeout=30_000)
    assert all(c.isEnabled() for c in locked)
    assert 1 <= len(s.rungs) < s.planned
    assert "stopped" in w.strip.text.text()
    assert w.worker is None and w.act_climb.isEnabled()


def test_halt_before_the_thread_starts(qtbot, window, class_folder):
    """The ladder thread starts a moment after the climb; a halt in that moment ends the run."""
    w, s = window, window.session
    assert w.open_path(class_folder)
    assert w.start_climb()
    w.act_halt.trigger()
    assert s.running
    qtbot.waitUntil(lambda: not s.running, timeout=5_000)
    assert s.rungs == [] and "stopped: 0 of" in w.strip.text.text()
    assert w.worker is None and w.act_climb.isEnabled()


def test_climb_again_replaces_rows_and_plot(qtbot, window, class_folder, answers):
    """A second climb drops the old rungs from every panel (the selection was still on an old
    rung when the table emptied) and shows the new ones, row for rung, point for rung."""
    w, s = window, window.session
    assert w.open_path(class_folder)
    climb(qtbot, w, **SMALL)
    first = list(s.rungs)
    climb(qtbot, w, families=["constant", "tree"], max_size=3, folds=2)
    assert answers.asked == ["Replace the trained rungs?"]
    assert [r.key for r in s.rungs] == ["constant-0", "tree-1", "tree-2", "tree-3"]
    assert not any(r is old for r in s.rungs for old in first)
    model = w.table.model()
    assert [model.index(i, 0).data().lstrip("★ ") for i in range(model.rowCount())] == [r.key for r in s.rungs]
    assert sorted(p.data() for p in w.error_plot.points.points()) == sorted(r.key for r in s.rungs)
    rec = s.rungs.index(s.recommended)
    assert model.index(rec, 0).data() == "★ " + s.recommended.key
    assert w.table.selectionModel().currentIndex().row() == s.rungs.index(s.selected)
    # The held-out figures of the new selection follow on the next turn of the event loop.
    qtbot.waitUntil(lambda: w.inspector.confusion.item(0, 0).text() == str(s.threshold_metrics()["tp"]))
    # The legend lists this run's families only.
    legend = [label.text for _, label in w.error_plot.legend.items]
    assert "constant" in legend and "tree" in legend and "lut" not in legend


def test_errors_stay_in_the_window(qtbot, window, tmp_path, class_folder, monkeypatch):
    w, s = window, window.session
    assert not w.open_path(tmp_path / "nowhere")
    assert w.strip.error and "no such file" in w.strip.text.text() and s.dataset is None
    one = tmp_path / "one"
    write_class_folders(one, *make_patches(np.random.default_rng(1), n=10))
    for p in (one / "blank").iterdir():
        p.unlink()
    (one / "blank").rmdir()
    assert not w.open_path(one)
    assert "only one class" in w.strip.text.text()

    assert w.open_path(class_folder)
    assert not s.set_binarizer("fixed", 999.0)
    assert w.strip.error and s.binarizer.method == "otsu"

    def broken(*_a, **_k):
        raise RuntimeError("model exploded")
        yield

    monkeypatch.setattr("pixelfit.app.workers.run_ladder_in_process", broken)
    climb(qtbot, w, **SMALL)
    assert w.strip.error and "model exploded" in w.strip.text.text()
    assert s.rungs == [] and w.worker is None


def test_close_asks_before_dropping_rungs(qtbot, window, class_folder, answers):
    w, s = window, window.session
    w.open_path(class_folder)
    climb(qtbot, w, families=["constant", "lut"], max_size=1, folds=2)
    answers.reply = False
    assert not w.close()
    assert w.isVisible() and answers.asked == ["Close without saving?"]
    assert not w.open_path(class_folder)  # opening other patches asks too, and keeps the rungs
    assert len(s.rungs) == 2
    answers.reply = True
    assert w.close()


def test_drop_opens_and_recent_list(qtbot, window, class_folder, npz_file):
    w = window
    mime = QtCore.QMimeData()
    mime.setUrls([QtCore.QUrl.fromLocalFile(str(npz_file))])
    ev = QtGui.QDropEvent(QtCore.QPointF(10, 10), QtCore.Qt.DropAction.CopyAction, mime,
                          QtCore.Qt.MouseButton.LeftButton, QtCore.Qt.KeyboardModifier.NoModifier)
    w.dropEvent(ev)
    assert w.session.dataset.layout == "npz"
    w.open_path(class_folder)
    recent = w.recent_sources()
    assert recent[:2] == [str(class_folder.resolve()), str(npz_file.resolve())]
    assert w.settings.value(RECENT_KEY) is not None


def test_shortcuts(window):
    w = window
    keys = {a: [k.toString() for k in a.shortcuts()] for a in (w.act_open, w.act_climb, w.act_halt, w.act_save)}
    assert keys[w.act_open] == [QtGui.QKeySequence(QtGui.QKeySequence.StandardKey.Open).toString()]
    assert keys[w.act_climb] == ["Ctrl+R"] and "Esc" in keys[w.act_halt]
    assert keys[w.act_save] == [QtGui.QKeySequence(QtGui.QKeySequence.StandardKey.Save).toString()]


@pytest.mark.parametrize("shape,hot", [((6, 8), (2, 5)), ((5, 5), (4, 0))])
def test_heatmap_is_row_major(qtbot, shape, hot):
    view = PixelMap()
    qtbot.addWidget(view)
    values = np.zeros(shape)
    values[hot] = 3.0
    view.show_map(values)
    item = view.image
    assert item.axisOrder == "row-major"
    item.render()
    qimg = item.qimage
    assert (qimg.width(), qimg.height()) == (shape[1], shape[0])
    hot_rgb = QtGui.QColor(qimg.pixel(hot[1], hot[0])).getRgb()
    others = {QtGui.QColor(qimg.pixel(c, r)).getRgb() for r in range(shape[0]) for c in range(shape[1])
              if (r, c) != hot}
    assert len(others) == 1 and hot_rgb not in others
    # The pixel's centre sits at (col + 0.5, row + 0.5) in the plot, and row 0 is drawn at the top.
    centre = item.mapToParent(QtCore.QPointF(hot[1] + 0.5, hot[0] + 0.5))
    assert (centre.x(), centre.y()) == (hot[1] + 0.5, hot[0] + 0.5)
    vb = view.plot.getViewBox()
    assert vb.mapViewToScene(QtCore.QPointF(0, 0)).y() < vb.mapViewToScene(QtCore.QPointF(0, shape[0])).y()


def test_all_zero_map_has_finite_levels(qtbot):
    view = PixelMap()
    qtbot.addWidget(view)
    view.show_map(np.zeros((4, 4), bool))
    assert view.values.dtype == np.float32
    assert tuple(view.image.getLevels()) == (0.0, 1.0)  # no negative value: the sequential scale


def test_plain_pixelfit_opens_the_gui(monkeypatch):
    import pixelfit.app
    from pixelfit.cli import main

    seen = []
    monkeypatch.setattr(pixelfit.app, "launch", lambda path=None, argv=None: seen.append(path) or 0)
    assert main([]) == 0 and main(["gui", "some/folder"]) == 0
    assert seen == [None, "some/folder"]


def test_start_on_demo_set_or_ask_for_a_folder(qtbot, window, class_folder, tmp_path, monkeypatch):
    from pixelfit.app import main_window

    w = window
    asked = []
    monkeypatch.setattr(w, "choose_folder", lambda: asked.append(True))
    monkeypatch.setattr("pixelfit.demo.resolve_dataset_path", lambda name: tmp_path / "no-demo-here")
    main_window._open_initial(w, None)
    qtbot.waitUntil(lambda: asked == [True], timeout=2000)
    assert "demo set" in w.strip.text.text() and w.session.dataset is None
    monkeypatch.setattr("pixelfit.demo.resolve_dataset_path", lambda name: class_folder)
    main_window._open_initial(w, None)
    assert w.session.dataset is not None and w.session.dataset.source == str(class_folder)


def test_throttled_folds_requests_into_one_call(qtbot):
    """Requests in a burst cost one call; the last one always gets it; flush calls at once."""
    import time

    from pixelfit.app.widgets import Throttled

    parent = QtCore.QObject()
    calls: list[float] = []
    later = Throttled(lambda: calls.append(time.perf_counter()), 200, parent)
    later.request()
    later.request()
    assert calls == []  # runs on the event loop, not inside the request
    qtbot.waitUntil(lambda: len(calls) == 1, timeout=1000)
    for _ in range(5):
        later.request()
    assert later.pending and len(calls) == 1
    later.flush()
    assert len(calls) == 2 and not later.pending
    later.request()
    qtbot.waitUntil(lambda: len(calls) == 3, timeout=2000)
    # Qt may fire a coarse timer up to 5 % early (QTimer docs), hence 0.19 s for 200 ms.
    assert calls[2] - calls[1] >= 0.19
    qtbot.wait(300)
    assert len(calls) == 3  # nothing more was asked for


def _trainers():
    import multiprocessing

    return [p for p in multiprocessing.active_children() if p.name == "pixelfit-trainer"]


def _start_long_climb(qtbot, w, class_folder):
    w.open_path(class_folder)
    w.session.set_ladder(families=["constant", "lut", "nb", "logistic", "tree"], max_size=8, folds=5)
    w.act_climb.trigger()
    qtbot.waitUntil(lambda: len(_trainers()) == 1, timeout=20_000)


def test_nothing_is_selected_for_the_user_until_the_climb_ends(qtbot, window, class_folder):
    w, s = window, window.session
    _start_long_climb(qtbot, w, class_folder)
    qtbot.waitUntil(lambda: len(s.rungs) >= 2, timeout=30_000)
    assert s.selected is None  # the inspector is left alone while rungs arrive
    s.select("constant-0")  # ... but the user may look at any finished rung
    qtbot.waitUntil(lambda: not s.running, timeout=60_000)
    assert s.selected.key == "constant-0" != s.recommended.key  # the user's choice is kept


def test_a_trainer_that_dies_is_reported_in_the_window(qtbot, window, class_folder):
    import os
    import signal

    w, s = window, window.session
    _start_long_climb(qtbot, w, class_folder)
    os.kill(_trainers()[0].pid, signal.SIGKILL)
    qtbot.waitUntil(lambda: not s.running, timeout=20_000)
    assert w.strip.error and "ended without finishing" in w.strip.text.text()
    assert w.worker is None and _trainers() == []
    assert w.act_climb.isEnabled()  # and the user can climb again


def test_closing_mid_climb_ends_the_trainer(qtbot, window, class_folder):
    import time

    w = window
    _start_long_climb(qtbot, w, class_folder)
    t = time.perf_counter()
    w.stop_worker()
    assert time.perf_counter() - t < 10
    assert w.worker is None and _trainers() == []


def test_cluster_field_goes_to_the_session_and_the_run(qtbot, window, class_folder):
    w, s = window, window.session
    assert w.open_path(class_folder)
    field = w.climb.scheduler
    field.setText("  tcp://10.0.0.5:8786 ")
    field.editingFinished.emit()
    assert s.scheduler == "tcp://10.0.0.5:8786"
    spec = s.start_run()
    assert spec is not None and spec.scheduler == "tcp://10.0.0.5:8786"
    s.running = False  # nothing was started: the spec is only inspected
    field.setText("")
    field.editingFinished.emit()
    assert s.scheduler is None and s.start_run().scheduler is None
    s.running = False


def test_a_climb_keeps_full_garbage_collection_out_and_collects_after(qtbot, tmp_path):
    # Full collections walk the whole heap (over 100 ms with a climbed ladder): the window freezes
    # what exists while a ladder climbs, collects what was made since once it ends and freezes that
    # too, and unfreezes everything when released.
    import gc

    w = MainWindow(settings=QtCore.QSettings(str(tmp_path / "s.ini"), QtCore.QSettings.Format.IniFormat),
                   ask=lambda *_: True)
    qtbot.addWidget(w)
    gc.unfreeze()
    s = w.session
    made_before = [[0]]
    s.running = True
    s._emit("run")
    frozen = gc.get_freeze_count()
    assert frozen > 0
    made_while_climbing = [[k] for k in range(3)]

    def frozen_now(obj) -> bool:  # gc.get_objects() lists the three generations, not the frozen objects
        return not any(o is obj for o in gc.get_objects())

    assert not frozen_now(made_while_climbing)
    s.running = False
    s._emit("run")
    assert frozen_now(made_before)  # nothing unfrozen: the next collection skips the old heap
    # collected, then what was made since is frozen too
    qtbot.waitUntil(lambda: frozen_now(made_while_climbing), timeout=3000)
    w.release()
    assert gc.get_freeze_count() == 0
