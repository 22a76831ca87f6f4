"""The patch gallery: every patch grey and binarized side by side, with its class, filterable, a page at a time."""

from __future__ import annotations

import numpy as np

from pixelfit.app._qt import QtCore, QtGui, QtWidgets
from pixelfit.app.images import gray_qimage, side_by_side
from pixelfit.app.session import Session
from pixelfit.app.widgets import Listens

Role = QtCore.Qt.ItemDataRole

#: Tiles on one page of a patch list. A list view lays out every row it is given, on the GUI
#: thread (and asks the model's row count several times per row), so a million rows froze the
#: window for seconds; a page of this many lays out in milliseconds.
TILES_PER_PAGE = 2000


class PatchListModel(QtCore.QAbstractListModel):
    """One page of the rows ``rows_fn()`` gives (the session's gallery rows by default);
    thumbnails are drawn on first view and cached while the page is shown.

    ``all_rows``: every row to show; ``rows``: those of the current page, the model's rows.
    """

    def __init__(self, session: Session, parent=None, rows_fn=None, per_page: int = TILES_PER_PAGE):
        super().__init__(parent)
        self.session = session
        self.rows_fn = rows_fn or session.gallery_indices  # which dataset rows to show
        self.all_rows = np.zeros(0, np.intp)
        self.rows = np.zeros(0, np.intp)
        self.per_page = per_page
        self.page = 0
        self._count = 0
        self._cache: dict[int, QtGui.QPixmap] = {}
        self.scale = 3

    def reset(self) -> None:
        self.all_rows = np.asarray(self.rows_fn(), np.intp)
        self.set_page(0)

    @property
    def pages(self) -> int:
        return max(1, -(-len(self.all_rows) // self.per_page))

    def set_page(self, page: int) -> None:
        """Show page ``page`` (from 0; clamped to the pages there are)."""
        self.beginResetModel()
        self.page = min(max(0, int(page)), self.pages - 1)
        start = self.page * self.per_page
        self.rows = self.all_rows[start:start + self.per_page]
        self._count = len(self.rows)
        self._cache.clear()
        self.endResetModel()

    def span_text(self, what: str = "patches") -> str:
        """'1200 patches', or 'patches 2,001–4,000 of 1,000,000' when they take more than one page."""
        n = len(self.all_rows)
        if n <= self.per_page:
            return f"{n} {what}"
        start = self.page * self.per_page
        return f"{what} {start + 1:,}–{start + self._count:,} of {n:,}"

    def rowCount(self, parent=None) -> int:
        return 0 if parent is not None and parent.isValid() else self._count

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


class Pager(QtWidgets.QWidget):
    """Previous and next page of a :class:`PatchListModel`, and which patches are shown; hidden
    while the rows fit on one page."""

    def __init__(self, model: PatchListModel, what: str = "patches", parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.model = model
        self.what = what
        self.back = QtWidgets.QToolButton()
        self.back.setText("◀")
        self.back.setToolTip("Previous page")
        self.next = QtWidgets.QToolButton()
        self.next.setText("▶")
        self.next.setToolTip("Next page")
        self.back.clicked.connect(lambda: self.turn(-1))
        self.next.clicked.connect(lambda: self.turn(1))
        lay = QtWidgets.QHBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self.back)
        lay.addWidget(self.next)
        self.refresh()

    def turn(self, step: int) -> None:
        self.model.set_page(self.model.page + step)
        self.refresh()

    def refresh(self) -> None:
        m = self.model
        self.setVisible(m.pages > 1)
        self.back.setEnabled(m.page > 0)
        self.next.setEnabled(m.page < m.pages - 1)


class PatchGallery(Listens, QtWidgets.QWidget):
    """Class filter above a scrolling grid of patch thumbnails (grey | bits)."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.model = PatchListModel(session, self)
        self.filter = QtWidgets.QComboBox()
        self.count = QtWidgets.QLabel("")
        self.pager = Pager(self.model)
        self.pager.back.clicked.connect(self._count_text)
        self.pager.next.clicked.connect(self._count_text)
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
        top.addWidget(self.pager)
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
            for c, n in self.session.class_counts().items():
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
        self.pager.refresh()
        self._count_text()

    def _count_text(self) -> None:
        self.count.setText(self.model.span_text())
