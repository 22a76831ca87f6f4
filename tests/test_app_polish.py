"""The window's finish: permissions of the files it writes, a new data set clearing every view of
the old one, "move there" when no threshold reaches the spec, per-family map names, the save
folder, the legend beside the plot, the time left of a climb. Driven offscreen with pytest-qt;
assertions are on data and widget state, not on pixels."""
from __future__ import annotations

import os
import stat
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")
from conftest import make_patches, write_class_folders  # noqa: E402

from pixelfit.app._qt import QtCore, QtWidgets  # noqa: E402  (before any widget is built)
from pixelfit.app.images import side_by_side  # noqa: E402
from pixelfit.app.main_window import SAVE_DIR_KEY, MainWindow  # noqa: E402
from pixelfit.app.session import MAP_KINDS, Session, duration_text, map_name  # noqa: E402
from pixelfit.families import FAMILIES  # noqa: E402
from pixelfit.plots import SEQUENTIAL_STOPS, colorize, colorize_sequential, one_signed  # noqa: E402

LADDER = dict(families=["constant", "lut", "tree"], max_size=2, folds=2)


@pytest.fixture
def window(qtbot, tmp_path):
    settings = QtCore.QSettings(str(tmp_path / "settings.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=lambda title, question: True)
    w.show()
    yield w
    w.stop_worker()
    w.close()
    w.deleteLater()


def noisy_folder(root: Path, seed: int = 5) -> Path:
    """Patches whose spot is a perfect cue except that a tenth of the spotted ones are labelled
    blank: no threshold of any rung gets precision 1 on them."""
    imgs, labels = make_patches(np.random.default_rng(seed), n=240)
    spotted = np.flatnonzero(labels == "spot")
    labels[spotted[2::10]] = "blank"
    return write_class_folders(root, imgs, labels)


def climb(qtbot, w: MainWindow) -> None:
    w.session.set_ladder(**LADDER)
    assert w.start_climb()
    qtbot.waitUntil(lambda: w.worker is None and not w.session.running, timeout=60_000)
    assert w.session.rungs


def test_files_the_window_writes_follow_the_umask(qtbot, window, tmp_path, monkeypatch):
    w, s = window, window.session
    assert w.open_path(noisy_folder(tmp_path / "a"))
    climb(qtbot, w)
    s.select("lut-1")
    out = tmp_path / "out"
    out.mkdir()
    old = os.umask(0o027)
    try:
        for act, name in ((w.act_save, "lut-1.json"), (w.act_export, "lut-1.h"), (w.act_report, "report.html")):
            monkeypatch.setattr(QtWidgets.QFileDialog, "getSaveFileName", lambda *a, n=name, **k: (str(out / n), ""))
            act.trigger()
    finally:
        os.umask(old)
    written = sorted(p.name for p in out.iterdir())
    assert {"lut-1.json", "lut-1.h", "report.html"} <= set(written) and len(written) >= 4  # + the test vectors
    for p in out.iterdir():  # as a plain open() would create them: 0o666 less the umask
        assert stat.S_IMODE(p.stat().st_mode) == 0o640, p.name


def test_a_new_data_set_clears_every_view_of_the_old_one(qtbot, window, tmp_path):
    w, s = window, window.session
    assert w.open_path(noisy_folder(tmp_path / "a"))
    climb(qtbot, w)
    s.select("tree-2")
    qtbot.wait(50)
    assert w.climb.bar.value() == w.climb.bar.maximum() > 0 and w.climb.step.text()
    assert w.inspector.pixmap.bar.isVisible() and w.inspector.pixmap.values is not None
    assert w.table.model().rowCount() == len(s.rungs) and w.error_plot.points.data.size
    assert w.inspector.fp_list.count() + w.inspector.fn_list.count() > 0
    imgs, labels = make_patches(np.random.default_rng(9), n=60, shape=(6, 6))
    assert w.open_path(write_class_folders(tmp_path / "b", imgs, labels))
    qtbot.wait(700)  # the throttled redraws (plot, progress) have had their turn
    assert w.climb.bar.value() == 0 and w.climb.step.text() == "" and "left" not in w.climb.bar.format()
    assert w.inspector.pixmap.values is None and not w.inspector.pixmap.bar.isVisible()
    assert w.inspector.title.text() == "Select a rung in the ladder."
    assert w.inspector.fp_list.count() == w.inspector.fn_list.count() == 0
    w.tabs.setCurrentIndex(0)  # the plot redraws when it comes into view
    qtbot.wait(50)
    assert w.table.model().rowCount() == 0 and w.error_plot.points.data.size == 0
    assert all(c.xData is None or len(c.xData) == 0 for c in w.error_plot._curves.values())
    assert s.checks is None and w.checks_view.decomposition.curves == {} and w.checks_view.learning.items == []
    assert w.report.skipped.count() == 0 and w.gallery.model.rowCount() == 60


def test_move_there_is_off_when_no_threshold_reaches_the_spec(qtbot, window, tmp_path):
    w, s = window, window.session
    assert w.open_path(noisy_folder(tmp_path / "a"))
    climb(qtbot, w)
    s.select("lut-1")
    assert s.set_spec(1.0, None)
    reach = s.spec_reach()
    assert reach is not None and not reach["reached"] and reach["best_precision"] < 1
    assert not w.inspector.go_target.isEnabled()
    text = w.inspector.target_label.text()
    assert f"{reach['best_precision']:.3f}" in text and f"recall {reach['recall_at_best']:.3f}" in text
    before = s.threshold
    s.move_to_spec()
    assert s.threshold == before  # nothing to move to
    # The best precision is the largest over every threshold, brute force over the CV scores.
    r = s.selected
    y = s.run_prep.y_train
    best = max(y[r.choice_scores > t].mean() for t in np.unique(np.r_[0.0, r.choice_scores]) if (r.choice_scores > t).any())
    assert reach["best_precision"] == pytest.approx(best)
    assert s.set_spec(np.floor(best * 1000) / 1000, None)  # just under the best: reachable
    assert s.spec_reach()["reached"] and w.inspector.go_target.isEnabled()


def test_each_family_names_its_own_map(qtbot, window, tmp_path):
    named = {f: FAMILIES[f].map_name for f in FAMILIES}
    assert all(named[f] for f in ("lut", "nb", "logistic", "tree"))
    assert len({named[f] for f in ("lut", "nb", "logistic", "tree")}) == 4
    assert all(named[f] is None for f in ("constant", "mlp", "memorize"))
    assert "weights" not in MAP_KINDS["native"]
    w, s = window, window.session
    assert w.open_path(noisy_folder(tmp_path / "a"))
    climb(qtbot, w)
    combo = w.inspector.kind
    for key in ("tree-2", "lut-1"):
        s.select(key)
        r = s.selected
        assert combo.itemText(combo.findData("native")) == named[r.family] == map_name(r, "native")
        assert named[r.family] in w.inspector.map_caption.text()
        # one-signed importances get the sequential colour bar from 0
        assert w.inspector.pixmap.bar.levels()[0] == 0.0
    s.select("constant-0")
    values, caption = s.heatmap()
    assert values is None and "no per-pixel map of its own" in caption and "model's" not in caption
    assert combo.itemText(combo.findData("native")) == "no map of its own"


def test_rung_titles_and_sizes_read_as_words():
    assert FAMILIES["tree"].title(4) == "decision tree of depth 4"
    assert FAMILIES["lut"].size_text(1) == "1 pixel" and FAMILIES["lut"].size_text(3) == "3 pixels"
    assert FAMILIES["mlp"].size_text(1) == "1 hidden unit" and FAMILIES["constant"].size_text(0) == ""


def test_save_dialogs_start_in_the_last_folder_never_a_demo_folder(window, tmp_path, monkeypatch):
    from pixelfit.demo import demo_folders

    w = window
    docs = QtCore.QStandardPaths.writableLocation(QtCore.QStandardPaths.StandardLocation.DocumentsLocation)
    first = w.save_dir()
    assert first in (docs, str(Path.home()))
    w.settings.setValue(SAVE_DIR_KEY, str(demo_folders()[1]))  # the source tree's demo sets
    assert w.save_dir() == first
    w.settings.setValue(SAVE_DIR_KEY, str(tmp_path))
    assert w.save_dir() == str(tmp_path.resolve())
    monkeypatch.setattr(QtWidgets.QFileDialog, "getSaveFileName", lambda *a, **k: (str(tmp_path / "x" / "r.json"), ""))
    w._ask_save_path("t", "r.json", "")
    assert w.settings.value(SAVE_DIR_KEY) == str((tmp_path / "x").resolve())


def test_legend_sits_beside_the_plot_and_switches_curves(qtbot, window, tmp_path):
    w = window
    assert w.open_path(noisy_folder(tmp_path / "a"))
    climb(qtbot, w)
    plot = w.error_plot
    vb = plot.getPlotItem().getViewBox()
    assert plot.legend.sceneBoundingRect().left() >= vb.sceneBoundingRect().right() - 1  # a pen's width at most
    plot.set_shown({"tree", "bound"})
    assert not plot._curves[("tree", "cv")].isVisible() and not plot._curves[("lut", "bound")].isVisible()
    assert plot._curves[("lut", "cv")].isVisible()
    entry = plot._family_entries["lut"]
    plot._legend_clicked(entry)
    assert not plot._curves[("lut", "train")].isVisible()
    plot.set_shown(set())
    assert all(c.isVisible() for c in plot._curves.values())


def test_time_left_comes_from_the_finished_steps():
    s = Session()
    s.running, s._run_started = True, 100.0
    s.progress_state = (4, 10, "")
    assert s.time_left(now=120.0) == pytest.approx(30.0)  # 5 s a step, 6 steps left
    s.progress_state = (0, 10, "")
    assert s.time_left(now=120.0) is None
    assert [duration_text(x) for x in (42, 185, 4300)] == ["42 s", "3 min", "1 h 12 min"]


def test_plan_says_what_each_size_counts(window, tmp_path):
    s = window.session
    assert window.open_path(noisy_folder(tmp_path / "a"))
    s.set_ladder(families=["constant", "lut", "tree"], max_size=3)
    assert s.plan_text() == "7 rungs to train: constant; lut 1, 2, 3 pixels; tree depth 1, 2, 3"
    assert window.climb.plan_label.text() == s.plan_text()


def test_colour_scales_follow_the_sign_of_the_map():
    assert one_signed(np.array([0.0, 2.0])) and not one_signed(np.array([-1.0, 2.0]))
    seq = colorize_sequential(np.array([[0.0, 1.0, 2.0]]))
    assert tuple(seq[0, 0]) == SEQUENTIAL_STOPS[0][1] and tuple(seq[0, 2]) == SEQUENTIAL_STOPS[-1][1]
    div = colorize(np.array([[-2.0, 0.0, 2.0]]))
    assert tuple(div[0, 1]) == SEQUENTIAL_STOPS[0][1]  # 0 is the light middle of the diverging ramp


def test_bit_tiles_are_framed():
    tile = side_by_side(np.zeros((4, 4), np.uint8), np.ones((4, 4), bool), scale=3, gap=2)
    bits = tile[:, 14:]
    assert bits.shape == (12, 12) and (bits[[0, -1], :] < 255).all() and (bits[:, [0, -1]] < 255).all()
    assert (bits[1:-1, 1:-1] == 255).all()


def test_threshold_line_drops_its_drag_colour(window):
    line = window.prep_panel.line
    line.setMouseHover(True)
    assert line.currentPen is line.hoverPen
    line.sigPositionChangeFinished.emit(line)
    assert line.currentPen is line.pen


def test_miss_thumbnails_show_the_bits_and_the_score(qtbot, window, tmp_path):
    w, s = window, window.session
    assert w.open_path(noisy_folder(tmp_path / "a"))
    climb(qtbot, w)
    s.select("lut-1")
    qtbot.wait(50)
    lst = w.inspector.fp_list if w.inspector.fp_list.count() else w.inspector.fn_list
    assert lst.count()
    h, wd = s.run_prep.shape
    assert lst.iconSize().width() == 2 * wd * 3 + 2
    item = lst.item(0)
    row = item.data(QtCore.Qt.ItemDataRole.UserRole)
    score = s.selected.test_scores[int(np.searchsorted(np.flatnonzero(s.run_prep.test_mask), row))]
    assert s.dataset.names[row] in item.toolTip() and f"score {score:.3f}" in item.toolTip()
