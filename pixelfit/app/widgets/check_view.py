"""The data-check view: flagged patches as thumbnails, one finding at a time; a click shows its group."""

from __future__ import annotations

import numpy as np

from pixelfit.app._qt import QtCore, QtWidgets
from pixelfit.app.session import Session
from pixelfit.app.widgets import Listens
from pixelfit.app.widgets.gallery import Pager, PatchListModel
from pixelfit.data import FINDINGS

#: What each finding means, as the view says it.
FINDING_TEXT = {
    "duplicate": "identical grey patches",
    "conflict": "identical bits, both labels",
    "leaked-grey": "held out, grey copy in training",
    "leaked-binary": "held out, binarized copy in training",
    "near-duplicate": "held out, within one bit of training",
    "suspect": "label disputed by the strongest rungs",
}


GROUP_HINT = ("click a flagged patch to see its group; click a tile of the group (or double-click a flagged "
              "one) to see why the selected rung calls it as it does")


def _tile_view(model: PatchListModel) -> QtWidgets.QListView:
    v = QtWidgets.QListView()
    v.setViewMode(QtWidgets.QListView.ViewMode.IconMode)
    v.setResizeMode(QtWidgets.QListView.ResizeMode.Adjust)
    v.setMovement(QtWidgets.QListView.Movement.Static)
    v.setUniformItemSizes(True)
    v.setSpacing(4)
    v.setModel(model)
    return v


class DataCheckView(Listens, QtWidgets.QWidget):
    """A finding chooser with counts, the flagged patches, and the group of the clicked one."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.finding = FINDINGS[0]
        self.group_rows = np.zeros(0, np.intp)
        self.chooser = QtWidgets.QComboBox()
        self.figures = QtWidgets.QLabel("")
        self.figures.setWordWrap(True)
        self.flagged_model = PatchListModel(session, self, lambda: session.check_rows(self.finding))
        self.group_model = PatchListModel(session, self, lambda: self.group_rows)
        self.flagged = _tile_view(self.flagged_model)
        self.group = _tile_view(self.group_model)
        self.group_label = QtWidgets.QLabel(GROUP_HINT)
        self.group_label.setWordWrap(True)
        self.shown = QtWidgets.QLabel("")
        self.pager = Pager(self.flagged_model)
        self.group_shown = QtWidgets.QLabel("")
        self.group_pager = Pager(self.group_model)
        for p in (self.pager, self.group_pager):
            p.back.clicked.connect(self._span_text)
            p.next.clicked.connect(self._span_text)
        top = QtWidgets.QHBoxLayout()
        top.addWidget(QtWidgets.QLabel("finding"))
        top.addWidget(self.chooser)
        top.addStretch(1)
        top.addWidget(self.shown)
        top.addWidget(self.pager)
        group_top = QtWidgets.QHBoxLayout()
        group_top.addWidget(self.group_label, 1)
        group_top.addWidget(self.group_shown)
        group_top.addWidget(self.group_pager)
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(2, 2, 2, 2)
        lay.addLayout(top)
        lay.addWidget(self.figures)
        lay.addWidget(self.flagged, 3)
        lay.addLayout(group_top)
        lay.addWidget(self.group, 1)
        self.chooser.activated.connect(lambda i: self.show_finding(self.chooser.itemData(i)))
        self.flagged.clicked.connect(lambda index: self.show_group(int(self.flagged_model.rows[index.row()])))
        # The group's tiles (the clicked patch first) explain the selected rung's call on a click.
        self.group.clicked.connect(lambda index: session.explain(int(self.group_model.rows[index.row()])))
        self.flagged.doubleClicked.connect(lambda index: session.explain(int(self.flagged_model.rows[index.row()])))
        self.listen(session, "prep", self.refresh)
        self.listen(session, "check", self.refresh)
        self.refresh()

    def show_finding(self, finding: str) -> None:
        self.finding = finding
        self.group_rows = np.zeros(0, np.intp)
        self._fill()

    def show_group(self, row: int) -> None:
        """Show the clicked patch and the others of its group under the current finding."""
        self.group_rows = self.session.check_group(row, self.finding)
        ds = self.session.dataset
        name = ds.names[row] if ds is not None else str(row)
        others = len(self.group_rows) - 1
        self.group_label.setText(f"{name} and the {others} other patch(es) of its group"
                                 if others else f"{name}: no other patch in its group")
        self._fill()

    def refresh(self) -> None:
        counts = self.session.check_counts()
        if counts.get(self.finding, 0) == 0:
            self.finding = next((f for f in FINDINGS if counts[f]), FINDINGS[0])
        self.chooser.blockSignals(True)
        self.chooser.clear()
        for f in FINDINGS:
            self.chooser.addItem(f"{f} ({counts[f]}): {FINDING_TEXT[f]}", f)
        self.chooser.setCurrentIndex(self.chooser.findData(self.finding))
        self.chooser.blockSignals(False)
        c = self.session.check
        if c is None:
            self.figures.setText("no data check: open a dataset first")
        else:
            f = c.figures
            floor = "-" if f["error_floor"] is None else f"{100 * f['error_floor']:.1f} %"
            suspects = "after a climb" if c.suspects is None else str(len(c.suspects))
            self.figures.setText(
                f"{f['duplicate_groups']} duplicate group(s) ({f['duplicate_patches']} patches, "
                f"{f['cross_class_duplicate_groups']} across classes); {f['conflict_groups']} conflict group(s), "
                f"error floor {floor}; held out with a copy in training: {f['leaked_test_grey']} grey, "
                f"{f['leaked_test_binary']} binarized, {f['near_duplicate_test']} within one bit; "
                f"suspects: {suspects}")
        self.group_rows = np.zeros(0, np.intp)
        self.group_label.setText(GROUP_HINT)
        self._fill()

    def _fill(self) -> None:
        ds = self.session.dataset
        if ds is not None:
            h, w = ds.shape
            s = self.flagged_model.scale
            size = QtCore.QSize(2 * w * s + 2, h * s)
            self.flagged.setIconSize(size)
            self.group.setIconSize(size)
        self.flagged_model.reset()
        self.group_model.reset()
        self.pager.refresh()
        self.group_pager.refresh()
        self._span_text()

    def _span_text(self) -> None:
        self.shown.setText(self.flagged_model.span_text("flagged"))
        self.group_shown.setText(self.group_model.span_text("in the group") if len(self.group_model.all_rows) else "")
