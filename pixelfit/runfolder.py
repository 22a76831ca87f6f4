"""A run's output folder as one unit: checked, locked, written aside and swapped in whole.

The policy, in the order it is applied to a target folder ``DIR``:

* ``DIR`` must not be, or lie inside, the input, nor hold the input (nor may ``DIR.previous``):
  outputs written into a data set would be imported with it next time.
* One run at a time: ``.DIR.lock`` beside ``DIR`` holds the process id of the run that owns the
  folder. Another run on the same folder is refused while the holder lives; the lock of a process
  that died is taken over, with a note. Where the platform has ``fcntl`` the lock is also an
  advisory ``flock`` that the kernel drops when its holder dies, so a reused process id can never
  keep a dead run's lock alive.
* Everything is written into a fresh hidden folder beside the target (``.DIR.partial-PID``) and
  only :meth:`RunFolder.commit` moves it into place: an earlier run in ``DIR`` becomes
  ``DIR.previous`` (replacing an older one), and the new run becomes ``DIR``. A run that fails or
  is killed before the commit leaves ``DIR`` as it was; its partial folder is removed on the way
  out, or by the next run on the same folder if the process was killed.
* A non-empty ``DIR`` that is not a pixelfit run folder (no ``summary.json`` of ours) holds
  someone's files: it is refused unless ``overwrite`` is set, and even then it is moved to
  ``DIR.previous``, never deleted.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Iterable
from pathlib import Path

from pixelfit.errors import PixelfitError

try:
    import fcntl
except ImportError:  # Windows: the lock is the process id alone
    fcntl = None  # type: ignore[assignment]

SUMMARY_FORMAT = "pixelfit-ladder-summary"
PREVIOUS_SUFFIX = ".previous"


class OccupiedFolderError(PixelfitError):
    """The target holds files that are not a pixelfit run; ``overwrite`` would accept it."""


def is_run_folder(path: str | os.PathLike) -> bool:
    """True when ``path`` is a folder holding a ``summary.json`` written by ``pixelfit fit``."""
    try:
        with open(Path(path) / "summary.json", encoding="utf-8") as fh:
            return json.load(fh).get("format") == SUMMARY_FORMAT
    except (OSError, ValueError, AttributeError):
        return False


def _inside(a: Path, b: Path) -> bool:
    """True when ``a`` is ``b`` or lies inside it (both resolved)."""
    return a == b or b in a.parents


def check_apart(out: str | os.PathLike, inputs: Iterable[str | os.PathLike]) -> None:
    """Refuse an output folder that overlaps an input (file or folder), after resolving links."""
    target = Path(out).resolve()
    previous = target.with_name(target.name + PREVIOUS_SUFFIX)
    for given in inputs:
        src = Path(given).resolve()
        if _inside(target, src):
            where = "is" if target == src else "lies inside"
            raise PixelfitError(f"the output folder {out} {where} the input {given}: outputs would be imported "
                                "with the patches next time; choose a folder outside it", field="out")
        for folder in (target, previous):
            if _inside(src, folder):
                raise PixelfitError(f"the input {given} lies inside the output folder {folder}, which a run "
                                    "replaces; choose an output folder that does not hold the input", field="out")


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    if os.name == "nt":  # signal 0 is CTRL_C_EVENT there; assume alive and let the user remove the lock
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, someone else's
        return True
    return True


def _read_pid(fd: int) -> int | None:
    os.lseek(fd, 0, os.SEEK_SET)
    text = os.read(fd, 64).decode("ascii", "replace").strip()
    try:
        return int(text)
    except ValueError:
        return None


class RunFolder:
    """The output folder of one run. Use as a context manager; write into :attr:`staging`.

    Parameters
    ----------
    target : the folder the run's outputs end up in
    inputs : paths read by the run; the target may not overlap them
    overwrite : accept a non-empty target that is not a pixelfit run folder (it is moved to
        ``DIR.previous``, not deleted)

    Attributes
    ----------
    staging : Path
        The fresh folder to write into; it becomes ``target`` on :meth:`commit`.
    notes : list of str
        Lines for the user (a stale lock taken over, stale partial folders removed).
    previous : Path or None
        Where the earlier content of ``target`` went at the commit, if anywhere.
    """

    def __init__(self, target: str | os.PathLike, inputs: Iterable[str | os.PathLike] = (),
                 overwrite: bool = False) -> None:
        self.target = Path(target)
        self.inputs = list(inputs)
        self.overwrite = overwrite
        self.lock_path = self.target.with_name(f".{self.target.name}.lock")
        self.staging = self.target.with_name(f".{self.target.name}.partial-{os.getpid()}")
        self.previous_path = self.target.with_name(self.target.name + PREVIOUS_SUFFIX)
        self.previous: Path | None = None
        self.notes: list[str] = []
        self._fd: int | None = None
        self.committed = False

    # ---- checks and lock ----------------------------------------------------------------------

    def check(self) -> None:
        """Refusals that need no lock: overlap with the input, someone else's files."""
        if not self.target.name or self.target.name in (".", ".."):
            raise PixelfitError(f"{self.target}: give the output folder a name of its own", field="out")
        check_apart(self.target, self.inputs)
        if self.target.exists() and not self.target.is_dir():
            raise PixelfitError(f"the output folder {self.target} is a file", field="out")
        if self._foreign(self.target) and not self.overwrite:
            raise OccupiedFolderError(f"the output folder {self.target} holds files that are not a pixelfit run; "
                                "choose an empty or new folder, or allow replacing it (it is kept as "
                                f"{self.previous_path.name})", field="out")
        if self._foreign(self.previous_path):
            raise PixelfitError(f"{self.previous_path} holds files that are not a pixelfit run, and a run "
                                "keeps the earlier one there; move it away or choose another folder", field="out")

    @staticmethod
    def _foreign(folder: Path) -> bool:
        """A non-empty folder (or a file) that is not a pixelfit run folder."""
        if not folder.exists():
            return False
        if not folder.is_dir():
            return True
        return any(folder.iterdir()) and not is_run_folder(folder)

    def acquire(self) -> None:
        """Take the lock beside the target (refusing if a live run holds it); clear stale partial folders."""
        self.target.parent.mkdir(parents=True, exist_ok=True)
        if fcntl is not None:
            self._fd = self._acquire_flock()
        else:
            self._fd = self._acquire_exclusive()
        os.ftruncate(self._fd, 0)
        os.lseek(self._fd, 0, os.SEEK_SET)
        os.write(self._fd, f"{os.getpid()}\n".encode("ascii"))
        os.fsync(self._fd)
        for stale in self.target.parent.glob(f".{self.target.name}.partial-*"):
            # Only the lock holder writes a partial folder: any left now belongs to a run that died.
            shutil.rmtree(stale, ignore_errors=True)
            self.notes.append(f"removed {stale.name}, left by a run that was stopped before it finished")

    def _busy(self, pid: int | None) -> PixelfitError:
        who = f"process {pid}" if pid else "another process"
        return PixelfitError(f"the output folder {self.target} is in use by another pixelfit run ({who}); "
                             f"wait for it to finish or choose another folder (lock {self.lock_path})", field="out")

    def _acquire_flock(self) -> int:
        assert fcntl is not None
        for _ in range(5):
            fd = os.open(self.lock_path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                pid = _read_pid(fd)
                os.close(fd)
                raise self._busy(pid) from None
            try:  # the holder may have removed the file between our open and our lock: start over
                same = os.stat(self.lock_path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if not same:
                os.close(fd)
                continue
            pid = _read_pid(fd)
            if pid is not None and pid != os.getpid():
                self.notes.append(f"took over the lock of process {pid}, which stopped without releasing it")
            return fd
        raise self._busy(None)

    def _acquire_exclusive(self) -> int:
        for _ in range(2):
            try:
                return os.open(self.lock_path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
            except FileExistsError:
                fd = os.open(self.lock_path, os.O_RDONLY)
                pid = _read_pid(fd)
                os.close(fd)
                if pid is not None and _pid_alive(pid):
                    raise self._busy(pid) from None
                os.unlink(self.lock_path)
                self.notes.append(f"took over the lock of process {pid}, which is no longer running")
        raise self._busy(None)

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            os.unlink(self.lock_path)  # while still holding it, so no one locks the doomed file
        except FileNotFoundError:
            pass
        os.close(self._fd)
        self._fd = None

    # ---- the unit -----------------------------------------------------------------------------

    def open(self) -> RunFolder:
        """Check, lock, and create the fresh staging folder (see the module docstring)."""
        self.check()
        self.acquire()
        try:
            self.check()  # again under the lock: another run may have written meanwhile
            self.staging.mkdir()
        except BaseException:
            self.release()
            raise
        return self

    def commit(self) -> Path:
        """Move the finished run into place; the earlier content becomes ``DIR.previous``."""
        if self.target.exists():
            if any(self.target.iterdir()):
                if self.previous_path.exists():
                    shutil.rmtree(self.previous_path)  # checked above: an older run of ours, or empty
                os.replace(self.target, self.previous_path)
                self.previous = self.previous_path
            else:
                self.target.rmdir()
        os.replace(self.staging, self.target)
        self.committed = True
        return self.target

    def close(self) -> None:
        """Remove an uncommitted staging folder and release the lock."""
        try:
            if not self.committed:
                shutil.rmtree(self.staging, ignore_errors=True)
        finally:
            self.release()

    def __enter__(self) -> RunFolder:
        return self.open()

    def __exit__(self, exc_type, exc, tb) -> None:
        self.close()
