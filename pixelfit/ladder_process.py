"""Run the ladder in a separate process, with the same generator contract as :func:`run_ladder`.

Why a process: training is mostly Python (scikit-learn's input checks, the estimators' own loops),
and a thread running it holds the interpreter lock most of the time. In a program that must stay
responsive (the desktop window), every Python call its event loop makes while a training thread
runs has to wait for that lock, so paints and slots take several times their own cost. A separate
process has its own interpreter: the caller's thread only waits on a pipe, which releases the lock.
A crash in native code, or the system killing the trainer for memory, also ends that process and
not the caller, which sees a :class:`TrainerLost` instead.

Start method: ``forkserver`` where the platform has it (Linux, macOS), with this module preloaded in
the server so that each run forks from an interpreter that has already imported scikit-learn (a
fresh interpreter needs one to two seconds for that); ``spawn`` elsewhere. ``fork`` is never used:
forking a process that runs other threads (a GUI's, BLAS's) can deadlock the child.
:func:`warm_up` starts the server ahead of the first run.

What crosses the pipe is plain data: the prepared training and held-out matrices go in (the raw
grey images stay behind), :class:`Progress` records come out, pickled by :mod:`multiprocessing`
between two processes of the same program. Nothing a user hands in is unpickled.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
import multiprocessing.connection
import threading
import time
import traceback
from collections.abc import Iterator
from typing import Any

import numpy as np

from pixelfit import errors
from pixelfit.data import Dataset
from pixelfit.ladder import CancelFn, LadderCancelled, Prepared, Progress, conclude, run_ladder
from pixelfit.robustness import CheckSettings, run_checks

#: How often the caller checks its cancel callback and the trainer's liveness while it waits (s).
POLL_S = 0.05
#: How long a cancelled trainer gets to stop on its own before it is terminated (s).
STOP_GRACE_S = 5.0

#: Said when a trainer dies before its first word, the usual cause of which is a script without a
#: main guard: the child re-imports the calling script, as multiprocessing's spawn and forkserver do.
MAIN_GUARD_HINT = ("if this is a script that runs pixelfit, keep its top-level code under "
                   "`if __name__ == '__main__':`, as Python's multiprocessing requires")

_context_lock = threading.Lock()
_context: Any = None  # a SpawnContext or ForkServerContext; typeshed's BaseContext has no Process


class TrainerLost(RuntimeError):
    """The training process failed in a way the ladder could not report (a crash, a kill, a bug)."""


def _get_context() -> Any:
    global _context
    with _context_lock:
        if _context is None:
            if "forkserver" in multiprocessing.get_all_start_methods():
                server = multiprocessing.get_context("forkserver")
                server.set_forkserver_preload([__name__])
                _context = server
            else:
                _context = multiprocessing.get_context("spawn")
        return _context


def start_method() -> str:
    """The start method runs use here: ``forkserver`` or ``spawn``."""
    return _get_context().get_start_method()


def warm_up() -> None:
    """Start the fork server now (where there is one), so the first run does not wait for its imports.

    Returns at once; the server imports in its own process. Safe to call more than once.
    """
    ctx = _get_context()
    if ctx.get_start_method() == "forkserver":
        from multiprocessing import forkserver

        forkserver.ensure_running()


def slim(prep: Prepared) -> Prepared:
    """``prep`` without the raw grey images, names and split mask: what a trainer needs, no more."""
    h, w = prep.shape
    ds = prep.dataset
    bare = Dataset(images=np.empty((0, h, w), np.uint8), labels=np.empty(0, dtype=ds.labels.dtype), names=[],
                   source=ds.source, layout=ds.layout)
    return dataclasses.replace(prep, dataset=bare, test_mask=np.empty(0, dtype=bool))


def _serve(conn: multiprocessing.connection.Connection, prep: Prepared, rungs: list[tuple[str, int]], folds: int,
           seed: int, scheduler: str | None = None, checks: CheckSettings | None = None,
           grey_test: np.ndarray | None = None) -> None:
    """The trainer's main: run the ladder, send each record, stop when asked. Runs in the child."""
    asked = [False]

    def cancel() -> bool:
        if not asked[0] and conn.poll():
            try:
                asked[0] = conn.recv() == "cancel"
            except (EOFError, OSError):  # the caller has gone (killed, crashed): nobody waits for the rest
                asked[0] = True
        return asked[0]

    try:
        try:
            finished = []
            for pr in run_ladder(prep, rungs, folds, seed, cancel, scheduler=scheduler):
                conn.send(("progress", pr))
                if pr.rung is not None:
                    finished.append(pr.rung)
            if checks is not None and finished:
                # The post-pass in the same worker; conclude() here only picks the curve's center.
                recommended = conclude(finished, prep.y_test)
                for pr in run_checks(prep, finished, grey_test, recommended, checks, cancel):
                    conn.send(("progress", pr))
        except LadderCancelled:
            conn.send(("cancelled", None))
        except errors.PixelfitError as exc:
            conn.send(("refused", (type(exc).__name__, str(exc))))
        except (BrokenPipeError, EOFError):
            pass  # the caller has gone
        except BaseException as exc:  # noqa: BLE001 - reported to the caller, which decides
            conn.send(("crashed", f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"))
        else:
            conn.send(("finished", None))
    except OSError:
        pass  # the last word could not be delivered: the caller has gone
    finally:
        conn.close()


def _refusal(name: str, message: str) -> errors.PixelfitError:
    cls = getattr(errors, name, None)
    if isinstance(cls, type) and issubclass(cls, errors.PixelfitError):
        return cls(message)
    return errors.PixelfitError(message)


def run_ladder_in_process(prep: Prepared, rungs: list[tuple[str, int]], folds: int = 5, seed: int = 0,
                          cancel: CancelFn | None = None, scheduler: str | None = None,
                          checks: CheckSettings | None = None, grey_test: np.ndarray | None = None) -> Iterator[Progress]:
    """:func:`pixelfit.ladder.run_ladder` in a child process; yields the same :class:`Progress` records.

    With ``checks``, the child then runs :func:`pixelfit.robustness.run_checks` on the finished rungs
    (``grey_test``: the grey held-out patches, for the stress tests) and relays its
    :class:`~pixelfit.robustness.CheckProgress` records too, with the same cancel.

    Raises :class:`LadderCancelled` once the child has stopped after ``cancel()`` returned True (or
    :data:`STOP_GRACE_S` later, when the child is terminated because it did not stop), the
    child's :class:`pixelfit.errors.PixelfitError` (same class and message) when it refused the data,
    and :class:`TrainerLost` when it raised anything else or ended without a word. Leaving the
    generator early (``close()``, garbage collection) stops the child; it never outlives the call.
    """
    ctx = _get_context()
    here, there = ctx.Pipe(duplex=True)
    proc = ctx.Process(target=_serve, name="pixelfit-trainer", daemon=True,
                       args=(there, slim(prep), list(rungs), folds, seed, scheduler, checks, grey_test))
    try:
        proc.start()
    except OSError as exc:  # the new process died before it took its work
        there.close()
        here.close()
        raise TrainerLost(f"could not start the training process ({exc}); {MAIN_GUARD_HINT}") from exc
    there.close()
    asked_at: float | None = None
    heard = False
    grace = STOP_GRACE_S
    try:
        while True:
            if asked_at is None and cancel is not None and cancel():
                asked_at = time.monotonic()
                try:
                    here.send("cancel")
                except OSError:  # the child has already gone; its last words are still in the pipe
                    pass
            elif asked_at is not None and time.monotonic() - asked_at > STOP_GRACE_S:
                # A step that does not look at its cancel flag for this long: stop waiting for it.
                grace = 0.0
                raise LadderCancelled()
            try:
                ready = here.poll(POLL_S)
                message = here.recv() if ready else None
            except (EOFError, OSError):
                proc.join(STOP_GRACE_S)
                hint = "" if heard else f" before its first step; {MAIN_GUARD_HINT}"
                raise TrainerLost(f"the training process ended without finishing (exit code {proc.exitcode}){hint}") from None
            if message is None:
                continue
            heard = True
            kind, payload = message
            if kind == "progress":
                yield payload
            elif kind == "finished":
                return
            elif kind == "cancelled":
                raise LadderCancelled()
            elif kind == "refused":
                raise _refusal(*payload)
            else:
                raise TrainerLost(f"the training process failed: {payload}")
    finally:
        _stop(proc, here, grace)


def _stop(proc, conn, grace: float) -> None:
    """Make sure the child has ended: ask it, give it ``grace`` seconds, then terminate it."""
    if proc.is_alive():
        try:
            conn.send("cancel")
        except OSError:
            pass
        proc.join(grace)
    if proc.is_alive():
        proc.terminate()
        proc.join(STOP_GRACE_S)
    if proc.is_alive():
        proc.kill()
        proc.join()
    conn.close()
    proc.close()
