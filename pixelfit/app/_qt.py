"""Qt bindings, imported in one place: PySide6 first, then pyqtgraph told to use it."""

from __future__ import annotations

import ctypes
import os
import sys

# pyqtgraph picks the first Qt binding it can import unless told; pin it before it is imported.
os.environ.setdefault("PYQTGRAPH_QT_LIB", "PySide6")

from PySide6 import QtCore, QtGui, QtWidgets  # noqa: E402

import pyqtgraph as pg  # noqa: E402

# Images are (row, col) arrays everywhere in pixelfit; every ImageItem also sets it explicitly.
pg.setConfigOptions(imageAxisOrder="row-major", antialias=True, background="w", foreground="k")


class _Probe(QtCore.QObject):
    ping = QtCore.Signal()


def emit_drops_true_reference(n: int = 64) -> bool:
    """True when ``Signal.emit()`` loses a reference to ``True`` on every call.

    Seen with PySide6 6.12.0 on CPython 3.11 (measured in this project: 200 emits, 200 references
    lost). On CPython >= 3.12 ``True`` is immortal and the loss is harmless; before that the count
    reaches zero after some thousands of emits and the interpreter aborts in ``bool_dealloc``.
    """
    probe = _Probe()
    before = sys.getrefcount(True)
    for _ in range(n):
        probe.ping.emit()
    return before - sys.getrefcount(True) >= n


def _make_bools_immortal() -> None:
    """Raise the reference counts of True and False far out of reach, as CPython 3.12 does."""
    for obj in (True, False):
        ctypes.c_ssize_t.from_address(id(obj)).value += 1 << 48


# Guard against the binding bug above where it bites; a no-op elsewhere.
if sys.implementation.name == "cpython" and sys.version_info < (3, 12) and emit_drops_true_reference():
    _make_bools_immortal()

__all__ = ["QtCore", "QtGui", "QtWidgets", "pg", "emit_drops_true_reference"]
