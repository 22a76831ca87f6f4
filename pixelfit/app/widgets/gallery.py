"""The patch gallery: every patch grey and binarized side by side, with its class, filterable."""

from __future__ import annotations

import numpy as np

from pixelfit.app._qt import QtCore, QtGui, QtWidgets
from pixelfit.app.images import gray_qimage, side_by_side
from pixelfit.app.session import Session
from pixelfit.app.widgets import Listens

Role = QtCore.Qt.ItemDataRole


class PatchListModel(QtCore.QAbstractListModel):
    """Rows are the session's gallery rows; thumbnails are drawn on first view and cached."""

    def __init__(self, session: Session, parent=None, rows_fn=None):
        super().__init__(parent)
        self.session = session
        self.rows_fn = rows_fn or session.gallery_indices  # which dataset rows to show
        self.rows = np.zeros(0, np.intp)
        self._cache: dict[int, QtGui.QPixmap] = {}
        self.scale = 3

    def reset(self) -> None:
        self.beginResetModel()
        self.rows = np.asarray(self.rows_fn(), np.intp)
        self._cache.clear()
        self.endResetModel()

    def rowCount(self, parent=None) -> int:
        return 0 if parent is not None and parent.isValid() else len(self.rows)

    def data(self, index, role=Role.DisplayRole):
        if not index.isValid() or self.session.dataset is None:
            return None
        i = int(self.rows[index.row()])
        ds = self.session.dataset
        if role == Role.DisplayRole:
            return ds.labels[i]
        if role == Role.ToolTipRole:
            subset = ""
            if self.session.prep is not None:
                subset = " (held-out)" if self.session.prep.test_mask[i] else " (train)"
            return f"{ds.names[i]}: {ds.labels[i]}{subset}"
        if role == Role.DecorationRole:
            pix = self._cache.get(i)
            if pix is None:
                if self.session.prep is None:
                    binary = np.zeros(ds.shape, bool)
                else:
                    binary = self.session.binarized([i])[0]
                pix = QtGui.QPixmap.fromImage(gray_qimage(side_by_side(ds.images[i], binary, self.scale)))
                self._cache[i] = pix
            return pix
        return None


class PatchGallery(Listens, QtWidgets.QWidget):
    """Class filter above a scrolling grid of patch thumbnails (grey | bits)."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.model = PatchListModel(session, self)
        self.filter = QtWidgets.QComboBox()
        self.count = QtWidgets.QLabel("")
        self.view = QtWidgets.QListView()
        self.view.setViewMode(QtWidgets.QListView.ViewMode.IconMode)
        self.view.setResizeMode(QtWidgets.QListView.ResizeMode.Adjust)
        self.view.setMovement(QtWidgets.QListView.Movement.Static)
        self.view.setUniformItemSizes(True)
        self.view.setSpacing(4)
        self.view.setModel(self.model)
        top = QtWidgets.QHBoxLayout()
        top.addWidget(QtWidgets.QLabel("show"))
        top.addWidget(self.filter)
        top.addWidget(QtWidgets.QLabel("each tile: grey patch | its bits"))
        top.addStretch(1)
        top.addWidget(self.count)
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(2, 2, 2, 2)
        lay.addLayout(top)
        lay.addWidget(self.view)
        self.filter.activated.connect(lambda i: session.set_gallery_class(self.filter.itemData(i)))
        self.view.clicked.connect(lambda index: session.explain(int(self.model.rows[index.row()])))
        self.listen(session, "dataset", self._classes_changed)
        self.listen(session, "prep", self._refill)
        self.listen(session, "gallery", self._refill)
        self._classes_changed()

    def _classes_changed(self) -> None:
        self.filter.blockSignals(True)
        self.filter.clear()
        self.filter.addItem("all classes", None)
        ds = self.session.dataset
        if ds is not None:
            for c, n in ds.counts.items():
                self.filter.addItem(f"{c} ({n})", c)
        self.filter.setCurrentIndex(max(0, self.filter.findData(self.session.gallery_class)))
        self.filter.blockSignals(False)
        self._refill()

    def _refill(self) -> None:
        ds = self.session.dataset
        if ds is not None:
            h, w = ds.shape
            s = self.model.scale
            self.view.setIconSize(QtCore.QSize(2 * w * s + 2, h * s))
        self.model.reset()
        self.count.setText(f"{self.model.rowCount()} patches")
