"""Atomic file writes: a temporary file in the same folder, flushed, then renamed over the target.

A failure at any point leaves an existing target untouched and no temporary file behind.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path


def write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def write_text(path: str | os.PathLike, text: str) -> Path:
    return write_bytes(path, text.encode("utf-8"))


def write_json(path: str | os.PathLike, obj) -> Path:
    return write_text(path, json.dumps(obj, indent=2, allow_nan=False, ensure_ascii=False) + "\n")
