"""Will it hold up? The measured bias and variance against size, and the learning curves."""

from __future__ import annotations

import numpy as np

from pixelfit.app._qt import QtCore, QtWidgets, pg
from pixelfit.app.session import Session, axis_position
from pixelfit.app.widgets import Listens, Throttled
from pixelfit.app.widgets.ladder_view import FAMILY_RGB

#: Pen style of each part of the decomposition.
PART_STYLE = {"loss": QtCore.Qt.PenStyle.SolidLine, "bias": QtCore.Qt.PenStyle.DashLine,
              "variance": QtCore.Qt.PenStyle.DotLine}
PART_LABEL = {"loss": "held-out loss", "bias": "bias", "variance": "variance"}
#: Colours of the rungs of a learning curve: smaller, center, larger.
CURVE_RGB = [(46, 92, 160), (214, 120, 16), (40, 150, 70)]


def _plot(widget: pg.PlotWidget, left: str, bottom: str) -> pg.PlotItem:
    widget.setMenuEnabled(False)
    widget.hideButtons()
    pi = widget.getPlotItem()
    pi.setLabel("left", left)
    pi.setLabel("bottom", bottom)
    pi.getAxis("left").enableAutoSIPrefix(False)
    pi.showGrid(x=True, y=True, alpha=0.25)
    return pi


class DecompositionPlot(Listens, pg.PlotWidget):
    """Held-out loss, bias and variance against size: one colour per family, one line style per part."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        pi = _plot(self, "share of held-out patches", "size (log2 spacing)")
        self.legend = pi.addLegend(offset=(-10, 10), labelTextSize="8pt", colCount=2)
        for part, style in PART_STYLE.items():
            self.legend.addItem(pg.PlotCurveItem(pen=pg.mkPen((0, 0, 0), width=1.5, style=style)), PART_LABEL[part])
        self.curves: dict[tuple[str, str], pg.PlotDataItem] = {}
        self.note = pg.TextItem("", color=(90, 90, 90), anchor=(0, 0))
        pi.addItem(self.note)
        self._redraw_later = Throttled(self.redraw, 200, self)
        self.listen(session, "checks", self._redraw_later.request)
        self.redraw()

    def redraw(self) -> None:
        curves = self.session.decomposition_curves()
        seen = set()
        for fam, pts in curves.items():
            pts = sorted(pts, key=lambda p: p[0])
            x = [axis_position(float(s)) for s, _ in pts]
            for part, style in PART_STYLE.items():
                item = self.curves.get((fam, part))
                if item is None:
                    rgb = FAMILY_RGB.get(fam, (0, 0, 0))
                    item = pg.PlotDataItem(pen=pg.mkPen(rgb, width=2 if part == "loss" else 1.5, style=style),
                                           symbol="o", symbolSize=5, symbolBrush=rgb, symbolPen=None)
                    self.getPlotItem().addItem(item)
                    if part == "loss":
                        self.legend.addItem(item, fam)
                    self.curves[(fam, part)] = item
                item.setData(x, [bv[part] for _, bv in pts])
                seen.add((fam, part))
        for key in [k for k in self.curves if k not in seen]:
            item = self.curves.pop(key)
            if key[1] == "loss":
                self.legend.removeItem(item)
            self.getPlotItem().removeItem(item)
        self.note.setText("" if curves else "bias and variance appear here after a climb "
                                            "(bootstrap replicates of each rung)")


class LearningCurvePlot(Listens, pg.PlotWidget):
    """CV error (with one standard deviation) and held-out error against the share of training data."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        pi = _plot(self, "error rate", "share of the training part")
        self.legend = pi.addLegend(offset=(-10, 10), labelTextSize="8pt")
        self.items: list = []
        self.verdicts = QtWidgets.QLabel("")
        self.verdicts.setWordWrap(True)
        self._redraw_later = Throttled(self.redraw, 200, self)
        self.listen(session, "checks", self._redraw_later.request)
        self.redraw()

    def redraw(self) -> None:
        pi = self.getPlotItem()
        for item in self.items:
            if isinstance(item, pg.PlotDataItem) and item.name():
                self.legend.removeItem(item)
            pi.removeItem(item)
        self.items = []
        curve = self.session.learning_curve
        if not curve:
            self.verdicts.setText("Learning curves of the recommended rung and its neighbours appear here "
                                  "after a climb with cross-validation.")
            return
        lines = []
        for i, key in enumerate(curve["rungs"]):
            rgb = CURVE_RGB[i % len(CURVE_RGB)]
            pts = [p for p in curve["points"] if p["rung"] == key]
            x = [p["fraction"] for p in pts if p["cv_error"] is not None]
            y = [p["cv_error"] for p in pts if p["cv_error"] is not None]
            cv = pg.PlotDataItem(x, y, pen=pg.mkPen(rgb, width=2), symbol="o", symbolSize=6, symbolBrush=rgb,
                                 name=f"{key} CV")
            sd = [p["cv_error_std"] or 0.0 for p in pts if p["cv_error"] is not None]
            bars = pg.ErrorBarItem(x=np.asarray(x), y=np.asarray(y), height=2 * np.asarray(sd),
                                   beam=0.015, pen=pg.mkPen(rgb))
            tx = [p["fraction"] for p in pts if p["test_error"] is not None]
            ty = [p["test_error"] for p in pts if p["test_error"] is not None]
            test = pg.PlotDataItem(tx, ty, pen=pg.mkPen(rgb, width=1.5, style=QtCore.Qt.PenStyle.DotLine),
                                   name=f"{key} held-out")
            for item in (cv, bars, test):
                pi.addItem(item)
                self.items.append(item)
            lines.append(f"<b>{key}</b>: {curve['verdict'].get(key, '')}")
        self.verdicts.setText("<br>".join(lines))


class ChecksView(QtWidgets.QWidget):
    """The tab of both plots, with the learning-curve verdicts under them."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.decomposition = DecompositionPlot(session)
        self.learning = LearningCurvePlot(session)
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(2, 2, 2, 2)
        lay.addWidget(QtWidgets.QLabel("Bias and variance of the 0-1 loss on held-out patches, "
                                       "from bootstrap replicates of each rung"))
        lay.addWidget(self.decomposition, 1)
        lay.addWidget(QtWidgets.QLabel("Learning curves: would more data help?"))
        lay.addWidget(self.learning, 1)
        lay.addWidget(self.learning.verdicts)

    def detach(self) -> None:
        self.decomposition.detach()
        self.learning.detach()
