"""Render the README screenshots offscreen: the gallery, the main window after a ladder run with a
spec, and the views of round two (spec and cost columns, the checks after the climb, the data check,
the explanation of a call, two rungs compared).

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


def settle(app) -> None:
    for _ in range(8):
        app.processEvents()
        time.sleep(0.02)


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
        w.tabs.setCurrentWidget(w.check_view)
        flagged = s.check_rows(w.check_view.finding)
        if len(flagged):
            w.check_view.show_group(int(flagged[0]))
        settle(app)
        w.check_view.grab().save(str(HERE / "data-check.png"))
        w.tabs.setCurrentIndex(0)
        s.set_ladder(families=["constant", "lut", "nb", "logistic", "tree"], max_size=4, folds=3)
        s.set_spec(0.85, 0.80)
        w.act_climb.trigger()
        while s.running or w.worker is not None and w.worker.isRunning():
            app.processEvents(QtCore.QEventLoop.ProcessEventsFlag.AllEvents, 50)
            time.sleep(0.005)
        if s.selected is not None and s.selected.scored:
            pt = s.target_point()
            if pt is not None:
                s.set_threshold(pt["threshold"])
        settle(app)
        w.grab().save(str(HERE / "main-window.png"))
        shots = ["main-window.png", "patches.png", "data-check.png"]
        # The spec's answer above the rung table, with its cost columns.
        box = w.table.parentWidget()
        w.climb.grab().save(str(HERE / "spec-answer.png"))
        w.table.resize(1500, w.table.height())
        w.table.grab().save(str(HERE / "cost-columns.png"))
        shots += ["spec-answer.png", "cost-columns.png"]
        del box
        # The checks after the climb: bias and variance, learning curve, stress tests.
        w.tabs.setCurrentWidget(w.checks_view)
        settle(app)
        w.checks_view.grab().save(str(HERE / "checks.png"))
        w.inspector.stress.grab().save(str(HERE / "stress.png"))
        shots += ["checks.png", "stress.png"]
        w.tabs.setCurrentIndex(0)
        # Why a call: the first held-out false positive of the selected rung.
        fp, fn = s.misses()
        missed = fp if len(fp) else fn
        if len(missed):
            s.explain(int(missed[0]))
            settle(app)
            w.explain_view.grab().save(str(HERE / "explain.png"))
            shots.append("explain.png")
        # Two rungs side by side: the selected one and the largest truth table.
        other = next((r.key for r in reversed(s.rungs) if r.family == "tree" and r is not s.selected), None)
        if other is not None:
            s.compare_with(other)
            settle(app)
            w.compare_view.grab().save(str(HERE / "compare.png"))
            shots.append("compare.png")
        chosen = s.selected.key if s.selected else None
        print(f"{len(s.rungs)} rungs; selected {chosen}; wrote {', '.join(shots)} in {HERE}")
        w.explain_view.close()
        w.compare_view.close()
        w.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
