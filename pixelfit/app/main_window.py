"""The main window: the panels around one :class:`~pixelfit.app.session.Session`, the actions, the
ladder worker's lifetime, and the application entry point."""

from __future__ import annotations

import gc
import sys
import traceback
from collections.abc import Callable
from pathlib import Path

from pixelfit import ladder_process
from pixelfit.app._qt import QtCore, QtGui, QtWidgets
from pixelfit.app.session import Session, rule_file_name
from pixelfit.app.widgets.check_view import DataCheckView
from pixelfit.app.widgets.checks_view import ChecksView
from pixelfit.app.widgets.climb_panel import ClimbPanel
from pixelfit.app.widgets.explain_view import CompareView, ExplainView
from pixelfit.app.widgets.gallery import PatchGallery
from pixelfit.app.widgets.inspector import RungInspector
from pixelfit.app.widgets.ladder_view import AxisChooser, ErrorPlot, LadderTable
from pixelfit.app.widgets.prep_panel import PixelPrep
from pixelfit.app.widgets.source_panel import ImportReport
from pixelfit.app.workers import LadderWorker, run_in_thread

APP_NAME = "pixelfit"
DEMO_SET = "bottle-caps"
RECENT_KEY = "sources/recent"
#: The folder the last file was saved to; save dialogs start there.
SAVE_DIR_KEY = "files/last_save_dir"
MAX_RECENT = 8
#: Wait between pressing climb and starting its trainer, so the ladder tab's first paints (up to
#: about 60 ms here) do not share the CPUs with the child's start.
START_DELAY_MS = 150
Key = QtGui.QKeySequence

#: ask(title, question) -> True to go ahead; the window's confirmation dialogs go through it.
AskFn = Callable[[str, str], bool]


class MessageStrip(QtWidgets.QFrame):
    """A line above the panels for the latest message; errors stay until dismissed or replaced."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self.text = QtWidgets.QLabel("")
        self.text.setWordWrap(True)
        self.text.setTextInteractionFlags(QtCore.Qt.TextInteractionFlag.TextSelectableByMouse)
        close = QtWidgets.QToolButton()
        close.setText("✕")
        close.setAutoRaise(True)
        close.clicked.connect(self.hide)
        lay = QtWidgets.QHBoxLayout(self)
        lay.setContentsMargins(8, 3, 4, 3)
        lay.addWidget(self.text, 1)
        lay.addWidget(close)
        self.error = False
        self.hide()

    def show_message(self, text: str, error: bool) -> None:
        self.error = error
        self.text.setText(text)
        colour = "#f7dede" if error else "#e4eef8"
        self.setStyleSheet(f"MessageStrip {{ background: {colour}; border-radius: 3px; }}")
        self.show()


class MainWindow(QtWidgets.QMainWindow):
    """pixelfit's window. ``settings`` keeps the recent sources; ``ask`` answers confirmations."""

    def __init__(self, session: Session | None = None, settings: QtCore.QSettings | None = None,
                 ask: AskFn | None = None):
        super().__init__()
        self.session = session or Session()
        self.settings = settings or QtCore.QSettings(APP_NAME, APP_NAME)
        self.ask = ask or self._ask_dialog
        self.worker: LadderWorker | None = None
        # Reading and preparing patches run on a worker thread while the event loop turns.
        self.session.runner = lambda job: run_in_thread(job, self)
        self._close_when_ready = False
        self.setWindowTitle(APP_NAME)
        self.setAcceptDrops(True)
        self._make_actions()
        s = self.session

        self.report = ImportReport(s)
        self.prep_panel = PixelPrep(s)
        self.climb = ClimbPanel(s, self.act_climb, self.act_halt)
        left = QtWidgets.QWidget()
        left_lay = QtWidgets.QVBoxLayout(left)
        left_lay.setContentsMargins(2, 2, 2, 2)
        for w in (self.report, self.prep_panel, self.climb):
            left_lay.addWidget(w)
        left_lay.addStretch(1)
        left_scroll = QtWidgets.QScrollArea()
        left_scroll.setWidget(left)
        left_scroll.setWidgetResizable(True)
        left_scroll.setMinimumWidth(290)
        left_scroll.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarPolicy.ScrollBarAlwaysOff)

        self.error_plot = ErrorPlot(s)
        self.axis_chooser = AxisChooser(s)
        plot_box = QtWidgets.QWidget()
        plot_lay = QtWidgets.QVBoxLayout(plot_box)
        plot_lay.setContentsMargins(0, 0, 0, 0)
        axis_row = QtWidgets.QHBoxLayout()
        axis_row.addWidget(QtWidgets.QLabel("x axis:"))
        axis_row.addWidget(self.axis_chooser)
        axis_row.addStretch(1)
        plot_lay.addLayout(axis_row)
        plot_lay.addWidget(self.error_plot, 1)
        self.table = LadderTable(s)
        ladder = QtWidgets.QSplitter(QtCore.Qt.Orientation.Vertical)
        ladder.addWidget(plot_box)
        ladder.addWidget(self.table)
        ladder.setSizes([380, 420])
        self.gallery = PatchGallery(s)
        self.tabs = QtWidgets.QTabWidget()
        self.tabs.addTab(ladder, "Ladder")
        self.tabs.addTab(self.gallery, "Patches")
        self.check_view = DataCheckView(s)
        self.tabs.addTab(self.check_view, "Data check")
        self.checks_view = ChecksView(s)
        self.tabs.addTab(self.checks_view, "Will it hold up?")
        self.inspector = RungInspector(s)
        inspector_box = QtWidgets.QGroupBox("Rung inspector")
        QtWidgets.QVBoxLayout(inspector_box).addWidget(self.inspector)

        split = QtWidgets.QSplitter(QtCore.Qt.Orientation.Horizontal)
        split.addWidget(left_scroll)
        split.addWidget(self.tabs)
        split.addWidget(inspector_box)
        split.setStretchFactor(1, 3)
        split.setStretchFactor(2, 2)
        split.setSizes([300, 820, 560])
        self.strip = MessageStrip()
        central = QtWidgets.QWidget()
        lay = QtWidgets.QVBoxLayout(central)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addWidget(self.strip)
        lay.addWidget(split, 1)
        self.setCentralWidget(central)
        self.explain_view = ExplainView(s, self)
        self.compare_view = CompareView(s, self)
        self.panels = [self.report, self.prep_panel, self.climb, self.error_plot, self.axis_chooser, self.table,
                       self.gallery, self.check_view, self.inspector, self.checks_view, self.explain_view,
                       self.compare_view]
        self._unsubscribe = [s.subscribe("message", self._message), s.subscribe("run", self._update_actions),
                             s.subscribe("selection", self._update_actions),
                             s.subscribe("prep", self._update_actions), s.subscribe("rungs", self._update_actions),
                             s.subscribe("dataset", self._dataset_opened),
                             s.subscribe("explain", self._show_explanation), s.subscribe("compare", self._show_comparison),
                             s.subscribe("run", self._collector_for_run), s.subscribe("busy", self._busy_changed)]
        self._update_actions()
        self.resize(1680, 1000)
        # The trainer's fork server imports scikit-learn in its own process, so the first climb
        # does not wait one to two seconds for it.
        QtCore.QTimer.singleShot(0, self, _warm_up_trainer)
        # One full collection while the window comes up, then the libraries' objects are frozen:
        # later collections walk only what the session makes (see _collector_for_run).
        QtCore.QTimer.singleShot(0, self, self._collect_and_freeze)

    # ---- actions ------------------------------------------------------------------------------

    def _make_actions(self) -> None:
        def action(text: str, slot, shortcuts=(), tip: str = "", icon=None) -> QtGui.QAction:
            a = QtGui.QAction(text, self)
            if shortcuts:
                a.setShortcuts([Key(k) for k in shortcuts])
            if tip:
                a.setStatusTip(tip)
                a.setToolTip(f"{tip} ({a.shortcut().toString(Key.SequenceFormat.NativeText)})" if shortcuts else tip)
            if icon is not None:
                a.setIcon(self.style().standardIcon(icon))
            a.triggered.connect(slot)
            return a

        Std = Key.StandardKey
        Pix = QtWidgets.QStyle.StandardPixmap
        self.act_open = action("Open patch folder…", self.choose_folder, [Std.Open],
                               "Open a folder of labeled patches", Pix.SP_DirOpenIcon)
        self.act_open_npz = action("Open .npz file…", self.choose_npz, ["Ctrl+Shift+O"],
                                   "Open patches stored in an .npz array file")
        self.act_climb = action("Climb", self.start_climb, ["Ctrl+R"], "Train the ladder", Pix.SP_MediaPlay)
        self.act_halt = action("Stop", self.halt_climb, ["Ctrl+.", "Esc"],
                               "Stop the ladder after the current step; finished rungs are kept", Pix.SP_MediaStop)
        self.act_save = action("Save rule…", self.choose_rule_path, [Std.Save],
                               "Save the selected rung as a rule file", Pix.SP_DialogSaveButton)
        self.act_export = action("Export C…", self.choose_c_path, ["Ctrl+E"],
                                 "Write the selected rung as a C header with test vectors")
        self.act_report = action("Export review report…", self.choose_report_path, ["Ctrl+Shift+E"],
                                 "Write one self-contained HTML page of the run for a reviewer")
        self.act_quit = action("Quit", self.close, [Std.Quit])
        self.recent_menu = QtWidgets.QMenu("Recent sources", self)
        self.recent_menu.aboutToShow.connect(self._fill_recent)

        bar = self.menuBar()
        m = bar.addMenu("&Patches")
        m.addActions([self.act_open, self.act_open_npz])
        m.addMenu(self.recent_menu)
        m.addSeparator()
        m.addAction(self.act_quit)
        m = bar.addMenu("&Ladder")
        m.addActions([self.act_climb, self.act_halt])
        m.addSeparator()
        m.addAction(self.act_report)
        m = bar.addMenu("&Rule")
        m.addActions([self.act_save, self.act_export])
        tb = self.addToolBar("main")
        tb.setObjectName("main-toolbar")
        tb.setMovable(False)
        tb.setToolButtonStyle(QtCore.Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
        tb.addActions([self.act_open, self.act_climb, self.act_halt, self.act_save])

    def _update_actions(self, *_) -> None:
        s = self.session
        self.act_climb.setEnabled(not s.running and not s.preparing and s.prep is not None)
        self.act_halt.setEnabled(s.running)
        for a in (self.act_open, self.act_open_npz):
            a.setEnabled(not s.running and not s.preparing)
        self.act_save.setEnabled(s.selected is not None)
        self.act_export.setEnabled(s.selected is not None)
        self.act_report.setEnabled(not s.running and bool(s.rungs))
        title = APP_NAME if s.dataset is None else f"{Path(s.dataset.source).name} — {APP_NAME}"
        self.setWindowTitle(title)

    def _busy_changed(self) -> None:
        self._update_actions()
        if self.session.preparing:
            self.statusBar().showMessage("preparing the patches…")
        else:
            self.statusBar().clearMessage()
            QtCore.QTimer.singleShot(250, self._collect_and_freeze)
            if self._close_when_ready:
                self._close_when_ready = False
                QtCore.QTimer.singleShot(0, self, self.close)

    def _message(self, text: str, error: bool) -> None:
        self.strip.show_message(text, error)
        self.statusBar().showMessage(text, 0 if error else 8000)

    def _ask_dialog(self, title: str, question: str) -> bool:
        B = QtWidgets.QMessageBox.StandardButton
        return QtWidgets.QMessageBox.question(self, title, question, B.Yes | B.No, B.No) == B.Yes

    # ---- sources ------------------------------------------------------------------------------

    def choose_folder(self) -> None:
        path = QtWidgets.QFileDialog.getExistingDirectory(self, "Open a folder of labeled patches", self._last_dir())
        if path:
            self.open_path(path)

    def choose_npz(self) -> None:
        path, _ = QtWidgets.QFileDialog.getOpenFileName(self, "Open an .npz file of patches", self._last_dir(),
                                                        "Patch arrays (*.npz)")
        if path:
            self.open_path(path)

    def _last_dir(self) -> str:
        recent = self.recent_sources()
        return str(Path(recent[0]).parent) if recent else str(Path.home())

    def open_path(self, path: str | Path) -> bool:
        """Open a folder or .npz; asks first when trained rungs would be dropped unsaved."""
        if self.session.running:
            self.session.say("a ladder is running; stop it before opening other patches", True)
            return False
        if self.session.unsaved and not self.ask(
                "Drop the trained rungs?", f"{len(self.session.rungs)} trained rungs are not saved as rule files. "
                "Open other patches and drop them?"):
            return False
        QtWidgets.QApplication.setOverrideCursor(QtCore.Qt.CursorShape.WaitCursor)
        try:
            ok = self.session.open(path)
        finally:
            QtWidgets.QApplication.restoreOverrideCursor()
        if ok:
            self._remember(str(Path(path).resolve()))
        return ok

    def _show_explanation(self) -> None:
        if self.session.explanation is not None:
            self.explain_view.show()
            self.explain_view.raise_()

    def _show_comparison(self) -> None:
        if self.session.compared is not None:
            self.compare_view.show()
            self.compare_view.raise_()

    def _collector_for_run(self) -> None:
        """Keep Python's full garbage collection out of the window's work.

        A full collection walks every object the window holds (data set, rungs, maps, plots, the
        libraries' own): over 100 ms mid-climb, and as long after each climb when everything was
        unfrozen and collected (benchmarks/bench_gui_million.py). So what exists when a ladder starts
        is frozen (left out of collections), and a quarter second after a climb or a preparation
        ends, what was made since is collected and frozen too. Frozen objects are still freed by
        reference counting as ever (the patches, the prepared matrices, the models); only garbage
        in reference cycles among them waits until the window is released.
        """
        if self.session.running:
            gc.freeze()
        else:
            QtCore.QTimer.singleShot(250, self._collect_and_freeze)

    def _collect_and_freeze(self) -> None:
        if not self.session.running and not self.session.preparing:
            gc.collect()  # frozen objects are left out: this walks only what was made since
            gc.freeze()

    def _dataset_opened(self) -> None:
        self.tabs.setCurrentWidget(self.gallery)
        self._update_actions()

    def recent_sources(self) -> list[str]:
        value = self.settings.value(RECENT_KEY, [])
        if isinstance(value, str):  # QSettings returns a lone string for a one-item list
            value = [value]
        return [str(v) for v in (value or [])]

    def _remember(self, path: str) -> None:
        recent = [path] + [p for p in self.recent_sources() if p != path]
        self.settings.setValue(RECENT_KEY, recent[:MAX_RECENT])

    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        recent = self.recent_sources()
        if not recent:
            self.recent_menu.addAction("(none yet)").setEnabled(False)
        for p in recent:
            self.recent_menu.addAction(p, lambda p=p: self.open_path(p))

    def dragEnterEvent(self, event: QtGui.QDragEnterEvent) -> None:
        if event.mimeData().hasUrls() and any(u.isLocalFile() for u in event.mimeData().urls()):
            event.acceptProposedAction()

    def dropEvent(self, event: QtGui.QDropEvent) -> None:
        local = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if local:
            event.acceptProposedAction()
            self.open_path(local[0])

    # ---- the ladder run -----------------------------------------------------------------------

    def start_climb(self) -> bool:
        if self.worker is not None:
            return False
        if self.session.unsaved and not self.ask(
                "Replace the trained rungs?", f"{len(self.session.rungs)} trained rungs are not saved as rule files. "
                "Climb again and replace them?"):
            return False
        spec = self.session.start_run()
        if spec is None:
            return False
        w = LadderWorker(spec, self)
        w.progressed.connect(self.session.report_progress)
        w.rung_ready.connect(self.session.add_rung)
        w.checks_ready.connect(self.session.set_checks)
        w.ended.connect(self._climb_ended)
        self.worker = w
        # The ladder tab comes up on the next turn of the event loop: the run's start has cleared
        # the old rungs (cheap while the tab is hidden), and the tab's first paint of the plot and
        # table gets a turn of its own instead of adding to this one; together they were the
        # longest stall of a climb (see benchmarks/bench_gui_stall.py). The trainer starts once
        # that paint is done, so the child's start does not compete with it for a CPU.
        QtCore.QTimer.singleShot(0, self, lambda: self.tabs.setCurrentIndex(0))
        QtCore.QTimer.singleShot(START_DELAY_MS, w, w.start_unless_cancelled)
        return True

    def halt_climb(self) -> None:
        if self.worker is not None:
            self.worker.cancel()
            self.session.say("stopping after the current step…")

    def _climb_ended(self, outcome: str, detail: str) -> None:
        w, self.worker = self.worker, None
        if w is not None:
            w.wait()
            w.deleteLater()
        self.session.end_run(outcome, detail)

    def stop_worker(self) -> None:
        """Cancel a running ladder and wait for its thread; used on close and in test teardown."""
        w, self.worker = self.worker, None
        if w is None:
            return
        for sig in (w.progressed, w.rung_ready, w.checks_ready, w.ended):
            sig.disconnect()
        if not w.stop():
            print("pixelfit: the ladder thread did not stop in time", file=sys.stderr)
        if self.session.running:
            self.session.end_run("cancelled")

    # ---- rule files ---------------------------------------------------------------------------

    def save_dir(self) -> str:
        """Where save dialogs start: the folder last saved to, else the user's documents folder;
        never a demo-set folder."""
        from pixelfit.demo import demo_folders

        last = self.settings.value(SAVE_DIR_KEY, "")
        if last and Path(str(last)).is_dir():
            here = Path(str(last)).resolve()
            if not any(here == d.resolve() or d.resolve() in here.parents for d in demo_folders()):
                return str(here)
        docs = QtCore.QStandardPaths.writableLocation(QtCore.QStandardPaths.StandardLocation.DocumentsLocation)
        return docs if docs and Path(docs).is_dir() else str(Path.home())

    def _ask_save_path(self, title: str, name: str, filter_: str) -> str:
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, title, str(Path(self.save_dir()) / name), filter_)
        if path:
            self.settings.setValue(SAVE_DIR_KEY, str(Path(path).resolve().parent))
        return path

    def choose_rule_path(self) -> None:
        r = self.session.selected
        if r is None:
            return
        path = self._ask_save_path(f"Save {r.key} as a rule file", rule_file_name(r), "Rule files (*.json)")
        if path:
            self.session.save_selected(path)

    def choose_c_path(self) -> None:
        r = self.session.selected
        if r is None:
            return
        path = self._ask_save_path(f"Export {r.key} as C (its rule file {rule_file_name(r)} goes beside it)",
                                   rule_file_name(r, ".h"), "C headers (*.h)")
        if path:
            self.session.export_selected_c(path)

    def choose_report_path(self) -> None:
        if not self.session.rungs:
            return
        path = self._ask_save_path("Export the review report", "report.html", "HTML pages (*.html)")
        if path:
            self.session.export_report(path)

    # ---- closing ------------------------------------------------------------------------------

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:
        s = self.session
        if s.preparing:  # a job's thread is still running: close once it has returned
            self._close_when_ready = True
            event.ignore()
            return
        if s.running and not self.ask("Stop the ladder?", "A ladder is still climbing. Stop it and close?"):
            event.ignore()
            return
        if not s.running and s.unsaved and not self.ask(
                "Close without saving?", f"{len(s.rungs)} trained rungs are not saved as rule files. "
                "Close and lose them?"):
            event.ignore()
            return
        self.stop_worker()
        self.release()
        event.accept()

    def release(self) -> None:
        """Drop every subscription to the session (the panels go with the window)."""
        for off in self._unsubscribe:
            off()
        self._unsubscribe = []
        for p in self.panels:
            p.detach()
        gc.unfreeze()  # what this window froze becomes collectable again


def _open_initial(window: MainWindow, path: str | None) -> None:
    from pixelfit.demo import resolve_dataset_path

    target = resolve_dataset_path(path or DEMO_SET)
    if target.exists():
        window.open_path(target)
    elif path:
        window.open_path(path)  # says in the window why it cannot be opened
    else:
        window.session.say(f"the bundled demo set {DEMO_SET!r} is not here; open a folder of patches")
        QtCore.QTimer.singleShot(0, window.choose_folder)


def _warm_up_trainer() -> None:
    try:
        ladder_process.warm_up()
    except OSError as exc:  # the climb will start its trainer itself, and report if it cannot
        print(f"pixelfit: could not start the trainer ahead of time: {exc}", file=sys.stderr)


def run_application(path: str | None = None, argv: list[str] | None = None) -> int:
    """Create the application (or reuse one), show the window on ``path`` or the demo set, run."""
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(argv or [sys.argv[0]])
    app.setApplicationName(APP_NAME)
    app.setOrganizationName(APP_NAME)
    window = MainWindow()

    def report(kind, value, tb):  # a bug in a slot is shown in the window, not fatal
        traceback.print_exception(kind, value, tb)
        window.session.say(f"internal error ({kind.__name__}: {value}); the session goes on", True)

    sys.excepthook = report
    window.show()
    QtCore.QTimer.singleShot(0, lambda: _open_initial(window, path))
    return int(app.exec())
