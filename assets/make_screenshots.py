"""Render the README screenshots offscreen: the main window after a ladder run, and the gallery.

    python assets/make_screenshots.py [PATH]     # default: the bundled bottle-caps demo set
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from pixelfit.app._qt import QtCore, QtWidgets  # noqa: E402
from pixelfit.app.main_window import MainWindow  # noqa: E402
from pixelfit.demo import resolve_dataset_path  # noqa: E402


def main() -> int:
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])
    path = resolve_dataset_path(sys.argv[1] if len(sys.argv) > 1 else "bottle-caps")
    with tempfile.TemporaryDirectory() as tmp:
        settings = QtCore.QSettings(str(Path(tmp) / "shots.ini"), QtCore.QSettings.Format.IniFormat)
        w = MainWindow(settings=settings, ask=lambda *_: True)
        w.show()
        if not w.open_path(path):
            print(w.strip.text.text(), file=sys.stderr)
            return 2
        app.processEvents()
        w.gallery.view.scrollToTop()
        w.grab().save(str(HERE / "patches.png"))
        s = w.session
        s.set_ladder(families=["constant", "lut", "nb", "logistic", "tree"], max_size=4, folds=3)
        w.act_climb.trigger()
        while s.running:
            app.processEvents(QtCore.QEventLoop.ProcessEventsFlag.AllEvents, 50)
            time.sleep(0.005)
        if s.selected is not None and s.selected.scored:
            pt = s.target_point()
            if pt is not None:
                s.set_threshold(pt["threshold"])
        for _ in range(5):
            app.processEvents()
        w.grab().save(str(HERE / "main-window.png"))
        chosen = s.selected.key if s.selected else None
        print(f"{len(s.rungs)} rungs; selected {chosen}; wrote {HERE}/main-window.png, patches.png")
        w.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
