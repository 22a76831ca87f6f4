"""The window's explanation of a call, its comparison of two rungs, and the rough edges of round two,
driven offscreen with pytest-qt; assertions are on the session's facts and the rule they come from."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("pytestqt")
from conftest import write_class_folders  # noqa: E402

from pixelfit.app._qt import QtCore  # noqa: E402  (before any widget is built)
from pixelfit.app.main_window import MainWindow  # noqa: E402
from pixelfit.app.session import Session  # noqa: E402
from pixelfit.app.widgets.explain_view import MAX_COMPARE_THUMBS  # noqa: E402
from pixelfit.cli import build_parser, main  # noqa: E402

LEFT = QtCore.Qt.MouseButton.LeftButton
CTRL = QtCore.Qt.KeyboardModifier.ControlModifier


@pytest.fixture
def window(qtbot, tmp_path):
    settings = QtCore.QSettings(str(tmp_path / "settings.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=lambda *a: True)
    w.show()
    yield w
    w.stop_worker()
    w.close()
    w.deleteLater()


@pytest.fixture
def noisy_folder(tmp_path, rng):
    """8x8 noise; the positives carry a bright spot, and a fifth of the labels are flipped, so every
    rung makes mistakes of both kinds."""
    n = 240
    imgs = (rng.random((n, 8, 8)) * 120).astype(np.uint8)
    spot = rng.random(n) < 0.4
    imgs[spot, 3:5, 3:5] = 220
    flip = rng.random(n) < 0.2
    labels = np.where(spot ^ flip, "spot", "blank")
    return write_class_folders(tmp_path / "noisy", imgs, labels)


def climb(qtbot, w: MainWindow, families, max_size, folds) -> None:
    panel = w.climb
    for name, cb in panel.checks.items():
        cb.setChecked(name in families)
    panel.max_size.setValue(max_size or 0)
    panel.folds.setValue(folds)
    w.act_climb.trigger()
    qtbot.waitUntil(lambda: not w.session.running, timeout=90_000)


def _click_item(qtbot, lst, item, modifier=QtCore.Qt.KeyboardModifier.NoModifier):
    lst.scrollToItem(item)
    qtbot.mouseClick(lst.viewport(), LEFT, modifier, lst.visualItemRect(item).center())


def test_inspector_is_empty_until_a_rung_is_chosen_and_its_map_fits_the_patch(qtbot, window, noisy_folder):
    w, s = window, window.session
    assert w.inspector.pages.currentIndex() == 0  # the plain empty state, no empty axes
    assert w.open_path(noisy_folder)
    # The import report names the folder; the full path is only a tooltip.
    assert f"<b>{noisy_folder.name}</b>" in w.report.summary.text()
    assert str(noisy_folder) not in w.report.summary.text()
    assert w.report.summary.toolTip() == str(noisy_folder)
    climb(qtbot, w, ["constant", "lut"], 2, 2)
    s.select("lut-2")
    assert w.inspector.pages.currentIndex() == 1
    vb = w.inspector.pixmap.plot.getViewBox()
    assert vb.viewRange() == [[0.0, 8.0], [0.0, 8.0]]  # the patch and nothing else, row 0 at the top
    assert vb.yInverted()
    g = vb.geometry()
    assert abs(g.width() - g.height()) < 1.0  # square pixels on an 8x8 patch
    ticks = w.inspector.pixmap.plot.getAxis("left")._tickLevels[0]
    assert [t for t, _ in ticks] == [r + 0.5 for r in range(8)] and [lab for _, lab in ticks] == [str(r) for r in range(8)]
    s.select(None)
    assert w.inspector.pages.currentIndex() == 0


def test_clicking_a_false_positive_explains_it_with_the_rules_own_facts(qtbot, window, noisy_folder):
    w, s = window, window.session
    assert w.open_path(noisy_folder)
    climb(qtbot, w, ["constant", "lut", "tree"], 3, 2)
    s.select("lut-3")
    fp, _ = s.misses()
    assert len(fp)
    qtbot.waitUntil(lambda: w.inspector.fp_list.count() == min(len(fp), 48))  # drawn on the next turn
    item = w.inspector.fp_list.item(0)
    row = item.data(QtCore.Qt.ItemDataRole.UserRole)
    _click_item(qtbot, w.inspector.fp_list, item)
    qtbot.waitUntil(lambda: w.explain_view.isVisible())
    e = s.explanation
    assert e is not None and e["row"] == row
    rule = s.rule_of(s.selected)  # the rung as its rule file loads
    bits = rule.binarize(s.run_prep.dataset.images[row : row + 1])[0]
    pixels = [r * rule.shape[1] + c for r, c in rule.doc["model"]["pixels"]]
    code = sum(int(bits[p]) << j for j, p in enumerate(pixels))  # bit j = the j-th listed pixel
    assert e["why"]["code"] == code
    assert e["bits"] == bits.reshape(rule.shape).astype(int).tolist()
    # A false positive: called positive (score above the threshold), labelled negative.
    assert e["positive"] and e["score"] > e["threshold"] == s.threshold and e["label"] != s.run_prep.positive
    assert e["why"]["row"]["score"] == pytest.approx(float(rule.doc["model"]["scores"][code]))
    assert f"pattern code {code}:" in w.explain_view.why.toPlainText()
    assert w.explain_view.picture.pixmap() is not None and not w.explain_view.picture.pixmap().isNull()

    # The patch gallery's tiles explain too (a training patch here, by the same call).
    w.tabs.setCurrentWidget(w.gallery)
    index = w.gallery.model.index(5)
    qtbot.mouseClick(w.gallery.view.viewport(), LEFT, pos=w.gallery.view.visualRect(index).center())
    assert s.explanation["row"] == int(w.gallery.model.rows[5])


def test_ctrl_click_compares_two_rungs_and_mcnemar_is_statsmodels(qtbot, window, noisy_folder):
    # Reference: statsmodels.stats.contingency_tables.mcnemar(table, exact=True) on the 2x2 table of
    # (first rung right?, second rung right?) over the held-out patches.
    from statsmodels.stats.contingency_tables import mcnemar

    w, s = window, window.session
    assert w.open_path(noisy_folder)
    climb(qtbot, w, ["constant", "lut", "tree"], 3, 2)
    s.select("lut-1")
    rows = w.table.table_model.rows
    target = next(i for i, r in enumerate(rows) if r.key == "tree-3")
    rect = w.table.visualRect(w.table.table_model.index(target, 0))
    qtbot.mouseClick(w.table.viewport(), LEFT, CTRL, rect.center())
    assert s.selected.key == "lut-1"  # Ctrl+click keeps the selection
    assert s.compared == ("lut-1", "tree-3")
    qtbot.waitUntil(lambda: w.compare_view.isVisible())
    c = s.comparison()
    y = s.run_prep.y_test
    ra = s.rung("lut-1").test_scores > s.threshold
    rb = s.rung("tree-3").test_scores > 0.5
    right_a, right_b = ra == y, rb == y
    table = np.array([[np.sum(right_a & right_b), np.sum(right_a & ~right_b)],
                      [np.sum(~right_a & right_b), np.sum(~right_a & ~right_b)]])
    ref = mcnemar(table, exact=True)
    assert (c["mcnemar"]["b"], c["mcnemar"]["c"]) == (table[0, 1], table[1, 0])
    assert c["mcnemar"]["p_value"] == pytest.approx(float(ref.pvalue))
    assert w.compare_view.a_list.count() == min(table[0, 1], MAX_COMPARE_THUMBS)
    assert w.compare_view.b_list.count() == min(table[1, 0], MAX_COMPARE_THUMBS)
    assert f"p = {c['mcnemar']['p_value']:.4g}" in w.compare_view.test.text()
    assert c["a"]["tp"] == int(np.sum(ra & y)) and c["b"]["fp"] == int(np.sum(rb & ~y))


def test_window_and_command_line_share_their_defaults():
    args = build_parser().parse_args(["fit", "bottle-caps", "--out", "x"])
    s = Session()
    assert (s.max_size, s.folds) == (args.max_size, args.folds)


def test_window_and_command_line_agree_on_a_demo_set(qtbot, window, tmp_path):
    """The same settings give the same recommended rung and the same figures in both."""
    from pixelfit.demo import resolve_dataset_path

    w, s = window, window.session
    source = resolve_dataset_path("solder-bridges")
    assert w.open_path(source)
    climb(qtbot, w, ["constant", "lut", "tree"], 2, 3)
    out = tmp_path / "cli"
    assert main(["fit", str(source), "--out", str(out), "--families", "constant,lut,tree", "--max-size", "2",
                 "--folds", "3", "--bias-variance", "0"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert [f"{r['family']}-{r['size']}" for r in summary["rungs"]] == [r.key for r in s.rungs]
    rec = summary["recommended"]
    assert f"{rec['family']}-{rec['size']}" == s.recommended.key
    for entry, rung in zip(summary["rungs"], s.rungs):
        for part in ("train", "test"):
            for k in ("tp", "fp", "fn", "tn", "precision", "recall", "f1"):
                assert entry[part][k] == getattr(rung, part)[k], (rung.key, part, k)
        assert entry["cv"]["f1_mean"] == pytest.approx(rung.cv["f1_mean"], abs=1e-12)
    assert Path(summary["dataset"]["source"]).name == Path(s.run_prep.dataset.source).name


class _CtrlClick:
    """A click on the plot's points with Ctrl held (the shape of pyqtgraph's click event we read)."""

    def __init__(self, at):
        self._at = at

    def scenePos(self):
        return self._at

    def modifiers(self):
        return CTRL


def test_ctrl_click_in_the_plot_picks_the_second_rung(qtbot, window, noisy_folder):
    w, s = window, window.session
    assert w.open_path(noisy_folder)
    climb(qtbot, w, ["constant", "lut", "tree"], 2, 2)
    s.select("lut-2")
    plot = w.error_plot
    qtbot.waitUntil(lambda: len(plot.points.points()) == len(s.rungs))
    spots = {p.data(): p for p in plot.points.points()}
    at = plot.getPlotItem().getViewBox().mapViewToScene(spots["tree-1"].pos())
    plot.points.sigClicked.emit(plot.points, [spots["tree-1"]], _CtrlClick(at))
    assert s.selected.key == "lut-2" and s.compared == ("lut-2", "tree-1")
    assert s.comparison()["rung_b"] == "tree-1"
