"""The ladder worker: a QThread that relays :func:`pixelfit.ladder_process.run_ladder_in_process`.

The training itself runs in a child process (see :mod:`pixelfit.ladder_process` for why): a
training thread in this process would hold the interpreter lock most of the time, and every Python
call the GUI thread makes (a slot, a plot item's paint method) would wait for it; measured, that
made stalls of 50 to 770 ms while a ladder climbed (benchmarks/bench_gui_stall.py). This thread
only waits on the child's pipe, which releases the lock, and turns each record into a signal that
Qt queues to the GUI thread.

The worker never touches a widget or the session. Cancelling sets a plain ``threading.Event``,
which the relay forwards to the child; the ladder there polls it between steps. Errors, and a
child that dies (a crash, the system killing it for memory), come back as a message string.
"""

from __future__ import annotations

import sys
import threading
import traceback
from collections.abc import Callable

from pixelfit.app._qt import QtCore
from pixelfit.app.session import RunSpec
from pixelfit.errors import PixelfitError
from pixelfit.ladder import LadderCancelled, measure_integer
from pixelfit.ladder_process import TrainerLost, run_ladder_in_process
from pixelfit.robustness import CheckProgress


class LadderWorker(QtCore.QThread):
    """Trains the rungs of one :class:`RunSpec`.

    Signals
    -------
    progressed(done, total, message)
    rung_ready(rung)
        a finished :class:`pixelfit.ladder.Rung`; the worker keeps no reference to it afterwards
    checks_ready(checks)
        the :class:`pixelfit.robustness.Checks` finished so far by the post-pass after the ladder
    ended(outcome, detail)
        outcome is 'finished', 'cancelled' or 'failed'; sent exactly once, last
    """

    progressed = QtCore.Signal(int, int, str)
    rung_ready = QtCore.Signal(object)
    checks_ready = QtCore.Signal(object)
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
            for pr in run_ladder_in_process(spec.prep, spec.plan, spec.folds, spec.seed, cancel=self._cancel.is_set,
                                            scheduler=spec.scheduler, checks=spec.checks,
                                            grey_test=spec.held_out_grey()):
                if pr.rung is not None:
                    # The integer predictor's held-out check (a tree walks every held-out patch) on
                    # this thread, not the GUI thread's.
                    measure_integer(pr.rung, spec.prep.X_test, spec.prep.y_test)
                    self.rung_ready.emit(pr.rung)
                if isinstance(pr, CheckProgress) and pr.checks is not None:
                    self.checks_ready.emit(pr.checks)
                self.progressed.emit(pr.done, pr.total, pr.message)
        except LadderCancelled:
            self.ended.emit("cancelled", "")
        except PixelfitError as exc:
            self.ended.emit("failed", str(exc))
        except TrainerLost as exc:
            print(f"pixelfit: {exc}", file=sys.stderr)
            self.ended.emit("failed", str(exc).splitlines()[0])
        except Exception as exc:  # a bug in a model must not take the window down with it
            traceback.print_exc()
            self.ended.emit("failed", f"internal error ({type(exc).__name__}: {exc})")
        else:
            self.ended.emit("finished", "")

    def stop(self, timeout_ms: int = 60_000) -> bool:
        """Ask the run to stop and wait for the thread to end; True when it has ended."""
        self.cancel()
        return self.wait(timeout_ms)


class Job(QtCore.QThread):
    """Runs one function on its own thread; :func:`run_in_thread` waits for it with the event loop turning."""

    def __init__(self, work: Callable[[], object], parent: QtCore.QObject | None = None):
        super().__init__(parent)
        self._work = work
        self.result: object = None
        self.error: BaseException | None = None

    def run(self) -> None:  # runs in the job's thread
        try:
            self.result = self._work()
        except BaseException as exc:  # noqa: BLE001 - raised again on the GUI thread by run_in_thread
            self.error = exc


def run_in_thread(work: Callable[[], object], parent: QtCore.QObject | None = None) -> object:
    """``work()`` on a worker thread; meanwhile this (GUI) thread's event loop keeps turning, so the
    window paints and its timers fire. Returns its result, or raises what it raised.

    The session's :attr:`~pixelfit.app.session.Session.runner` in the window: the session's long jobs
    (reading a file, preparing its patches) read as plain calls. The callers disable what could start
    a second job while one runs (``Session.preparing``).
    """
    job = Job(work, parent)
    loop = QtCore.QEventLoop()
    job.finished.connect(loop.quit)
    job.start()
    loop.exec()  # finished is queued to this thread, so it reaches the loop even when the job ends first
    job.wait()
    job.deleteLater()
    if job.error is not None:
        raise job.error
    return job.result
