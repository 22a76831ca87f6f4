"""Qt bindings, imported in one place: PySide6 first, then pyqtgraph told to use it."""

from __future__ import annotations

import ctypes
import os
import sys

# pyqtgraph picks the first Qt binding it can import unless told; pin it before it is imported.
os.environ.setdefault("PYQTGRAPH_QT_LIB", "PySide6")

import pyqtgraph as pg  # noqa: E402
from PySide6 import QtCore, QtGui, QtWidgets  # noqa: E402

# Images are (row, col) arrays everywhere in pixelfit; every ImageItem also sets it explicitly.
pg.setConfigOptions(imageAxisOrder="row-major", antialias=True, background="w", foreground="k")


class _Probe(QtCore.QObject):
    ping = QtCore.Signal()


def binding_drops_references(n: int = 64) -> bool:
    """True when the Qt binding loses references to ``None`` or ``True`` on ordinary calls.

    Measured in this project with PySide6 6.12.0 on CPython 3.11: every call that returns None
    (``QObject.parent()`` of a parentless object, any void method) loses one reference to None, and
    every ``Signal.emit()`` one to True (200 calls, 200 references). From CPython 3.12 these
    objects are immortal and the loss is harmless; before that a count reaches zero after some
    thousands of calls and the interpreter aborts in ``none_dealloc`` or ``bool_dealloc``.
    """
    probe = _Probe()
    none_before, true_before = sys.getrefcount(None), sys.getrefcount(True)
    for _ in range(n):
        probe.parent()
        probe.ping.emit()
    return none_before - sys.getrefcount(None) >= n or true_before - sys.getrefcount(True) >= n


def _make_singletons_immortal() -> None:
    """Raise the reference counts of None, True and False out of reach, as CPython 3.12 does.

    ``ob_refcnt`` is the first field of every object in a standard CPython build.
    """
    for obj in (None, True, False):
        ctypes.c_ssize_t.from_address(id(obj)).value += 1 << 48


# Guard against the binding bug above where it bites; a no-op elsewhere. pyproject.toml also keeps
# that release off Python 3.11 for fresh installs; this covers environments that already have it.
if sys.implementation.name == "cpython" and sys.version_info < (3, 12) and binding_drops_references():
    _make_singletons_immortal()

__all__ = ["QtCore", "QtGui", "QtWidgets", "pg", "binding_drops_references"]
