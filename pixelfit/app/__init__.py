"""The desktop application: the only package of pixelfit that imports PySide6 and pyqtgraph.

Importing ``pixelfit.app`` itself loads no Qt; :func:`launch` does, so the CLI and the core run on
machines without a display or without Qt installed.
"""

from __future__ import annotations

from pixelfit.app._screen import environment_problem, explain_qt_failure, probe_problem  # no Qt in these


def launch(path: str | None = None, argv: list[str] | None = None) -> int:
    """Open the main window (on ``path`` when given) and run the event loop; returns its exit code.

    The window trains in a child process (:mod:`pixelfit.ladder_process`), which re-imports the
    calling script as Python's multiprocessing does: call this from under
    ``if __name__ == "__main__":``.
    """
    from pixelfit.app.main_window import run_application

    return run_application(path, argv)


__all__ = ["environment_problem", "explain_qt_failure", "launch", "probe_problem"]
