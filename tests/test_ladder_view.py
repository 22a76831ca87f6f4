"""The ladder plot and rung table of the window: the x axis, coincident rungs, clicks, beam marks.

Rungs are trained here with the core's own ``train_rung`` (no trainer process) on patches
generated in the test; assertions are on the session and the plot's data, not on pixels.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("pytestqt")
from pixelfit.app._qt import QtCore  # noqa: E402  (before any widget is built)
from pixelfit.app.session import (  # noqa: E402
    COINCIDENT_OFFSET,
    LADDER_AXES,
    Session,
    axis_position,
)
from pixelfit.app.widgets.ladder_view import AxisChooser, ErrorPlot, LadderTable  # noqa: E402
from pixelfit.ladder import train_rung  # noqa: E402


def _session(tmp_path, side: int, families: list[str], plan: list[tuple[str, int]] | None = None,
             folds: int = 2) -> Session:
    rng = np.random.default_rng(7)
    imgs = rng.integers(0, 256, (160, side, side), dtype=np.uint8)
    labels = np.where((imgs[:, 1, 1] > 127) & (imgs[:, 2, 3] > 100), "hit", "miss")
    path = tmp_path / f"p{side}.npz"
    np.savez(path, images=imgs, labels=labels)
    s = Session()
    assert s.open(path)
    s.set_ladder(families=families, max_size=3, folds=folds)
    spec = s.start_run()
    for family, size in plan or spec.plan:
        s.add_rung(train_rung(spec.prep, family, size, spec.folds, spec.seed))
    s.end_run("finished")
    return s


@pytest.fixture
def session(tmp_path):
    return _session(tmp_path, 6, ["constant", "lut", "tree"])


def test_positions_follow_the_chosen_axis_and_spread_coincident_rungs(session):
    s = session
    n = s.run_prep.n_pixels
    for axis in LADDER_AXES:
        s.set_ladder_axis(axis)
        pos = s.ladder_positions()
        assert set(pos) == {r.key for r in s.rungs}
        for r in s.rungs:
            expect = {"pixels": n if r.pixels is None else len(r.pixels), "parameters": r.figures["parameters"],
                      "flash": r.cost["flash_bytes"]}[axis]
            assert pos[r.key][0] == expect
        # No two rungs share a position; rungs of one value sit side by side around it.
        xs = [x for _, x in pos.values()]
        assert len(set(xs)) == len(xs)
        groups: dict[float, list[float]] = {}
        for v, x in pos.values():
            groups.setdefault(v, []).append(x)
        for v, members in groups.items():
            assert np.mean(members) == pytest.approx(axis_position(v))
            if len(members) > 1:
                assert np.diff(sorted(members)) == pytest.approx([COINCIDENT_OFFSET] * (len(members) - 1))
    # lut-1 and tree-1 both read one pixel: once one x position, now apart.
    s.set_ladder_axis("pixels")
    pos = s.ladder_positions()
    assert pos["lut-1"][0] == pos["tree-1"][0] == 1.0 and pos["lut-1"][1] != pos["tree-1"][1]
    with pytest.raises(KeyError):
        s.set_ladder_axis("furlongs")


def test_the_axis_of_the_plot_is_the_sessions(qtbot, session):
    s = session
    plot = ErrorPlot(s)
    chooser = AxisChooser(s)
    qtbot.addWidget(plot)
    qtbot.addWidget(chooser)
    plot.resize(640, 380)
    plot.show()
    qtbot.waitExposed(plot)
    assert [chooser.itemData(i) for i in range(chooser.count())] == list(LADDER_AXES)
    for axis in ("parameters", "pixels"):
        chooser.setCurrentIndex(chooser.findData(axis))
        assert s.ladder_axis == axis
        pos = s.ladder_positions()
        drawn = {p.data(): p.pos().x() for p in plot.points.points()}
        assert drawn == pytest.approx({k: x for k, (_, x) in pos.items()})
        assert LADDER_AXES[axis][0] in plot.getPlotItem().getAxis("bottom").labelText
    s.set_ladder_axis("parameters")
    assert chooser.currentData() == "parameters"
    plot.detach()
    chooser.detach()


class _Click:
    def __init__(self, at):
        self._at = at

    def scenePos(self):
        return self._at


def test_a_click_selects_the_nearest_point(qtbot, session):
    s = session
    plot = ErrorPlot(s)
    qtbot.addWidget(plot)
    plot.resize(640, 380)
    plot.show()
    qtbot.waitExposed(plot)
    s.set_ladder_axis("pixels")
    spots = {p.data(): p for p in plot.points.points()}
    vb = plot.getPlotItem().getViewBox()
    for wanted, other in (("tree-1", "lut-1"), ("lut-1", "tree-1")):
        at = vb.mapViewToScene(spots[wanted].pos()) + QtCore.QPointF(1.0, 0.5)
        # Both points are under the cursor (the item reports them in any order): the nearer wins.
        plot.points.sigClicked.emit(plot.points, [spots[other], spots[wanted]], _Click(at))
        assert s.selected.key == wanted
    plot.detach()


def test_window_table_marks_beam_rungs(qtbot, tmp_path, monkeypatch):
    # A search estimated over this many seconds becomes a beam: 0.05 s lets lut-1 be exhaustive
    # and leaves lut-4 (C(144, 4) = 17,610,000 pixel sets) to the beam.
    from pixelfit.models import lut_engine

    monkeypatch.setattr(lut_engine, "EXHAUSTIVE_SECONDS", 0.05)
    s = _session(tmp_path, 12, ["lut"], plan=[("lut", 1), ("lut", 4)], folds=0)
    assert [r.search["method"] for r in s.rungs] == ["exhaustive", "beam"]
    table = LadderTable(s)
    qtbot.addWidget(table)
    model = table.table_model
    names = [model.item(i, 0).text() for i in range(model.rowCount())]
    assert names == ["lut-1", "lut-4 (beam)"]
    assert "beam search" in model.item(1, 0).toolTip() and "beam search" not in model.item(0, 0).toolTip()
    table.detach()
