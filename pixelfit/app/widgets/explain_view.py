"""Two windows over the session: why the selected rung calls a patch as it does, and two rungs side by side.

Both only draw what the session computed with the core (``pixelfit.explain.explain_call``,
``pixelfit.evaluate.compare_calls``), the same facts ``pixelfit explain`` and ``pixelfit compare``
print.
"""

from __future__ import annotations

import html

import numpy as np

from pixelfit.app._qt import QtCore, QtGui, QtWidgets
from pixelfit.app.images import gray_qimage, side_by_side
from pixelfit.app.session import Session
from pixelfit.app.widgets import Listens, thumbnail_list
from pixelfit.text import comparison_lines, explanation_lines

#: Outline of a pixel the rule reads (on the enlarged grey patch and its bits).
OUTLINE_RGB = (232, 110, 0)
#: Thumbnails shown per side of a comparison (the counts are always complete).
MAX_COMPARE_THUMBS = 120


def patch_pair_pixmap(grey: np.ndarray, bits: np.ndarray, outlined: list[list[int]] | None,
                      scale: int = 24, gap: int = 12) -> QtGui.QPixmap:
    """The grey patch and its bits enlarged side by side, each pixel of ``outlined`` ([row, column]) framed."""
    h, w = grey.shape
    pix = QtGui.QPixmap.fromImage(gray_qimage(side_by_side(grey, np.asarray(bits, bool), scale, gap)))
    if outlined:
        painter = QtGui.QPainter(pix)
        pen = QtGui.QPen(QtGui.QColor(*OUTLINE_RGB))
        pen.setWidth(max(2, scale // 8))
        painter.setPen(pen)
        for r, c in outlined:
            for x0 in (0, w * scale + gap):
                painter.drawRect(QtCore.QRect(x0 + c * scale + 1, r * scale + 1, scale - 3, scale - 3))
        painter.end()
    return pix


def outlined_pixels(facts: dict) -> list[list[int]] | None:
    """The pixels to frame: a tree's path for this patch, else every pixel the rule reads."""
    why = facts["why"]
    if why.get("kind") == "tree":
        return [step["pixel"] for step in why["path"]]
    return facts["pixels_read"]


class ExplainView(Listens, QtWidgets.QDialog):
    """The last explained call (the session's ``explain`` event): the patch enlarged, and why."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.setWindowTitle("Why this call")
        self.heading = QtWidgets.QLabel("")
        self.heading.setWordWrap(True)
        self.picture = QtWidgets.QLabel()
        self.picture.setAlignment(QtCore.Qt.AlignmentFlag.AlignCenter)
        self.caption = QtWidgets.QLabel("")
        self.caption.setWordWrap(True)
        self.why = QtWidgets.QTextBrowser()
        self.why.setMinimumWidth(560)
        lay = QtWidgets.QVBoxLayout(self)
        lay.addWidget(self.heading)
        lay.addWidget(self.picture)
        lay.addWidget(self.caption)
        lay.addWidget(self.why, 1)
        self.resize(660, 640)
        self.listen(session, "explain", self.refresh)
        self.refresh()

    def refresh(self) -> None:
        e = self.session.explanation
        if e is None:
            self.heading.setText("Click a patch thumbnail to see why the selected rung calls it as it does.")
            self.picture.clear()
            self.caption.setText("")
            self.why.clear()
            return
        ds = self.session.run_prep.dataset if self.session.run_prep is not None else self.session.dataset
        truly = self.session.run_prep is not None and e["label"] == self.session.run_prep.positive
        verdict = "right" if e["positive"] == truly else "wrong"
        self.heading.setText(f"<b>{html.escape(e['name'])}</b> ({html.escape(e['label'])}, {e['subset']} patch): "
                             f"{e['rung']} calls it <b>{html.escape(e['call'])}</b> — {verdict}")
        if ds is not None:
            grey = ds.images[e["row"]]
            scale = max(6, min(28, 300 // max(grey.shape)))
            self.picture.setPixmap(patch_pair_pixmap(grey, np.asarray(e["bits"], bool), outlined_pixels(e), scale))
        framed = outlined_pixels(e)
        self.caption.setText("grey patch | its bits; framed: "
                             + ("every pixel (the rule reads the whole patch)" if framed is None else
                                "the pixels the tree read on its way to the leaf" if e["why"]["kind"] == "tree" else
                                "the pixels the rule reads" if framed else "nothing (the rule reads no pixel)"))
        self.why.setHtml("<p style='font-family: monospace; white-space: pre-wrap'>"
                         + html.escape("\n".join(explanation_lines(e))) + "</p>")


def _confusion_html(name: str, cf: dict, threshold: float) -> str:
    return (f"<b>{html.escape(name)}</b> at threshold {threshold:.3f}<table border='1' cellpadding='4' "
            f"cellspacing='0'><tr><th></th><th>predicted +</th><th>predicted −</th></tr>"
            f"<tr><th>actual +</th><td align='right'>{cf['tp']}</td><td align='right'>{cf['fn']}</td></tr>"
            f"<tr><th>actual −</th><td align='right'>{cf['fp']}</td><td align='right'>{cf['tn']}</td></tr></table>")


class CompareView(Listens, QtWidgets.QDialog):
    """The two rungs of the session's comparison side by side on the held-out patches."""

    def __init__(self, session: Session, parent: QtWidgets.QWidget | None = None):
        super().__init__(parent)
        self.session = session
        self.setWindowTitle("Two rungs side by side")
        self.left = QtWidgets.QLabel("")
        self.right = QtWidgets.QLabel("")
        self.test = QtWidgets.QLabel("")
        self.test.setWordWrap(True)
        self.a_label = QtWidgets.QLabel("")
        self.b_label = QtWidgets.QLabel("")
        self.a_list = thumbnail_list(3)
        self.b_list = thumbnail_list(3)
        grid = QtWidgets.QGridLayout(self)
        grid.addWidget(self.left, 0, 0)
        grid.addWidget(self.right, 0, 1)
        grid.addWidget(self.test, 1, 0, 1, 2)
        grid.addWidget(self.a_label, 2, 0)
        grid.addWidget(self.b_label, 2, 1)
        grid.addWidget(self.a_list, 3, 0)
        grid.addWidget(self.b_list, 3, 1)
        grid.setRowStretch(3, 1)
        for lst in (self.a_list, self.b_list):
            lst.itemClicked.connect(lambda item: session.explain(item.data(QtCore.Qt.ItemDataRole.UserRole)))
        self.resize(760, 620)
        self.listen(session, "compare", self.refresh)
        self.listen(session, "threshold", self.refresh)
        self.listen(session, "spec", self.refresh)  # a spec moves the rungs' thresholds
        self.refresh()

    def refresh(self) -> None:
        c = self.session.comparison()
        for lst in (self.a_list, self.b_list):
            lst.clear()
        if c is None:
            self.left.setText("Ctrl+click a second rung in the ladder table or plot to compare it with the "
                              "selected one.")
            for w in (self.right, self.test, self.a_label, self.b_label):
                w.setText("")
            return
        a, b = c["rung_a"], c["rung_b"]
        self.left.setText(_confusion_html(a, c["a"], c["threshold_a"]))
        self.right.setText(_confusion_html(b, c["b"], c["threshold_b"]))
        self.test.setText("<br>".join(html.escape(line) for line in comparison_lines(c, a, b)[4:]))
        ds = self.session.run_prep.dataset if self.session.run_prep is not None else None
        for lst, label, rows, who in ((self.a_list, self.a_label, c["rows_only_a_right"], a),
                                      (self.b_list, self.b_label, c["rows_only_b_right"], b)):
            more = f", first {MAX_COMPARE_THUMBS} shown" if len(rows) > MAX_COMPARE_THUMBS else ""
            label.setText(f"only {who} right: {len(rows)}{more}")
            if ds is None or self.session.run_prep is None:
                continue
            h, w = ds.shape
            lst.setIconSize(QtCore.QSize(2 * w * 3 + 2, h * 3))
            for i in rows[:MAX_COMPARE_THUMBS]:
                bits = self.session.run_prep.binarizer.transform(ds.images[i:i + 1])[0]
                item = QtWidgets.QListWidgetItem(QtGui.QPixmap.fromImage(gray_qimage(side_by_side(ds.images[i], bits, 3))), "")
                item.setToolTip(f"{ds.names[i]}: {ds.labels[i]}")
                item.setData(QtCore.Qt.ItemDataRole.UserRole, int(i))
                lst.addItem(item)
