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

What crosses the pipe is plain data: a small description of the prepared set goes in (the raw
grey images stay behind), :class:`Progress` records come out, pickled by :mod:`multiprocessing`
between two processes of the same program. Nothing a user hands in is unpickled. The large arrays
(the training and held-out matrices, their labels, the split mask and duplicate groups, the grey
held-out patches for the stress tests) do not cross the pipe: the caller copies them once into one
block of shared memory (:class:`SharedArrays`), which the child maps read-only. The caller unlinks
the block when the run ends, however it ends (finished, refused, cancelled, trainer killed, the
generator left early); if the caller itself dies, multiprocessing's resource tracker unlinks it.
Where the shared-memory file system has too little room for the block (a small ``/dev/shm`` in a
container), the arrays are pickled to the child as before.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
import multiprocessing.connection
import os
import secrets
import shutil
import threading
import time
import traceback
from collections.abc import Iterator
from multiprocessing import shared_memory
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
    """``prep`` without the raw grey images, names and data check: what a trainer needs, no more.

    The split mask and duplicate groups stay: cross-validation keeps identical grey patches in one
    fold through :attr:`Prepared.train_groups`, which reads both.
    """
    h, w = prep.shape
    ds = prep.dataset
    bare = Dataset(images=np.empty((0, h, w), np.uint8), labels=np.empty(0, dtype=ds.labels.dtype), names=[],
                   source=ds.source, layout=ds.layout)
    return dataclasses.replace(prep, dataset=bare, check=None)


#: The fields of :class:`Prepared` that travel through shared memory rather than the pipe.
SHARED_FIELDS = ("X_train", "y_train", "X_test", "y_test", "test_mask", "groups")
#: Offsets of the arrays in the block are multiples of this (bytes): cache-line aligned.
_ALIGN = 64
#: Shared-memory block names start with this, then the creating process's id.
SHM_PREFIX = "pixelfit-"


class SharedArrays:
    """Named arrays copied once into one shared-memory block, for a child process to map.

    Parameters
    ----------
    arrays : dict of str to ndarray
        copied in the caller; ``layout`` (name, dtype, shape, offset per array) and ``name`` (the
        block's) are what the child needs to find them again with :meth:`attach`.

    The creator calls :meth:`release` when the child has ended: it unmaps and unlinks the block.
    """

    def __init__(self, arrays: dict[str, np.ndarray]):
        layout, size = [], 0
        for key, a in arrays.items():
            a = np.ascontiguousarray(a)
            layout.append((key, a.dtype.str, a.shape, size))
            size += -(-a.nbytes // _ALIGN) * _ALIGN
        self.layout: list[tuple[str, str, tuple[int, ...], int]] = layout
        self.nbytes = size
        self._shm: shared_memory.SharedMemory | None = shared_memory.SharedMemory(
            name=f"{SHM_PREFIX}{os.getpid()}-{secrets.token_hex(6)}", create=True, size=max(size, 1))
        self.name = self._shm.name
        try:
            for key, dtype, shape, offset in layout:
                view = np.ndarray(shape, dtype, buffer=self._shm.buf, offset=offset)
                view[...] = arrays[key]
                del view  # no view may outlive the mapping, or closing it fails
        except BaseException:
            self.release()
            raise

    @staticmethod
    def fits(nbytes: int) -> bool:
        """Whether a block of ``nbytes`` fits in the shared-memory file system's free room.

        Writing past a full ``/dev/shm`` kills the writer (SIGBUS) rather than raising, so look first.
        """
        root = "/dev/shm"
        if not os.path.isdir(root):
            return True  # no such file system to fill (macOS, Windows: the system pages the block)
        return shutil.disk_usage(root).free > nbytes + (64 << 20)

    @staticmethod
    def attach(name: str, layout: list[tuple[str, str, tuple[int, ...], int]]
               ) -> tuple[shared_memory.SharedMemory, dict[str, Any]]:
        """In the child: map the block and return it with read-only views of its arrays."""
        shm = shared_memory.SharedMemory(name=name)
        views: dict[str, Any] = {}
        for key, dtype, shape, offset in layout:
            v = np.ndarray(shape, dtype, buffer=shm.buf, offset=offset)
            v.flags.writeable = False
            views[key] = v
        return shm, views

    def release(self) -> None:
        """Unmap and unlink the block; safe to call more than once."""
        shm, self._shm = self._shm, None
        if shm is None:
            return
        try:
            shm.close()
        finally:
            try:
                shm.unlink()
            except FileNotFoundError:
                pass


def _child_args(prep: Prepared, grey_test: np.ndarray | None) -> tuple[Prepared, np.ndarray | None, SharedArrays | None]:
    """What the child is handed: the slim ``prep`` (and ``grey_test``), its large arrays shared when they fit."""
    shell = slim(prep)
    arrays = {k: getattr(shell, k) for k in SHARED_FIELDS if getattr(shell, k) is not None}
    if grey_test is not None:
        arrays["grey_test"] = grey_test
    if not SharedArrays.fits(sum(np.asarray(a).nbytes for a in arrays.values())):
        return shell, grey_test, None
    shared = SharedArrays(arrays)
    empty: dict[str, Any] = {k: np.empty((0,) + np.shape(a)[1:], np.asarray(a).dtype) for k, a in arrays.items()}
    grey_stub = empty.pop("grey_test", None)
    return dataclasses.replace(shell, **empty), grey_stub, shared


def _serve(conn: multiprocessing.connection.Connection, prep: Prepared, rungs: list[tuple[str, int]], folds: int,
           seed: int, scheduler: str | None = None, checks: CheckSettings | None = None,
           grey_test: np.ndarray | None = None,
           shared: tuple[str, list[tuple[str, str, tuple[int, ...], int]]] | None = None) -> None:
    """The trainer's main: run the ladder, send each record, stop when asked. Runs in the child.

    ``shared``: the name and layout of a :class:`SharedArrays` block holding ``prep``'s large arrays
    (and ``grey_test``), which then arrive here empty.
    """
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
            if shared is not None:
                # ``_block`` stays referenced until this function returns: the views read its mapping.
                _block, views = SharedArrays.attach(*shared)
                grey_test = views.pop("grey_test", grey_test)
                prep = dataclasses.replace(prep, **views)
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
    shell, grey_arg, shared = _child_args(prep, grey_test)
    here, there = ctx.Pipe(duplex=True)
    proc = ctx.Process(target=_serve, name="pixelfit-trainer", daemon=True,
                       args=(there, shell, list(rungs), folds, seed, scheduler, checks, grey_arg,
                             None if shared is None else (shared.name, shared.layout)))
    try:
        proc.start()
    except OSError as exc:  # the new process died before it took its work
        there.close()
        here.close()
        if shared is not None:
            shared.release()
        raise TrainerLost(f"could not start the training process ({exc}); {MAIN_GUARD_HINT}") from exc
    except BaseException:
        there.close()
        here.close()
        if shared is not None:
            shared.release()
        raise
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
        try:
            _stop(proc, here, grace)
        finally:
            if shared is not None:
                shared.release()


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
