"""The rung inspector: per-pixel map, precision/recall at a movable threshold, confusion, misses."""

from __future__ import annotations

import math

import numpy as np

from pixelfit.app._qt import QtCore, QtGui, QtWidgets, pg
from pixelfit.app.images import gray_qimage, map_scale, side_by_side, signed_colormap
from pixelfit.app.session import MAP_KINDS, Session, map_name
from pixelfit.app.widgets import Listens, Throttled, thumbnail_list
from pixelfit.families import FAMILIES

#: Thumbnails of misses shown per kind; the count says how many there are in all.
MAX_MISSES = 48
#: Miss thumbnails kept for reuse before the store starts afresh.
MAX_THUMBS = 4096
SLIDER_STEPS = 1000
EMPTY_TEXT = ("No rung selected.\n\nClimb the ladder, then click a rung in the table or the plot to inspect "
              "it here; Ctrl+click a second rung to compare the two.")
EMPTY_RUNNING = ("The ladder is climbing.\n\nClick a finished rung in the table or the plot to inspect it here; "
                 "the recommended rung is shown when the climb ends.")


def _pct(v) -> str:
    return "–" if v is None else f"{v:.3f}"


def _ci(ci) -> str:
    return "" if not ci else f" [{ci[0]:.2f}, {ci[1]:.2f}]"


class PixelMap(pg.GraphicsLayoutWidget):
    """One (h, w) map drawn row-major (row 0 at the top) with a colour bar; pixels a rule reads
    are outlined."""

    def __init__(self, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.plot = self.addPlot()
        self.plot.setMenuEnabled(False)
        self.plot.hideButtons()
        self.plot.setAspectLocked(True)
        self.plot.invertY(True)
        self.plot.getAxis("bottom").setLabel("column")
        self.plot.getAxis("left").setLabel("row")
        for side in ("bottom", "left"):
            self.plot.getAxis(side).enableAutoSIPrefix(False)
            # drawn once per change, then blitted (see ErrorPlot in ladder_view.py)
            self.plot.getAxis(side).setCacheMode(QtWidgets.QGraphicsItem.CacheMode.DeviceCoordinateCache)
        # Fixed axis sizes: the square-pixel margins (_square) are measured against them.
        self.plot.getAxis("left").setWidth(48)
        self.plot.getAxis("bottom").setHeight(40)
        self.image = pg.ImageItem(axisOrder="row-major")
        self.plot.addItem(self.image)
        self.outline = pg.ScatterPlotItem(symbol="s", brush=None, pen=pg.mkPen((0, 0, 0), width=1.5), pxMode=False)
        self.plot.addItem(self.outline)
        self.bar = pg.ColorBarItem(colorMap=signed_colormap(), interactive=False, width=14)
        self.bar.setImageItem(self.image, insert_in=self.plot)
        self.values: np.ndarray | None = None
        self.bar.setVisible(False)

    def show_map(self, values: np.ndarray | None, pixels: list[int] | None = None) -> None:
        if values is None:
            self.values = None
            self.image.clear()
            self.outline.setData([])
            self.bar.setVisible(False)  # no colour bar left from an earlier map
            return
        # float32 with explicit levels: boolean and all-zero maps break automatic levels.
        self.values = np.ascontiguousarray(values, dtype=np.float32)
        cmap, (lo, hi) = map_scale(self.values)
        self.bar.setColorMap(cmap)
        self.bar.setVisible(True)
        self.image.setImage(self.values, autoLevels=False, levels=(lo, hi))
        self.bar.setLevels((lo, hi))
        h, w = self.values.shape
        self.image.setRect(QtCore.QRectF(0, 0, w, h))
        if pixels and len(pixels) <= 256:
            rc = np.array([(p // w, p % w) for p in pixels], np.float64)
            self.outline.setData(x=rc[:, 1] + 0.5, y=rc[:, 0] + 0.5, size=0.92)
        else:
            self.outline.setData([])
        self._fit_to_patch(h, w)

    def _fit_to_patch(self, h: int, w: int) -> None:
        """The view holds the patch and nothing else: square pixels, a tick at each pixel's centre
        labelled by its row or column (every few on a large patch), row 0 at the top."""
        self.plot.setAspectLocked(False)  # square pixels come from the margins (_square), not a wider view
        self.plot.setRange(xRange=(0, w), yRange=(0, h), padding=0)
        if getattr(self, "_fitted", None) != (h, w):
            self._fitted = (h, w)
            for side, n in (("bottom", w), ("left", h)):
                step = max(1, math.ceil(n / 12))
                self.plot.getAxis(side).setTicks([[(i + 0.5, str(i)) for i in range(0, n, step)], []])
        self._square()

    def _square(self) -> None:
        """Pad the layout so that the plot's view has the patch's proportions (square pixels)."""
        fitted = getattr(self, "_fitted", None)
        if fitted is None:
            return
        h, w = fitted
        lay = self.ci.layout
        mx = my = 0.0
        for _ in range(4):  # the axes' widths change with the margins: a few passes settle it
            lay.setContentsMargins(mx, my, mx, my)
            lay.activate()
            rect = self.plot.getViewBox().geometry()
            vw, vh = rect.width(), rect.height()
            if vw <= 0 or vh <= 0:
                return
            k = min(vw / w, vh / h)
            dx, dy = (vw - k * w) / 2, (vh - k * h) / 2
            if dx < 0.5 and dy < 0.5:
                return
            mx, my = mx + dx, my + dy

    def resizeEvent(self, event) -> None:
        super().resizeEvent(event)
        self._square()


def _drop_colour(drop: float | None, scale: float) -> QtGui.QColor:
    """White for no change, amber for a drop of F1, blue for a gain; grey where undefined."""
    if drop is None:
        return QtGui.QColor(210, 210, 210)
    t = max(-1.0, min(1.0, drop / scale)) if scale > 0 else 0.0
    mid, pos, neg = (246, 246, 242), (214, 120, 16), (46, 92, 160)
    end = pos if t >= 0 else neg
    return QtGui.QColor(*[int(round(m + (e - m) * abs(t))) for m, e in zip(mid, end)])


class StressView(QtWidgets.QWidget):
    """The selected rung's stress tests: held-out F1 under each perturbation and its drop, coloured."""

    def __init__(self, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.caption = QtWidgets.QLabel("")
        self.caption.setWordWrap(True)
        self.table = QtWidgets.QTableWidget(2, 0)
        self.table.setVerticalHeaderLabels(["F1", "drop"])
        self.table.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.NoSelection)
        self.table.verticalHeader().setDefaultSectionSize(22)
        self.table.horizontalHeader().setDefaultSectionSize(62)
        self.table.setFixedHeight(22 * 2 + 30 + 18)
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self.caption)
        lay.addWidget(self.table)
        self.show_rung(None, {"bias_variance": None, "stress": None})

    def show_rung(self, key: str | None, checks: dict) -> None:
        """Show ``checks`` (a rung's ``bias_variance`` and ``stress``) for rung ``key``."""
        stress, bv = checks.get("stress"), checks.get("bias_variance")
        names = [n for n in (stress or {}) if n != "worst"]
        self.table.setColumnCount(len(names))
        self.table.setHorizontalHeaderLabels(names)
        parts = []
        if stress:
            worst = stress["worst"]
            base = worst.get("f1_unperturbed")
            drops = [None if base is None or stress[n]["f1"] is None else base - stress[n]["f1"] for n in names]
            scale = max([abs(d) for d in drops if d is not None], default=0.0)
            for j, (n, d) in enumerate(zip(names, drops)):
                for row, text in ((0, _pct(stress[n]["f1"])), (1, "–" if d is None else f"{d:+.3f}")):
                    item = QtWidgets.QTableWidgetItem(text)
                    item.setTextAlignment(QtCore.Qt.AlignmentFlag.AlignCenter)
                    item.setBackground(QtGui.QBrush(_drop_colour(d, scale)))
                    tip = stress[n]
                    item.setToolTip(f"{n}: precision {_pct(tip['precision'])}, recall {_pct(tip['recall'])}, "
                                    f"F1 {_pct(tip['f1'])}")
                    self.table.setItem(row, j, item)
            parts.append("stress tests (grey held-out patches perturbed, then binarized): "
                         + ("no F1 defined" if worst["name"] is None else
                            f"worst {worst['name']}, F1 {_pct(base)} → drop {worst['f1_drop']:.3f}"))
        elif key is not None:
            parts.append("stress tests: not measured yet")
        if bv and bv.get("loss") is not None:
            parts.append(f"bias–variance over {bv['replicates']} replicates: loss {bv['loss']:.3f} = bias "
                         f"{bv['bias']:.3f} + unbiased variance {bv['unbiased_variance']:.3f} − biased variance "
                         f"{bv['biased_variance']:.3f}")
        self.caption.setText("<br>".join(parts))


class RungInspector(Listens, QtWidgets.QWidget):
    """Everything about the selected rung."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.title = QtWidgets.QLabel("Select a rung in the ladder.")
        self.title.setWordWrap(True)
        self.kind = QtWidgets.QComboBox()
        for k, label in MAP_KINDS.items():
            self.kind.addItem(label, k)
        self.kind.setSizeAdjustPolicy(QtWidgets.QComboBox.SizeAdjustPolicy.AdjustToContents)  # per-family names
        self.map_caption = QtWidgets.QLabel("")
        self.pixmap = PixelMap()
        self.pixmap.setMinimumSize(220, 220)

        self.pr_table = QtWidgets.QTableWidget(4, 3)
        self.pr_table.setHorizontalHeaderLabels(["precision [95 % CI]", "recall [95 % CI]", "F1"])
        self.pr_table.setVerticalHeaderLabels(["train", "CV (mean)", "held-out", "held-out @ threshold"])
        self._fix_table(self.pr_table)
        self.confusion = QtWidgets.QTableWidget(2, 2)
        self.confusion.setHorizontalHeaderLabels(["predicted +", "predicted −"])
        self.confusion.setVerticalHeaderLabels(["actual +", "actual −"])
        self._fix_table(self.confusion)

        self.slider = QtWidgets.QSlider(QtCore.Qt.Orientation.Horizontal)
        self.slider.setRange(0, SLIDER_STEPS)
        self.slider_value = QtWidgets.QDoubleSpinBox()
        self.slider_value.setRange(0.0, 1.0)
        self.slider_value.setDecimals(3)
        self.slider_value.setSingleStep(0.01)
        self.chosen_label = QtWidgets.QLabel("")
        self.target_label = QtWidgets.QLabel("")
        self.target_label.setWordWrap(True)
        self.go_target = QtWidgets.QPushButton("move there")
        self.go_target.setToolTip("Set the threshold to the one chosen for the spec on cross-validation scores "
                                  "(the held-out patches only confirm it)")

        self.stress = StressView()
        self.fp_label = QtWidgets.QLabel("")
        self.fn_label = QtWidgets.QLabel("")
        self.fp_list = thumbnail_list(2, 70)
        self.fn_list = thumbnail_list(2, 70)
        # Thumbnails of misses by dataset row: the same patches are missed by rung after rung.
        self._thumbs: tuple[object, dict[int, QtGui.QPixmap]] = (None, {})

        top = QtWidgets.QHBoxLayout()
        top.addWidget(self.title, 1)
        top.addWidget(QtWidgets.QLabel("map"))
        top.addWidget(self.kind)
        side = QtWidgets.QVBoxLayout()
        side.addWidget(QtWidgets.QLabel("held-out confusion at the threshold"))
        side.addWidget(self.confusion)
        side.addStretch(1)
        mid = QtWidgets.QHBoxLayout()
        mid.addWidget(self.pixmap, 3)
        mid.addLayout(side, 2)
        thr = QtWidgets.QGridLayout()
        thr.addWidget(QtWidgets.QLabel("score threshold"), 0, 0)
        thr.addWidget(self.slider, 0, 1, 1, 2)
        thr.addWidget(self.slider_value, 0, 3)
        thr.addWidget(QtWidgets.QLabel("chosen on"), 1, 0)
        thr.addWidget(self.chosen_label, 1, 1)
        thr.addWidget(self.go_target, 1, 3)
        thr.addWidget(self.target_label, 2, 0, 1, 4)
        thr.setColumnStretch(2, 1)
        misses = QtWidgets.QGridLayout()
        misses.addWidget(self.fp_label, 0, 0)
        misses.addWidget(self.fn_label, 0, 1)
        misses.addWidget(self.fp_list, 1, 0)
        misses.addWidget(self.fn_list, 1, 1)
        body = QtWidgets.QWidget()
        lay = QtWidgets.QVBoxLayout(body)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(top)
        lay.addLayout(mid, 3)
        lay.addWidget(self.map_caption)
        lay.addWidget(self.pr_table)
        lay.addLayout(thr)
        lay.addWidget(self.stress)
        lay.addLayout(misses, 1)
        # With no rung selected (and through a climb until one is picked) a plain line, not empty axes.
        self.empty = QtWidgets.QLabel(EMPTY_TEXT)
        self.empty.setWordWrap(True)
        self.empty.setAlignment(QtCore.Qt.AlignmentFlag.AlignCenter)
        self.empty.setStyleSheet("color: #666; font-size: 13px; padding: 24px;")
        self.pages = QtWidgets.QStackedLayout(self)
        self.pages.addWidget(self.empty)
        self.pages.addWidget(body)

        self.kind.activated.connect(lambda i: session.set_map_kind(self.kind.itemData(i)))
        self.slider.valueChanged.connect(lambda v: session.set_threshold(v / SLIDER_STEPS))
        self.slider_value.valueChanged.connect(session.set_threshold)
        self.go_target.clicked.connect(session.move_to_spec)
        for lst in (self.fp_list, self.fn_list):  # a click on a miss explains the call
            lst.itemClicked.connect(lambda item: session.explain(item.data(QtCore.Qt.ItemDataRole.UserRole)))
        # A new selection shows its title, map and fixed rows at once and the held-out figures at
        # the threshold (core metrics, miss thumbnails) on the next turn of the event loop, so
        # that input and painting get in between the two halves.
        self._threshold_later = Throttled(self._threshold_changed, 0, self)
        self.listen(session, "selection", self.refresh)
        self.listen(session, "rungs", self._rungs_changed)
        self.listen(session, "threshold", self._threshold_changed)
        self.listen(session, "map", self._show_map)
        self.listen(session, "prep", self._prep_changed)
        self.listen(session, "spec", self._target_changed)
        self.listen(session, "checks", self._show_stress)
        self.listen(session, "run", lambda: self.empty.setText(EMPTY_RUNNING if session.running else EMPTY_TEXT))
        self.refresh()

    @staticmethod
    def _fix_table(t: QtWidgets.QTableWidget) -> None:
        t.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        t.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.NoSelection)
        t.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeMode.Stretch)
        t.verticalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeMode.Fixed)
        t.verticalHeader().setDefaultSectionSize(22)
        t.setVerticalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        t.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        t.setFixedHeight(t.horizontalHeader().sizeHint().height() + t.verticalHeader().length() + 2 * t.frameWidth())

    def _rungs_changed(self) -> None:
        if self.session.selected is not None:  # marks (recommended, comparisons) may have moved
            self._title()

    def _prep_changed(self) -> None:
        self._title()
        self._show_map()

    def _title(self) -> None:
        r = self.session.selected
        if r is None:
            self.title.setText("Select a rung in the ladder.")
            return
        fam = FAMILIES[r.family]
        mark = " — recommended" if r.recommended else ""
        if self.session.answer_rung is r:
            mark += " — the answer to the spec"
        notes = "".join(f"<br><i>{n}</i>" for n in r.notes)
        s = self.session
        if s.prep is not None and s.run_prep is not None and s.prep.binarizer != s.run_prep.binarizer:
            notes += f"<br><i>trained on {s.run_prep.binarizer.describe()} bits, not the current pixel prep</i>"
        self.title.setText(f"<b>{r.key}</b>{mark}: {fam.title(r.size)}; "
                           f"{r.figures['parameters']} parameters{notes}")

    def refresh(self) -> None:
        s = self.session
        r = s.selected
        self.pages.setCurrentIndex(0 if r is None else 1)
        self.empty.setText(EMPTY_RUNNING if s.running else EMPTY_TEXT)
        self._title()
        scored = r is not None and r.scored
        for w in (self.slider, self.slider_value):
            w.setEnabled(scored)
        self._put_threshold()
        self._show_map()
        self._fill_static_rows()
        self._show_stress()
        self._threshold_later.request()

    def _show_stress(self) -> None:
        r = self.session.selected
        self.stress.show_rung(None if r is None else r.key,
                              {} if r is None else self.session.rung_checks(r.key))

    def _put_threshold(self) -> None:
        t = self.session.threshold
        for w, v in ((self.slider, int(round(t * SLIDER_STEPS))), (self.slider_value, t)):
            w.blockSignals(True)
            w.setValue(v)
            w.blockSignals(False)

    def _set_row(self, row: int, m: dict | None, f1=None) -> None:
        cells = ["–", "–", "–"] if m is None else [
            _pct(m["precision"]) + _ci(m["precision_ci"]), _pct(m["recall"]) + _ci(m["recall_ci"]), _pct(m["f1"])]
        if f1 is not None:
            cells = ["", "", f1]
        for c, text in enumerate(cells):
            item = QtWidgets.QTableWidgetItem(text)
            item.setTextAlignment(QtCore.Qt.AlignmentFlag.AlignCenter)
            self.pr_table.setItem(row, c, item)

    def _fill_static_rows(self) -> None:
        r = self.session.selected
        self._set_row(0, None if r is None else r.train)
        if r is not None and r.cv:
            self._set_row(1, None, f1=f"{r.cv['f1_mean']:.3f} ± {r.cv['f1_std']:.3f}")
        else:
            self._set_row(1, None)
        self._set_row(2, None if r is None else r.test)

    def _threshold_changed(self) -> None:
        self._threshold_later.cancel()
        s = self.session
        self._put_threshold()
        m = s.threshold_metrics()
        self._set_row(3, m)
        scored = s.selected is not None and s.selected.scored
        self.pr_table.setVerticalHeaderItem(3, QtWidgets.QTableWidgetItem(
            f"held-out @ {s.threshold:.3f}" if scored else "held-out (no score)"))
        for (row, col), key in {(0, 0): "tp", (0, 1): "fn", (1, 0): "fp", (1, 1): "tn"}.items():
            item = QtWidgets.QTableWidgetItem("–" if m is None else str(m[key]))
            item.setTextAlignment(QtCore.Qt.AlignmentFlag.AlignCenter)
            self.confusion.setItem(row, col, item)
        self._target_changed()
        self._show_misses()

    def _target_changed(self) -> None:
        s = self.session
        r = s.selected
        self.chosen_label.setText("" if r is None else s.threshold_chosen_on)
        reach = s.spec_reach()
        self.go_target.setEnabled(r is not None and r.spec is not None and (reach is None or reach["reached"]))
        if r is None:
            self.target_label.setText("")
            return
        if r.spec is None:
            self.target_label.setText("no spec set (see the Climb panel)")
            return
        e, t = r.spec, r.spec["test"]

        def f(v):
            return "–" if v is None else f"{v:.3f}"
        if reach is not None and not reach["reached"]:
            on = "CV" if r.chosen_on == "cv" else "training"
            goal = " and ".join(f"{k} ≥ {v:g}" for k, v in (s.spec.targets if s.spec else {}).items())
            best = ("no threshold calls any patch positive" if reach["best_precision"] is None else
                    f"the best precision any threshold gives is {f(reach['best_precision'])}, "
                    f"at recall {f(reach['recall_at_best'])}")
            self.target_label.setText(f"no threshold of {r.key} reaches {goal} on its {on} "
                                      f"scores: {best}. Try a larger rung or a lower target.")
            return
        self.target_label.setText(
            f"spec: threshold {e['threshold']:.3f} chosen on {e['chosen_on']} (there precision {f(e['cv']['precision'])}, "
            f"recall {f(e['cv']['recall'])}); held-out tp {t['tp']}, fp {t['fp']}, fn {t['fn']}, tn {t['tn']}: "
            f"precision {f(t['precision'])} (lower {f(t['precision_lower'])}), recall {f(t['recall'])} "
            f"(lower {f(t['recall_lower'])}) — {e['verdict']}")

    def _show_map(self) -> None:
        s = self.session
        values, caption = s.heatmap()
        pixels = s.selected.pixels if s.selected is not None and s.map_kind in ("native", "permutation") else None
        self.pixmap.show_map(values, pixels)
        if values is not None:
            caption += f"  (range {float(np.min(values)):.3g} … {float(np.max(values)):.3g}; outlined: pixels read)" \
                if pixels else f"  (range {float(np.min(values)):.3g} … {float(np.max(values)):.3g})"
        self.map_caption.setText(caption)
        self.kind.setItemText(self.kind.findData("native"), map_name(s.selected, "native")
                              if s.selected is not None else MAP_KINDS["native"])
        self.kind.setCurrentIndex(self.kind.findData(s.map_kind))

    def _show_misses(self) -> None:
        s = self.session
        fp, fn = s.misses()
        ds = s.run_prep.dataset if s.run_prep is not None else None
        test_rows = np.flatnonzero(s.run_prep.test_mask) if s.run_prep is not None else np.zeros(0, np.intp)
        r = s.selected
        for lst, label, rows, what in ((self.fp_list, self.fp_label, fp, "false positives"),
                                       (self.fn_list, self.fn_label, fn, "false negatives")):
            lst.clear()
            shown = rows[:MAX_MISSES]
            more = f", first {len(shown)} shown" if len(rows) > len(shown) else ""
            label.setText(f"held-out {what}: {len(rows)}{more}")
            if ds is None:
                continue
            lst.setIconSize(QtCore.QSize(ds.shape[1] * 6 + 2, ds.shape[0] * 3))
            # grey | the bits the rung was trained on, kept per (data, binarization)
            if self._thumbs[0] is not s.run_prep or len(self._thumbs[1]) > MAX_THUMBS:
                self._thumbs = (s.run_prep, {})
            thumbs = self._thumbs[1]
            for i in shown:
                pix = thumbs.get(int(i))
                if pix is None:
                    bits = s.run_prep.binarizer.transform(ds.images[i:i + 1])[0]
                    pix = thumbs[int(i)] = QtGui.QPixmap.fromImage(gray_qimage(side_by_side(ds.images[i], bits, 3)))
                item = QtWidgets.QListWidgetItem(pix, "")
                score = None if r is None or r.test_scores is None else \
                    float(r.test_scores[int(np.searchsorted(test_rows, i))])
                item.setToolTip(f"{ds.names[i]}: labelled {ds.labels[i]}"
                                + ("" if score is None else f"; score {score:.3f} (threshold {s.threshold:.3f})"))
                item.setData(QtCore.Qt.ItemDataRole.UserRole, int(i))
                lst.addItem(item)
