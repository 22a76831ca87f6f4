"""The panels of the main window; each listens to the session and writes back through its setters."""

from __future__ import annotations

from collections.abc import Callable

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
