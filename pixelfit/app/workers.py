"""The ladder worker: a QThread that iterates :func:`pixelfit.ladder.run_ladder` and only sends data.

The worker never touches a widget or the session. Each progress record goes out as a signal,
which Qt queues to the GUI thread; cancelling sets a plain ``threading.Event``, which the ladder polls
between steps through its cancel callback (no Qt call is made from the worker thread). Errors come back as a message string.

While the worker runs Python it holds the interpreter lock, and every Python call the GUI thread
makes meanwhile (a slot, a plot item's paint method) waits for it. No single call of the ladder
holds it for long (at most 14 ms measured), so the window stays responsive by making few Python
calls per update, not by a shorter ``sys.setswitchinterval``, which measured no better than the
default here; see benchmarks/README.md (bench_gui_stall.py).
"""

from __future__ import annotations

import threading
import traceback

from pixelfit.app._qt import QtCore
from pixelfit.app.session import RunSpec
from pixelfit.errors import PixelfitError
from pixelfit.ladder import LadderCancelled, run_ladder


class LadderWorker(QtCore.QThread):
    """Trains the rungs of one :class:`RunSpec`.

    Signals
    -------
    progressed(done, total, message)
    rung_ready(rung)
        a finished :class:`pixelfit.ladder.Rung`; the worker keeps no reference to it afterwards
    ended(outcome, detail)
        outcome is 'finished', 'cancelled' or 'failed'; sent exactly once, last
    """

    progressed = QtCore.Signal(int, int, str)
    rung_ready = QtCore.Signal(object)
    ended = QtCore.Signal(str, str)

    def __init__(self, spec: RunSpec, parent: QtCore.QObject | None = None):
        super().__init__(parent)
        self._spec = spec
        self._cancel = threading.Event()

    def cancel(self) -> None:
        self._cancel.set()

    def start_unless_cancelled(self) -> None:
        """Start the thread; a run cancelled before it began ends at once, as 'cancelled'."""
        if self.isRunning() or self.isFinished():
            return
        if self._cancel.is_set():
            self.ended.emit("cancelled", "")
        else:
            self.start()

    def run(self) -> None:  # runs in the worker thread
        spec = self._spec
        try:
            for pr in run_ladder(spec.prep, spec.plan, spec.folds, spec.seed, cancel=self._cancel.is_set):
                if pr.rung is not None:
                    self.rung_ready.emit(pr.rung)
                self.progressed.emit(pr.done, pr.total, pr.message)
        except LadderCancelled:
            self.ended.emit("cancelled", "")
        except PixelfitError as exc:
            self.ended.emit("failed", str(exc))
        except Exception as exc:  # a bug in a model must not take the window down with it
            traceback.print_exc()
            self.ended.emit("failed", f"internal error ({type(exc).__name__}: {exc})")
        else:
            self.ended.emit("finished", "")

    def stop(self, timeout_ms: int = 60_000) -> bool:
        """Ask the run to stop and wait for the thread to end; True when it has ended."""
        self.cancel()
        return self.wait(timeout_ms)
