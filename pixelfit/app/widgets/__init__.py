"""The panels of the main window; each listens to the session and writes back through its setters."""

from __future__ import annotations

import math
import time
from collections.abc import Callable

from pixelfit.app._qt import QtCore, QtWidgets
from pixelfit.app.session import Session


class Listens:
    """Mixin: subscriptions to session events that are dropped together by :meth:`detach`."""

    def listen(self, session: Session, event: str, fn: Callable) -> None:
        if not hasattr(self, "_unsubscribers"):
            self._unsubscribers: list[Callable[[], None]] = []
        self._unsubscribers.append(session.subscribe(event, fn))

    def detach(self) -> None:
        for off in getattr(self, "_unsubscribers", []):
            off()
        self._unsubscribers = []


class Throttled:
    """Calls ``fn()`` on the event loop, at most once per ``interval_ms``, however often it is asked.

    Requests that come while a call is pending fold into it, so a burst of session events (a rung
    and the progress step that comes with it) costs one redraw, and the last request always gets
    its call. A request long after the previous call runs on the next turn of the event loop.
    :meth:`flush` makes a pending call now (a run ended: show the final state at once).

    Parameters
    ----------
    fn : callable taking no arguments
    interval_ms : int
        least time between the starts of two calls
    parent : QObject
        owns the timer; the timer dies with it
    """

    def __init__(self, fn: Callable[[], None], interval_ms: int, parent: QtCore.QObject):
        self.fn = fn
        self.interval_ms = interval_ms
        self._last = float("-inf")
        self._timer = QtCore.QTimer(parent)
        self._timer.setSingleShot(True)
        # A coarse timer may fire up to 5 % early, which would break the "least time" promise.
        self._timer.setTimerType(QtCore.Qt.TimerType.PreciseTimer)
        self._timer.timeout.connect(self._fire)

    @property
    def pending(self) -> bool:
        return self._timer.isActive()

    def request(self) -> None:
        if self._timer.isActive():
            return
        wait_ms = (self._last - time.perf_counter()) * 1000 + self.interval_ms  # -inf before the first call
        self._timer.start(0 if wait_ms <= 0 else math.ceil(wait_ms))

    def flush(self) -> None:
        if self._timer.isActive():
            self._timer.stop()
            self._fire()

    def cancel(self) -> None:
        self._timer.stop()

    def _fire(self) -> None:
        self._last = time.perf_counter()
        self.fn()


def thumbnail_list(spacing: int = 2, min_height: int = 0) -> QtWidgets.QListWidget:
    """A list of patch thumbnails laid out as a wrapping grid that does not let items be dragged."""
    w = QtWidgets.QListWidget()
    w.setViewMode(QtWidgets.QListView.ViewMode.IconMode)
    w.setResizeMode(QtWidgets.QListView.ResizeMode.Adjust)
    w.setMovement(QtWidgets.QListView.Movement.Static)
    w.setSpacing(spacing)
    if min_height:
        w.setMinimumHeight(min_height)
    return w
