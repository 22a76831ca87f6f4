"""Pixel prep: how grey patches become bits, with the grey-level histogram and the threshold."""

from __future__ import annotations

import numpy as np

from pixelfit.app._qt import QtWidgets, pg
from pixelfit.app.session import Session
from pixelfit.app.widgets import Listens

#: (method, label) in the order offered.
METHOD_LABELS = (("otsu", "Otsu over the training set"), ("fixed", "fixed grey level"),
                 ("otsu-patch", "Otsu per patch"), ("mean-patch", "mean per patch"))


class PixelPrep(Listens, QtWidgets.QGroupBox):
    """Binarization controls and the histogram of training grey levels with the threshold(s)."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__("Pixel prep", parent)
        self.session = session
        self.method = QtWidgets.QComboBox()
        for m, label in METHOD_LABELS:
            self.method.addItem(label, m)
        self.level = QtWidgets.QSpinBox()
        self.level.setRange(0, 256)
        self.level.setValue(128)
        self.level.setToolTip("A pixel is 1 when its grey value is at least this level")
        self.invert = QtWidgets.QCheckBox("dark objects (invert bits)")
        self.hist = pg.PlotWidget()
        self.hist.setMinimumHeight(110)
        self.hist.setMaximumHeight(150)
        self.hist.setMenuEnabled(False)
        self.hist.setMouseEnabled(x=False, y=False)
        self.hist.hideButtons()
        self.hist.getPlotItem().setLabel("bottom", "grey level (training pixels)")
        self.hist.getPlotItem().getAxis("left").setStyle(showValues=False)
        self.counts_curve = pg.PlotDataItem(stepMode="center", fillLevel=0, brush=(120, 120, 120, 120),
                                            pen=pg.mkPen((80, 80, 80)))
        self.patch_curve = pg.PlotDataItem(stepMode="center", pen=pg.mkPen((214, 120, 16), width=2))
        self.line = pg.InfiniteLine(angle=90, movable=False, pen=pg.mkPen((46, 92, 160), width=2),
                                    hoverPen=pg.mkPen((214, 120, 16), width=3))
        for item in (self.counts_curve, self.patch_curve, self.line):
            self.hist.addItem(item)
        self.hist.setXRange(0, 256, padding=0.01)
        self.caption = QtWidgets.QLabel("")
        self.caption.setWordWrap(True)
        lay = QtWidgets.QFormLayout(self)
        lay.addRow("method", self.method)
        lay.addRow("level", self.level)
        lay.addRow(self.invert)
        lay.addRow(self.hist)
        lay.addRow(self.caption)
        self.method.activated.connect(self._write_back)
        self.level.valueChanged.connect(self._write_back)
        self.invert.toggled.connect(self._write_back)
        self.line.sigPositionChanged.connect(self._line_moved)
        self.line.sigPositionChangeFinished.connect(self._line_released)
        self.listen(session, "prep", self.refresh)
        # A run starting or ending only locks or frees the controls: the histogram stays as it is.
        self.listen(session, "run", self._enable)
        self.listen(session, "busy", self._enable)
        self.refresh()

    def _write_back(self, *_):
        method = self.method.currentData()
        self.session.set_binarizer(method, float(self.level.value()) if method == "fixed" else None,
                                   self.invert.isChecked())

    def _line_moved(self, line) -> None:
        if self.method.currentData() == "fixed":
            level = int(round(line.value()))
            if level != self.level.value():
                self.level.setValue(max(0, min(256, level)))  # writes back through valueChanged

    def _line_released(self, line) -> None:
        """The drag ended: back to the line's own colour (the pointer may still be over it,
        and offscreen or after a rebuild no hover-leave comes to reset it)."""
        line.setMouseHover(False)

    def _enable(self) -> None:
        s = self.session
        fixed = s.binarizer.method == "fixed"
        idle = not s.running and not s.preparing
        for w in (self.method, self.level, self.invert):
            w.setEnabled(idle and (w is not self.level or fixed))
        self.line.setMovable(fixed and idle)

    def refresh(self) -> None:
        s = self.session
        b = s.binarizer
        for w in (self.method, self.level, self.invert):
            w.blockSignals(True)
        self.method.setCurrentIndex(self.method.findData(b.method))
        if b.method == "fixed":
            self.level.setValue(int(round(b.threshold)))
        self.invert.setChecked(b.invert)
        for w in (self.method, self.level, self.invert):
            w.blockSignals(False)
        self._enable()
        counts, thresholds = s.histogram()
        edges = np.arange(257, dtype=np.float64)
        self.counts_curve.setData(edges, counts.astype(np.float64))
        self.line.blockSignals(True)
        if thresholds is None:
            self.patch_curve.setData([], [])
            self.line.setVisible(False)
            self.caption.setText("")
        elif len(thresholds) == 1 and b.method in ("fixed", "otsu"):
            self.patch_curve.setData([], [])
            self.line.setVisible(True)
            self.line.setValue(float(thresholds[0]))
            rule = ">=" if b.method == "fixed" else ">"
            drag = "; drag the line to move it" if b.method == "fixed" else ""
            self.caption.setText(f"1 where grey {rule} {thresholds[0]:g}{' (then inverted)' if b.invert else ''}{drag}")
        else:
            per, _ = np.histogram(thresholds, bins=edges)
            top = counts.max() if counts.max() > 0 else 1
            scaled = per * (top / per.max()) if per.max() > 0 else per.astype(np.float64)
            self.patch_curve.setData(edges, scaled.astype(np.float64))
            self.line.setVisible(False)
            self.caption.setText(f"orange: spread of the {len(thresholds)} per-patch thresholds "
                                 f"(median {np.median(thresholds):g})")
        self.line.blockSignals(False)
