"""The ladder: a table of rungs and, above it, error against size for every family."""

from __future__ import annotations

import math

from pixelfit.app._qt import QtCore, QtGui, QtWidgets, pg
from pixelfit.app.session import LADDER_AXES, Session, axis_position, nearest_point
from pixelfit.app.widgets import Listens, Throttled
from pixelfit.errors import PixelfitError
from pixelfit.families import FAMILY_ORDER
from pixelfit.ladder import Rung
from pixelfit.models import BEAM_NOTE, is_beam
from pixelfit.plots import CURVE_LABELS as KIND_LABEL
from pixelfit.plots import FAMILY_RGB
from pixelfit.text import COLUMNS, rung_cells

#: Pen style of each curve kind (pixelfit.plots.CURVE_DASHES draws the same in ladder.png).
KIND_STYLE = {"train": QtCore.Qt.PenStyle.DashLine, "cv": QtCore.Qt.PenStyle.SolidLine,
              "test": QtCore.Qt.PenStyle.DotLine, "bound": QtCore.Qt.PenStyle.DashDotLine}
#: Least time between two redraws of the error plot, and between two fits of the table's column
#: widths to their contents, while rungs arrive; see benchmarks/bench_gui_stall.py.
PLOT_INTERVAL_MS = 500
COLUMN_FIT_INTERVAL_MS = 1000
#: Pixels for the error-rate tick labels ("0.05" ... "1.0") beside the axis title.
LEFT_AXIS_WIDTH = 46


def _cells(r: Rung, shape: tuple[int, int]) -> list[str]:
    """The row of a rung: the same columns as the command line's table (pixelfit.text.COLUMNS)."""
    cells = rung_cells(r.summary(shape))
    cells[0] = ("★ " if r.recommended else "") + cells[0]
    return cells


def _tooltip(r: Rung) -> str:
    lines = list(r.notes)
    if is_beam(r.search):
        lines.append(BEAM_NOTE)
    vs = r.versus_smaller
    if vs:
        verdict = "significantly better" if vs["significant"] else "not significantly better"
        lines.append(f"vs {r.family}-{vs['size']}: {verdict} on held-out patches (McNemar p = {vs['p_value']:.3g})")
    return "\n".join(lines)


def _row_look(r: Rung, shape: tuple[int, int], answer: str | None = None) -> tuple[tuple[str, ...], bool, str]:
    """Everything a rung's row shows: the cell texts, the recommended mark, the tooltip.

    ``answer`` is the key of the rung that answers the spec: its name is marked ◆.
    """
    cells = _cells(r, shape)
    if r.key == answer:
        cells[0] = "◆ " + cells[0]
    return tuple(cells), bool(r.recommended), _tooltip(r)


class LadderTableModel(QtGui.QStandardItemModel):
    """The rows of ``session.rungs``, written into Qt's own item store.

    Painting a table asks its model for every role of every visible cell; with a Python model
    each of those thousands of calls must take the interpreter lock, and while the ladder worker
    holds it each one waits. Here the cells are written in Python once per change and painted
    from Qt's items without entering Python. :meth:`follow` appends the rows of new rungs and
    rewrites only the rows whose text or marks changed.
    """

    def __init__(self, session: Session, parent=None):
        super().__init__(0, len(COLUMNS), parent)
        for c, col in enumerate(COLUMNS):
            item = QtGui.QStandardItem(col.header)
            item.setToolTip(col.tooltip + ("; ★ marks the recommended rung" if c == 0 else ""))
            self.setHorizontalHeaderItem(c, item)
        self.session = session
        self.rows: list[Rung] = []
        self._looks: list[tuple] = []
        self.follow()

    def reset(self) -> None:
        self.setRowCount(0)
        self.rows, self._looks = [], []
        self.follow()

    def follow(self) -> bool:
        """Catch up with ``session.rungs``; True when that took a reset rather than appended rows."""
        now = self.session.rungs
        # Rungs exist only once the session has prepared its data; the shape names their pixels.
        shape = self.session.prep.shape if self.session.prep is not None else (1, 1)
        if len(now) < len(self.rows) or any(a is not b for a, b in zip(self.rows, now)):
            self.setRowCount(0)
            self.rows, self._looks = [], []
            reset = True
        else:
            reset = False
        answer = (self.session.answer or {}).get("rung")
        for i, r in enumerate(now):
            look = _row_look(r, shape, answer)
            if i == len(self.rows):
                self.appendRow(self._items(r, look))
                self.rows.append(r)
                self._looks.append(look)
            elif look != self._looks[i]:  # the recommended mark or a comparison moved
                for c, item in enumerate(self._items(r, look)):
                    self.setItem(i, c, item)
                self._looks[i] = look
        return reset

    @staticmethod
    def _items(r: Rung, look: tuple) -> list[QtGui.QStandardItem]:
        texts, recommended, tip = look
        items = []
        for c, text in enumerate(texts):
            item = QtGui.QStandardItem(text)
            item.setEditable(False)
            if c == 0:
                item.setForeground(QtGui.QBrush(QtGui.QColor(*FAMILY_RGB.get(r.family, (0, 0, 0)))))
            else:
                item.setTextAlignment(QtCore.Qt.AlignmentFlag.AlignRight | QtCore.Qt.AlignmentFlag.AlignVCenter)
            if recommended:
                font = QtGui.QFont()
                font.setBold(True)
                item.setFont(font)
                item.setBackground(QtGui.QBrush(QtGui.QColor(232, 244, 234)))
            if tip:
                item.setToolTip(tip)
            items.append(item)
        return items


class LadderTable(Listens, QtWidgets.QTableView):
    """The rung table; selecting a row selects the rung everywhere."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.table_model = LadderTableModel(session, self)
        self.setModel(self.table_model)
        self.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectionBehavior.SelectRows)
        self.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.SingleSelection)
        self.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        self.verticalHeader().setVisible(False)
        self.verticalHeader().setDefaultSectionSize(22)
        self.horizontalHeader().setStretchLastSection(True)
        self.setAlternatingRowColors(True)
        self.selectionModel().currentRowChanged.connect(self._row_chosen)
        # Fitting the columns measures every cell's text; once a second is enough while rungs come.
        self._fit_columns = Throttled(self.resizeColumnsToContents, COLUMN_FIT_INTERVAL_MS, self)
        self.listen(session, "rungs", self._rungs_changed)
        self.listen(session, "selection", self._show_selection)
        self.listen(session, "run", self._fit_columns.flush)
        self.resizeColumnsToContents()  # the empty table shows whole column titles

    def mousePressEvent(self, event: QtGui.QMouseEvent) -> None:
        # Ctrl+click picks a second rung to compare with the selected one; the selection stays.
        if event.modifiers() & QtCore.Qt.KeyboardModifier.ControlModifier:
            index = self.indexAt(event.position().toPoint())
            rows = self.table_model.rows
            if index.isValid() and index.row() < len(rows):
                self.session.compare_with(rows[index.row()].key)
            event.accept()
            return
        super().mousePressEvent(event)

    def _row_chosen(self, current: QtCore.QModelIndex, _previous) -> None:
        rows = self.table_model.rows
        if current.isValid() and current.row() < len(rows):
            key = rows[current.row()].key
            if self.session.selected is None or self.session.selected.key != key:
                self.session.select(key)

    def _rungs_changed(self) -> None:
        before = len(self.table_model.rows)
        if self.table_model.follow():
            before = 0
            if not self.table_model.rows:
                self.resizeColumnsToContents()
        self._widen_for(before)
        self._fit_columns.request()
        self._show_selection()

    def _widen_for(self, first_row: int) -> None:
        """Widen at once any column too narrow for the rows from ``first_row`` on, so no cell is
        cut short ("3 …") while the throttled fit of all columns waits its turn."""
        m = self.table_model
        metrics = QtGui.QFontMetrics(self.font())
        bold = QtGui.QFont(self.font())
        bold.setBold(True)
        bold_metrics = QtGui.QFontMetrics(bold)
        for c in range(m.columnCount()):
            need = max(((bold_metrics if m.rows[r].recommended else metrics).horizontalAdvance(m.item(r, c).text())
                        for r in range(first_row, m.rowCount())), default=0) + 14
            if need > self.columnWidth(c):
                self.setColumnWidth(c, need)

    def _show_selection(self) -> None:
        sel = self.session.selected
        sm = self.selectionModel()
        sm.blockSignals(True)
        row = None if sel is None else next((i for i, r in enumerate(self.table_model.rows) if r is sel), None)
        if row is None:  # nothing selected, or the rungs were just cleared and the selection follows
            sm.clearSelection()
        else:
            idx = self.table_model.index(row, 0)
            sm.setCurrentIndex(idx, QtCore.QItemSelectionModel.SelectionFlag.ClearAndSelect
                               | QtCore.QItemSelectionModel.SelectionFlag.Rows)
            self.scrollTo(idx)
        sm.blockSignals(False)
        self.viewport().update()


def _point_error(r: Rung) -> float:
    """Where a rung's clickable point sits: its CV error, or its held-out error without CV."""
    return r.cv["error_mean"] if r.cv else 1 - r.test["accuracy"]


def _kind_error(r: Rung, kind: str) -> float | None:
    """A rung's train, CV or held-out error rate, or its bound (the curves of the plot)."""
    if kind == "train":
        return 1 - r.train["accuracy"]
    if kind == "test":
        return 1 - r.test["accuracy"]
    if kind == "cv":
        return None if r.cv is None else r.cv["error_mean"]
    return None if r.bound is None else r.bound["error_upper"]


def power_of_two_ticks(values: list[float]) -> list[tuple[float, str]]:
    """Ticks of a log2-spaced axis covering ``values``: 0 (left of 1) where present, then powers of two."""
    ticks = [(axis_position(0.0), "0")] if any(v < 1 for v in values) else []
    big = [v for v in values if v >= 1]
    if big:
        lo, hi = math.floor(math.log2(min(big))), math.ceil(math.log2(max(big)))
        step = max(1, math.ceil((hi - lo + 1) / 12))  # at most about a dozen labels
        ticks += [(float(e), f"{2**e:g}") for e in range(lo, hi + 1, step)]
    return ticks


class AxisChooser(Listens, QtWidgets.QComboBox):
    """Chooses the ladder plot's x axis (session.ladder_axis)."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        for name, (label, _) in LADDER_AXES.items():
            self.addItem(label, name)
        self.setToolTip("what the ladder plot puts along its x axis")
        self.currentIndexChanged.connect(lambda i: self.session.set_ladder_axis(self.itemData(i)))
        self.listen(session, "axis", self._show)
        self._show()

    def _show(self) -> None:
        i = self.findData(self.session.ladder_axis)
        if i != self.currentIndex():
            self.blockSignals(True)
            self.setCurrentIndex(i)
            self.blockSignals(False)


class ErrorPlot(Listens, pg.PlotWidget):
    """Error against size, one colour per family and one line style per kind; click a point to select."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.setMenuEnabled(False)
        self.hideButtons()
        pi = self.getPlotItem()
        pi.setLabel("left", "error rate")
        pi.getAxis("left").enableAutoSIPrefix(False)
        # A fixed width for the error-rate ticks: sized to its texts, the axis would lay the plot
        # out again (and paint it once more) whenever the range moves while rungs arrive.
        pi.getAxis("left").setWidth(LEFT_AXIS_WIDTH)
        pi.setLabel("bottom", self._axis_label())
        pi.showGrid(x=True, y=True, alpha=0.25)
        # Each axis draws its ticks and its half of the grid (translucent lines across the whole
        # plot); replayed on every paint that cost about 6 ms per axis. Cached as a pixmap, a
        # paint of the plot takes about 5 ms instead of 11 to 21 (benchmarks/bench_gui_stall.py);
        # the cache is redrawn whenever the axis changes.
        for side in ("left", "bottom"):
            pi.getAxis(side).setCacheMode(QtWidgets.QGraphicsItem.CacheMode.DeviceCoordinateCache)
        # The legend sits beside the plot, never over its curves; clicking an entry shows or hides
        # its curves (a line style: that kind in every family; a family: all its curves).
        self.legend = pg.LegendItem(labelTextSize="8pt", colCount=1, verSpacing=-4)
        pi.layout.addItem(self.legend, 2, 3)
        pi.layout.setColumnStretchFactor(3, 0)
        self.legend.sigSampleClicked.connect(self._legend_clicked)
        self.hidden: set[str] = set()  # families and kinds switched off from the legend
        self._legend_keys: dict[int, str] = {}  # id of a legend sample's item -> the family or kind it stands for
        self._family_entries: dict[str, pg.PlotCurveItem] = {}
        for kind, style in KIND_STYLE.items():  # line style keys, in black, before the family colours
            key_item = pg.PlotCurveItem(pen=pg.mkPen((0, 0, 0), width=1.5, style=style))
            self._legend_keys[id(key_item)] = kind
            self.legend.addItem(key_item, KIND_LABEL[kind])
        self.points = pg.ScatterPlotItem(size=9, hoverable=True, tip=None)
        self.points.sigClicked.connect(self._clicked)
        self.marker = pg.ScatterPlotItem(size=18, symbol="o", pen=pg.mkPen((0, 0, 0), width=2), brush=None)
        # One curve item per (family, kind), made on first use and then only given new data when
        # its data changed: a rung arriving must cost the GUI thread little (see
        # benchmarks/bench_gui_stall.py). Rungs arriving together are drawn together, at most
        # once per PLOT_INTERVAL_MS, and not at all while the plot is hidden behind another tab.
        # Plain curve items: a PlotDataItem would add a scatter child and a wrapper per curve, and
        # every graphics item is Python the GUI thread calls into on each paint.
        self._curves: dict[tuple[str, str], pg.PlotCurveItem] = {}
        self._drawn: dict[object, object] = {}  # what each curve, the points and the axes were last given
        self._stale = False
        self.addItem(self.points)
        self.addItem(self.marker)
        self._redraw_later = Throttled(self.redraw, PLOT_INTERVAL_MS, self)
        self.listen(session, "rungs", self._redraw_later.request)
        self.listen(session, "run", self._run_changed)
        self.listen(session, "selection", self._selection_changed)
        self.listen(session, "axis", self.redraw)
        self.redraw()

    def _axis_label(self) -> str:
        return f"{LADDER_AXES[self.session.ladder_axis][0]} (log2 spacing)"

    def _clicked(self, _item, points, ev=None) -> None:
        """Select the rung whose point is nearest the click (in screen distance), not merely one
        of the points under it."""
        if not len(points):
            return
        if ev is None:
            self.session.select(points[0].data())
            return
        vb = self.getPlotItem().getViewBox()
        where = ev.scenePos()
        spots = []
        for p in self.points.points():
            q = vb.mapViewToScene(p.pos())
            spots.append((p.data(), q.x(), q.y()))
        key = nearest_point(spots, where.x(), where.y())
        modifiers = getattr(ev, "modifiers", None)  # a synthetic click may carry none
        if key is not None and modifiers is not None and modifiers() & QtCore.Qt.KeyboardModifier.ControlModifier:
            self.session.compare_with(key)  # Ctrl+click: compare with the selected rung
            return
        self.session.select(key)

    def _curve(self, family: str, kind: str) -> pg.PlotCurveItem:
        item = self._curves.get((family, kind))
        if item is None:
            rgb = FAMILY_RGB.get(family, (0, 0, 0))
            item = pg.PlotCurveItem(pen=pg.mkPen(rgb, width=2.5 if kind == "cv" else 1.5, style=KIND_STYLE[kind]))
            self.getPlotItem().addItem(item)
            self._curves[(family, kind)] = item
            item.setVisible(family not in self.hidden and kind not in self.hidden)
            if kind == "cv":  # the family's entry: a sample of its own, so switching it off leaves the curves be
                entry = pg.PlotCurveItem(pen=pg.mkPen(rgb, width=2.5))
                self._legend_keys[id(entry)] = family
                self._family_entries[family] = entry
                self.legend.addItem(entry, family)
                self.set_shown()
        return item

    def _legend_clicked(self, item) -> None:
        """An entry of the legend was clicked (its sample has just toggled ``item``): switch the
        family or the kind it stands for on or off, and show every curve accordingly."""
        key = self._legend_keys.get(id(item))
        if key is None:
            return
        self.hidden ^= {key}
        self.set_shown()

    def set_shown(self, hidden: set[str] | None = None) -> None:
        """Show every curve whose family and kind are not in ``hidden`` (default: the current set)."""
        if hidden is not None:
            self.hidden = set(hidden)
        for (fam, kind), curve in self._curves.items():
            curve.setVisible(fam not in self.hidden and kind not in self.hidden)
        for sample, _label in self.legend.items:  # a switched-off entry is drawn faded
            sample.item.setVisible(self._legend_keys.get(id(sample.item)) not in self.hidden)
            sample.update()

    def _run_changed(self) -> None:
        if self.session.running:
            # The legend gets the run's families now, not one by one as their first rungs
            # arrive: each new entry lays the legend out and paints the plot again mid-climb.
            try:
                families = [f for f in FAMILY_ORDER if f in {fam for fam, _ in self.session.plan()}]
            except PixelfitError:
                families = []
            for (fam, kind), item in list(self._curves.items()):
                if fam not in families:
                    if kind == "cv":
                        entry = self._family_entries.pop(fam)
                        self.legend.removeItem(entry)
                        self._legend_keys.pop(id(entry), None)
                    self.getPlotItem().removeItem(item)
                    del self._curves[(fam, kind)]
                    self._drawn.pop((fam, kind), None)
            for fam in families:
                for kind in KIND_STYLE:
                    self._curve(fam, kind)
        self._redraw_later.flush()

    def _changed(self, what, value) -> bool:
        """True (and remembered) when ``value`` differs from what ``what`` was last given."""
        if what in self._drawn and self._drawn[what] == value:
            return False
        self._drawn[what] = value
        return True

    def showEvent(self, event) -> None:
        super().showEvent(event)
        if self._stale:
            self.redraw()

    def redraw(self) -> None:
        if not self.isVisible():
            self._stale = True
            return
        self._stale = False
        self._redraw_later.cancel()
        pi = self.getPlotItem()
        pos = self.session.ladder_positions()
        rungs = [r for r in self.session.rungs if r.key in pos]
        by_family: dict[str, list[Rung]] = {}
        for r in rungs:
            by_family.setdefault(r.family, []).append(r)
        for key, item in self._curves.items():
            if key[0] not in by_family and self._changed(key, ((), ())):
                item.setData([], [])
        shown = []
        for fam, members in by_family.items():
            members = sorted(members, key=lambda r: (pos[r.key][1], r.size))
            for kind in KIND_STYLE:
                pts = [(pos[r.key][1], _kind_error(r, kind)) for r in members]
                xs = tuple(x for x, e in pts if e is not None)
                ys = tuple(min(1.0, e) for x, e in pts if e is not None)
                shown.extend(ys)
                if (xs or (fam, kind) in self._curves) and self._changed((fam, kind), (xs, ys)):
                    self._curve(fam, kind).setData(list(xs), list(ys))
        answer = (self.session.answer or {}).get("rung")
        spots = tuple((r.key, pos[r.key][1], min(1.0, _point_error(r)), r.recommended, r.key == answer)
                      for r in rungs)
        if self._changed("points", spots):
            # The answer to the spec is a large diamond, the recommended rung a star.
            self.points.setData(
                x=[p[1] for p in spots], y=[p[2] for p in spots], data=[p[0] for p in spots],
                brush=[pg.mkBrush(*FAMILY_RGB.get(r.family, (0, 0, 0))) for r in rungs],
                pen=[pg.mkPen("k", width=2) if p[4] else pg.mkPen("w") for p in spots],
                symbol=["d" if p[4] else "star" if p[3] else "o" for p in spots],
                size=[18 if p[4] else 16 if p[3] else 9 for p in spots])
        top = min(1.0, max(shown, default=1.0) * 1.1 + 0.02)
        if self._changed("y", top):
            pi.setYRange(0, top, padding=0)
        if self._changed("label", self._axis_label()):
            pi.setLabel("bottom", self._axis_label())
        ticks = power_of_two_ticks(sorted({v for v, _ in pos.values()}))
        xs = [x for _, x in pos.values()]
        if self._changed("x", (tuple(ticks), min(xs, default=0.0), max(xs, default=0.0))):
            pi.getAxis("bottom").setTicks([ticks])
            if xs:
                pi.setXRange(min(xs) - 0.3, max(xs) + 0.3, padding=0)
        self._mark()

    def _selection_changed(self) -> None:
        # A redraw already on its way marks the selection too: one paint of the plot, not two
        # (a rung picked while its arrival's redraw is pending).
        if not self._redraw_later.pending:
            self._mark()

    def _mark(self) -> None:
        r = self.session.selected
        if r is None:
            self.marker.setData([])
            return
        at = self.session.ladder_positions().get(r.key)
        if at is None:
            self.marker.setData([])
            return
        self.marker.setData([{"pos": (at[1], min(1.0, _point_error(r)))}])

