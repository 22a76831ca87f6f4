"""The import report: what was read, how many of each class, and every skipped file with why."""

from __future__ import annotations

import html
from pathlib import Path

from pixelfit.app._qt import QtCore, QtWidgets
from pixelfit.app.session import Session
from pixelfit.app.widgets import Listens


class ImportReport(Listens, QtWidgets.QGroupBox):
    """Source, layout, patch shape, counts per class, the class to find, skipped files."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__("Import report", parent)
        self.session = session
        self.summary = QtWidgets.QLabel("Nothing open. Open a folder of patches or an .npz file (Ctrl+O), "
                                        "or drop one on the window.")
        self.summary.setWordWrap(True)
        self.summary.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        self.positive = QtWidgets.QComboBox()
        self.positive.setToolTip("The class the rule must find (its positive class); every other class "
                                 "is what it must pass over")
        # The badge: shown only when the data check found something.
        self.check_badge = QtWidgets.QLabel("")
        self.check_badge.setWordWrap(True)
        self.check_badge.setStyleSheet("QLabel { background: #f6d58e; color: #402800; border-radius: 4px; "
                                       "padding: 3px; }")
        self.check_badge.setVisible(False)
        self.skipped_label = QtWidgets.QLabel("")
        # Every skipped file with its whole reason: the list scrolls both ways, each line carries
        # its reason as a tooltip, and "show all" opens the list in a window of its own.
        self.skipped = QtWidgets.QListWidget()
        self.skipped.setMaximumHeight(90)
        self.skipped.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAsNeeded)
        self.skipped.setTextElideMode(QtCore.Qt.TextElideMode.ElideNone)
        self.show_skipped = QtWidgets.QPushButton("show all…")
        self.show_skipped.setToolTip("Open the whole list of skipped files and why, to read or copy")
        self.show_skipped.clicked.connect(self.open_skipped_list)
        lay = QtWidgets.QFormLayout(self)
        lay.addRow(self.summary)
        lay.addRow(self.check_badge)
        lay.addRow("class to find", self.positive)
        skipped_row = QtWidgets.QHBoxLayout()
        skipped_row.addWidget(self.skipped_label, 1)
        skipped_row.addWidget(self.show_skipped)
        lay.addRow(skipped_row)
        lay.addRow(self.skipped)
        self.positive.activated.connect(self._positive_chosen)
        self.listen(session, "dataset", self.refresh)
        self.listen(session, "prep", self.refresh)
        self.listen(session, "check", self._badge)
        # A run starting or ending only locks or frees the class choice; the report stays.
        self.listen(session, "run", self._enable)
        self.listen(session, "busy", self._enable)
        self.refresh()

    def _positive_chosen(self, index: int) -> None:
        self.session.set_positive(self.positive.itemData(index))

    def _enable(self) -> None:
        ds = self.session.dataset
        self.positive.setEnabled(ds is not None and len(self.session.class_counts()) > 1 and not self.session.running
                                 and not self.session.preparing)

    def _badge(self) -> None:
        """Name what the data check found, in a few words; hide the badge when it found nothing."""
        c = self.session.check
        counts = self.session.check_counts()
        parts = []
        if c is not None:
            f = c.figures
            if f["duplicate_groups"]:
                parts.append(f"{f['duplicate_groups']} duplicate group(s)")
            if f["conflict_groups"]:
                parts.append(f"{f['conflict_groups']} conflict group(s)")
            if f["leaked_test_grey"] or f["leaked_test_binary"]:
                parts.append(f"{f['leaked_test_binary']} held-out with a copy in training")
            if f["near_duplicate_test"]:
                parts.append(f"{f['near_duplicate_test']} held-out within one bit")
            if counts["suspect"]:
                parts.append(f"{counts['suspect']} suspect label(s)")
        self.check_badge.setText("data check: " + "; ".join(parts) + " (see the Data check tab)")
        self.check_badge.setVisible(bool(parts))

    def refresh(self) -> None:
        self._badge()
        s = self.session
        ds = s.dataset
        self.positive.blockSignals(True)
        self.positive.clear()
        self.skipped.clear()
        if ds is None:
            self.summary.setToolTip("")
            self.positive.blockSignals(False)
            self.skipped_label.setText("")
            self.skipped.setVisible(False)
            self.show_skipped.setVisible(False)
            return
        h, w = ds.shape
        rows = "".join(f"<tr><td>{html.escape(c)}</td><td align='right'>&nbsp;{n}</td>"
                       f"<td>{'&nbsp;&larr; to find' if c == s.positive else ''}</td></tr>"
                       for c, n in s.class_counts().items())
        split = ""
        if s.prep is not None:
            kind = ("given split" if s.prep.presplit else
                    f"held out {s.prep.test_fraction:.0%}, seed {s.prep.seed}, {s.prep.split_method}")
            split = f"<br>{len(s.prep.y_train)} train / {len(s.prep.y_test)} held-out ({kind})"
        # The folder's (or file's) name; its full path is a tooltip, so no picture shows a machine's path.
        self.summary.setToolTip(str(ds.source))
        name = Path(ds.source).name or str(ds.source)
        self.summary.setText(f"<b>{html.escape(name)}</b><br>{len(ds)} patches of {h}&times;{w} "
                             f"({html.escape(ds.layout)}){split}<table>{rows}</table>")
        for c in s.class_counts():
            self.positive.addItem(c, c)
        if s.positive is not None:
            self.positive.setCurrentIndex(self.positive.findData(s.positive))
        self._enable()
        self.positive.blockSignals(False)
        n = len(ds.skipped)
        self.skipped_label.setText(f"skipped {n} file(s):" if n else "skipped nothing")
        self.skipped.setVisible(bool(n))
        self.show_skipped.setVisible(bool(n))
        for sk in ds.skipped:
            item = QtWidgets.QListWidgetItem(f"{sk.path}: {sk.reason}")
            item.setToolTip(f"{sk.path}: {sk.reason}")
            self.skipped.addItem(item)

    def skipped_text(self) -> str:
        """Every skipped file and why, one a line."""
        ds = self.session.dataset
        return "" if ds is None else "\n".join(f"{sk.path}: {sk.reason}" for sk in ds.skipped)

    def open_skipped_list(self) -> QtWidgets.QDialog:
        """A window with the whole list of skipped files, selectable; returns it (shown, not modal)."""
        box = QtWidgets.QDialog(self)
        box.setWindowTitle("Skipped files")
        text = QtWidgets.QPlainTextEdit(self.skipped_text())
        text.setReadOnly(True)
        text.setLineWrapMode(QtWidgets.QPlainTextEdit.LineWrapMode.WidgetWidth)
        close = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.StandardButton.Close)
        close.rejected.connect(box.close)
        lay = QtWidgets.QVBoxLayout(box)
        lay.addWidget(text)
        lay.addWidget(close)
        box.resize(640, 360)
        box.setAttribute(QtCore.Qt.WidgetAttribute.WA_DeleteOnClose)
        box.show()
        return box
