"""Atomic file writes: a temporary file in the same folder, flushed, then renamed over the target.

A failure at any point leaves an existing target untouched and no temporary file behind. The
file gets the permissions a plain ``open()`` would give it: those of the file it replaces, or
0666 less the user's umask for a new one (a temporary file alone would be 0600, unreadable to a
colleague or a build server).
"""

from __future__ import annotations

import io
import json
import os
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO


def current_umask() -> int:
    """The process's umask, read without changing it where the system allows."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)  # elsewhere: set and restore at once
    os.umask(mask)
    return mask


def _mode_for(path: Path) -> int:
    try:
        return stat.S_IMODE(path.stat().st_mode)
    except OSError:
        return 0o666 & ~current_umask()


def write_with(path: str | os.PathLike, write: Callable[[BinaryIO], object]) -> Path:
    """Write ``path`` atomically through ``write(binary file)``; returns the path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    mode = _mode_for(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fchmod(fh.fileno(), mode)
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    return write_with(path, lambda fh: fh.write(data))


def write_text(path: str | os.PathLike, text: str) -> Path:
    return write_bytes(path, text.encode("utf-8"))


def write_json(path: str | os.PathLike, obj) -> Path:
    """``obj`` as indented JSON, streamed to the file: a large document (a rule that memorized
    750,000 patterns) is never held as one string, nor as the millions of pieces it is made of."""
    def dump(fh: BinaryIO) -> None:
        text = io.TextIOWrapper(fh, encoding="utf-8", newline="\n", write_through=False)
        try:
            json.dump(obj, text, indent=2, allow_nan=False, ensure_ascii=False)
            text.write("\n")
            text.flush()
        finally:
            text.detach()  # the binary file stays open for the caller's flush and sync

    return write_with(path, dump)
