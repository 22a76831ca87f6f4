"""The window's views of the checks after the ladder, driven offscreen with pytest-qt."""
from __future__ import annotations

import os

import pytest

pytest.importorskip("pytestqt")

from pixelfit.app._qt import QtCore  # noqa: E402  (before any widget is built)
from pixelfit.app.main_window import MainWindow  # noqa: E402


@pytest.fixture
def window(qtbot, tmp_path):
    settings = QtCore.QSettings(str(tmp_path / "settings.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=lambda *_: True)
    w.show()
    yield w
    w.stop_worker()
    w.close()
    assert w.worker is None and not w.session.running
    w.deleteLater()


def test_climb_shows_bias_variance_learning_curve_and_stress(qtbot, window, class_folder, tmp_path):
    w, s = window, window.session
    assert w.open_path(class_folder)
    s.replicates = 3
    s.set_ladder(families=["constant", "lut", "tree"], max_size=3, folds=3)
    assert w.start_climb()
    qtbot.waitUntil(lambda: not s.running, timeout=90_000)
    assert s.checks is not None
    # bias and variance: one curve per family and part, from the session's data
    dec = w.checks_view.decomposition
    qtbot.waitUntil(lambda: ("tree", "variance") in dec.curves, timeout=5_000)
    tree = [bv for _, bv in sorted(s.decomposition_curves()["tree"], key=lambda p: p[0])]
    _, ys = dec.curves[("tree", "variance")].getData()
    assert list(ys) == [bv["variance"] for bv in tree]
    assert s.decomposition_curves()["constant"][0][1]["variance"] == 0.0
    # learning curve: the recommended rung and its neighbours, with their verdicts
    lc = s.learning_curve
    assert s.recommended.key in lc["rungs"] and len(lc["rungs"]) == 3
    qtbot.waitUntil(lambda: all(k in w.checks_view.learning.verdicts.text() for k in lc["rungs"]), timeout=5_000)
    # stress in the inspector: one column per perturbation of the selected rung
    s.select("lut-2")
    st = s.rung_checks("lut-2")["stress"]
    table = w.inspector.stress.table
    names = [table.horizontalHeaderItem(j).text() for j in range(table.columnCount())]
    assert names == [n for n in st if n != "worst"]
    assert table.item(0, 0).text() == f"{st[names[0]]['f1']:.3f}"
    assert st["worst"]["name"] in w.inspector.stress.caption.text()
    # the rule file saved from the window carries the same figures
    path = s.save_selected(tmp_path / "lut-2.json")
    from pixelfit.rulefile import load_rule

    assert load_rule(path).doc["stress"] == st
    if os.environ.get("PIXELFIT_SHOTS"):  # look at the views: PIXELFIT_SHOTS=folder
        out = os.environ["PIXELFIT_SHOTS"]
        w.tabs.setCurrentWidget(w.checks_view)
        qtbot.wait(300)
        w.grab().save(os.path.join(out, "window-checks.png"))
        w.inspector.grab().save(os.path.join(out, "inspector-stress.png"))
