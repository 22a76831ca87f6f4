"""Climb settings: which families, how large, how many folds; the spec; the climb and stop buttons."""

from __future__ import annotations

from pixelfit.app._qt import QtCore, QtWidgets
from pixelfit.app.session import Session, duration_text, family_names
from pixelfit.app.widgets import Listens, Throttled
from pixelfit.errors import PixelfitError

#: Least time between two redraws of the progress bar and step line while a ladder climbs.
PROGRESS_INTERVAL_MS = 100


class ClimbPanel(Listens, QtWidgets.QGroupBox):
    """The ladder settings and the run controls; the buttons trigger the window's actions."""

    def __init__(self, session: Session, climb_action, halt_action, parent: QtWidgets.QWidget | None = None):
        super().__init__("Climb", parent)
        self.session = session
        self.checks: dict[str, QtWidgets.QCheckBox] = {}
        grid = QtWidgets.QGridLayout()
        for i, (name, desc) in enumerate(family_names()):
            cb = QtWidgets.QCheckBox(name)
            cb.setToolTip(desc)
            cb.toggled.connect(self._write_back)
            self.checks[name] = cb
            grid.addWidget(cb, i // 3, i % 3)
        self.max_size = QtWidgets.QSpinBox()
        self.max_size.setRange(0, 4096)
        self.max_size.setSpecialValueText("no cap")
        self.max_size.setToolTip("Largest size on every family's own axis: pixels read (lut, nb, logistic), "
                                 "depth (tree) or hidden units (mlp); the line below lists the sizes it gives")
        self.folds = QtWidgets.QSpinBox()
        self.folds.setRange(0, 20)
        self.folds.setSpecialValueText("off")
        self.folds.setToolTip("Cross-validation folds on the training part (needed for the recommendation)")
        self.max_size.valueChanged.connect(self._write_back)
        self.folds.valueChanged.connect(self._write_back)
        # The spec: the same three settings as `pixelfit fit --spec ... --confidence ... --budget-bytes`.
        self.spec_precision = self._unit_box("precision the detector must reach on unseen patches (off: none)")
        self.spec_recall = self._unit_box("recall the detector must reach on unseen patches (off: none)")
        self.spec_confidence = QtWidgets.QDoubleSpinBox()
        self.spec_confidence.setRange(0.5, 0.999)
        self.spec_confidence.setDecimals(3)
        self.spec_confidence.setSingleStep(0.01)
        self.spec_confidence.setValue(0.95)  # the command line's default
        self.spec_confidence.setToolTip("Confidence of the held-out lower bounds (one-sided Clopper-Pearson)")
        self.spec_budget = QtWidgets.QSpinBox()
        self.spec_budget.setRange(0, 10_000_000)
        self.spec_budget.setSpecialValueText("no budget")
        self.spec_budget.setSuffix(" bytes")
        self.spec_budget.setToolTip("Most flash bytes the detector may take; rungs above it are over budget")
        for w in (self.spec_precision, self.spec_recall, self.spec_confidence):
            w.valueChanged.connect(self._write_spec)
        self.spec_budget.valueChanged.connect(self._write_spec)
        self.answer = QtWidgets.QLabel("")
        self.answer.setWordWrap(True)
        self.answer.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        self.scheduler = QtWidgets.QLineEdit()
        self.scheduler.setPlaceholderText("this machine")
        self.scheduler.setToolTip("A Dask scheduler's address (tcp://host:8786): the lut searches run on its "
                                  "workers. Needs pip install 'pixelfit[cluster]'. Empty: this machine.")
        self.scheduler.editingFinished.connect(self._write_back)
        self.plan_label = QtWidgets.QLabel("")
        self.plan_label.setWordWrap(True)
        climb = QtWidgets.QToolButton()
        climb.setDefaultAction(climb_action)
        halt = QtWidgets.QToolButton()
        halt.setDefaultAction(halt_action)
        for b in (climb, halt):
            b.setToolButtonStyle(QtCore.Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
            b.setSizePolicy(QtWidgets.QSizePolicy.Policy.Expanding, QtWidgets.QSizePolicy.Policy.Fixed)
        self.bar = QtWidgets.QProgressBar()
        self.bar.setTextVisible(True)
        self.step = QtWidgets.QLabel("")
        self._progress_later = Throttled(self._show_progress, PROGRESS_INTERVAL_MS, self)
        form = QtWidgets.QFormLayout(self)
        form.addRow(grid)
        form.addRow("largest size", self.max_size)
        form.addRow("folds", self.folds)
        form.addRow("precision ≥", self.spec_precision)
        form.addRow("recall ≥", self.spec_recall)
        form.addRow("confidence", self.spec_confidence)
        form.addRow("flash budget", self.spec_budget)
        form.addRow("cluster", self.scheduler)
        form.addRow(self.plan_label)
        buttons = QtWidgets.QHBoxLayout()
        buttons.addWidget(climb)
        buttons.addWidget(halt)
        form.addRow(buttons)
        form.addRow(self.bar)
        form.addRow(self.step)
        form.addRow(self.answer)
        self.listen(session, "settings", self.refresh)
        self.listen(session, "prep", self.refresh)
        self.listen(session, "run", self.refresh)
        self.listen(session, "progress", self._progress_later.request)
        self.listen(session, "spec", self.refresh)
        self.listen(session, "rungs", self._show_answer)
        self.refresh()

    @staticmethod
    def _unit_box(tip: str) -> QtWidgets.QDoubleSpinBox:
        box = QtWidgets.QDoubleSpinBox()
        box.setRange(0.0, 1.0)
        box.setDecimals(3)
        box.setSingleStep(0.01)
        box.setSpecialValueText("off")
        box.setToolTip(tip)
        return box

    def _write_spec(self, *_):
        self.session.set_spec(self.spec_precision.value() or None, self.spec_recall.value() or None,
                              self.spec_confidence.value(), self.spec_budget.value() or None)

    def _show_answer(self) -> None:
        s = self.session
        a = s.answer
        if s.spec is None:
            self.answer.setText("")
        elif a is None:
            self.answer.setText(f"spec: {s.spec.describe()}; climb to answer it")
        else:
            self.answer.setText(f"<b>answer: {a['rung'] or 'none'}</b> ({a['verdict']}) — {a['reason']}")

    def _write_back(self, *_):
        s = self.session
        s.set_ladder(families=[n for n, cb in self.checks.items() if cb.isChecked()],
                     max_size=self.max_size.value() or None, folds=self.folds.value(),
                     scheduler=self.scheduler.text())

    def refresh(self) -> None:
        s = self.session
        self._progress_later.flush()  # a run that ended shows its last step
        for name, cb in self.checks.items():
            cb.blockSignals(True)
            cb.setChecked(name in s.families)
            cb.setEnabled(not s.running)
            cb.blockSignals(False)
        spec = s.spec
        for spin, value in ((self.max_size, s.max_size or 0), (self.folds, s.folds),
                            (self.spec_precision, (spec.precision or 0.0) if spec else 0.0),
                            (self.spec_recall, (spec.recall or 0.0) if spec else 0.0),
                            (self.spec_confidence, spec.confidence if spec else self.spec_confidence.value()),
                            (self.spec_budget, (spec.budget_bytes or 0) if spec else self.spec_budget.value())):
            spin.blockSignals(True)
            spin.setValue(value)
            spin.setEnabled(not s.running)
            spin.blockSignals(False)
        self._show_answer()
        if self.scheduler.text().strip() != (s.scheduler or ""):
            self.scheduler.setText(s.scheduler or "")
        self.scheduler.setEnabled(not s.running)
        if not s.running:
            try:
                self.plan_label.setText(s.plan_text())
            except PixelfitError as exc:
                self.plan_label.setText(str(exc))
        if s.running:
            self.bar.setRange(0, 0)  # busy until the first step reports the total
        elif self.bar.maximum() == 0:
            self.bar.setRange(0, 1)
            self.bar.setValue(0)

    def _show_progress(self) -> None:
        done, total, message = self.session.progress_state
        left = self.session.time_left()
        self.bar.setFormat("%p %" + ("" if left is None else f" — about {duration_text(left)} left"))
        if not total and not self.session.running:  # a new data set: nothing climbed on it yet
            self.bar.setRange(0, 1)
            self.bar.setValue(0)
        if total:
            # QProgressBar.setValue repaints at once, and a synchronous repaint also paints every
            # other dirty widget of the window (the plot and table a rung has just changed) in
            # this call. With updates off it only marks itself; turning them on queues an update,
            # painted with the rest of the window on the next turn of the event loop.
            self.bar.setUpdatesEnabled(False)
            self.bar.setRange(0, total)
            self.bar.setValue(done)
            self.bar.setUpdatesEnabled(True)
        self.step.setText(message)

