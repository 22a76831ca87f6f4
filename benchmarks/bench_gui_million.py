"""The window on a large .npz: the GUI thread's longest stall in each phase of a session. Goal: under 100 ms.

Run from the repository root::

    python benchmarks/bench_gui_million.py                 # 1,000,000 patches of 16x16
    python benchmarks/bench_gui_million.py --n 200000      # smaller, quicker

Writes N seeded 16x16 patches (``make_patches`` of bench_million.py, generated in a child process so
their memory is no part of this process's peak) to an uncompressed ``.npz`` in a temporary folder,
then drives the main window offscreen as a user would, one phase after another, each with a
heartbeat timer on the GUI thread (bench_gui_stall.py's): a stall is the gap between two heartbeats
beyond the timer's interval.

Phases: ``open`` (the window's open action on the file, until its patches are prepared and shown),
``binarize`` (the method changed Otsu -> fixed level and back, each until the new bits are ready),
``data check`` (the Data check tab, each finding chosen, the group of a flagged patch), ``climb``
(one climb of a short ladder: ``--families``, ``--max-size``, ``--folds``; by default
constant,nb,tree, max size 2, 3 folds), ``browse`` (after the climb: the gallery's class filter,
scrolling to its end, clicking patches, selecting each rung, moving the threshold slider).

Printed per phase: the longest stall, the 99th percentile, the wall time and the process's peak
resident memory so far; the bytes pickled to the trainer process (its arguments, with the prepared
matrices in a shared-memory block), and the load average at the start.
"""

from __future__ import annotations

import argparse
import os
import pickle
import resource
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import numpy as np  # noqa: E402

GOAL_MS = 100.0


def write_npz(path: Path, n: int, seed: int) -> None:
    from bench_million import make_patches

    images, labels = make_patches(n, seed=seed)
    np.savez(path, images=images, labels=labels)


def peak_rss_mib() -> float:
    kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return kib / 1024 if sys.platform != "darwin" else kib / 2**20


class Watchdog:
    """A thread that looks at the heartbeat every 10 ms; when it is over 80 ms late, it notes the
    innermost frames of every thread (it runs when it gets the interpreter lock, so a thread that
    held the lock through the gap is caught in the act, or just after)."""

    def __init__(self, late_ms: float = 80.0):
        import threading

        self.late_ms = late_ms
        self.seen: dict[str, int] = {}
        self.stop_flag = threading.Event()
        self.thread: threading.Thread | None = None

    def start(self, beat) -> None:
        import threading
        import traceback

        self.seen = {}
        self.stop_flag.clear()
        main_id = threading.main_thread().ident

        def look() -> None:
            while not self.stop_flag.wait(0.01):
                last = beat.ticks[-1] if beat.ticks else time.perf_counter()
                if (time.perf_counter() - last) * 1000 < self.late_ms:
                    continue
                parts = []
                for ident, frame in sys._current_frames().items():
                    if ident == threading.get_ident():
                        continue
                    where = traceback.extract_stack(frame)[-4:]
                    who = "GUI" if ident == main_id else "other"
                    parts.append(who + ": " + " <- ".join(f"{Path(f.filename).name}:{f.lineno} {f.name}"
                                                          for f in reversed(where)))
                key = "\n    ".join(sorted(parts))
                self.seen[key] = self.seen.get(key, 0) + 1
                time.sleep(0.05)

        self.thread = threading.Thread(target=look, daemon=True)
        self.thread.start()

    def report(self) -> None:
        self.stop_flag.set()
        if self.thread is not None:
            self.thread.join()
        for key, n in sorted(self.seen.items(), key=lambda kv: -kv[1])[:6]:
            print(f"  late x{n}:\n    {key}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="patches to generate (1,000,000)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--families", default="constant,nb,tree")
    ap.add_argument("--max-size", type=int, default=2)
    ap.add_argument("--folds", type=int, default=3)
    ap.add_argument("--profile", action="store_true",
                    help="profile the GUI thread in each phase and print its most costly calls")
    ap.add_argument("--why", action="store_true",
                    help="when the heartbeat is over 80 ms late, note what every thread is doing (a watchdog thread)")
    ap.add_argument("--keep", metavar="DIR", help="write the .npz here and keep it (reused when it exists)")
    ap.add_argument("--write-only", metavar="FILE", help=argparse.SUPPRESS)  # the child that generates
    args = ap.parse_args()
    if args.write_only:
        write_npz(Path(args.write_only), args.n, args.seed)
        return 0

    from bench_gui_stall import Heartbeat, pump, run_until_stopped

    import pixelfit.ladder_process as lp
    from pixelfit.app._qt import QtCore, QtWidgets
    from pixelfit.app.main_window import MainWindow

    tmp = tempfile.TemporaryDirectory(prefix="pixelfit-bench-")
    where = Path(args.keep or tmp.name)
    where.mkdir(parents=True, exist_ok=True)
    data = where / f"patches-{args.n}-{args.seed}.npz"
    if not data.exists():
        t0 = time.perf_counter()
        subprocess.run([sys.executable, __file__, "--n", str(args.n), "--seed", str(args.seed),
                        "--write-only", str(data)], check=True)
        print(f"generated {args.n:,} patches of 16x16 into {data.name} ({data.stat().st_size / 2**20:,.0f} MiB) "
              f"in {time.perf_counter() - t0:.1f} s", flush=True)
    load = os.getloadavg()
    print(f"load average at the start: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} ({os.cpu_count()} CPUs)")

    _app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])  # kept alive until the end
    settings = QtCore.QSettings(str(where / "bench.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=lambda *_: True)
    w.show()
    s = w.session
    pump(1.0)
    print(f"window up; peak resident memory {peak_rss_mib():,.0f} MiB")

    # What the climb pickles to its trainer: the child's arguments, measured as the climb makes them.
    sent: list[int] = []
    make_args = lp._child_args

    def measured_args(prep, grey):
        shell, grey_arg, shared = make_args(prep, grey)
        sent.append(len(pickle.dumps((shell, grey_arg, None if shared is None else (shared.name, shared.layout)),
                                     protocol=pickle.HIGHEST_PROTOCOL)))
        return shell, grey_arg, shared

    lp._child_args = measured_args

    def busy() -> bool:
        return bool(getattr(s, "preparing", False))

    def until_idle(timeout: float = 600.0) -> None:
        """Run the event loop until the session has no preparation pending (or ``timeout``)."""
        end = time.perf_counter() + timeout
        loop = QtCore.QEventLoop()
        timer = QtCore.QTimer()
        timer.setInterval(20)
        timer.timeout.connect(lambda: None if busy() and time.perf_counter() < end else loop.quit())
        timer.start()
        loop.exec()
        timer.stop()

    results: list[tuple[str, np.ndarray, float]] = []
    watch = Watchdog() if args.why else None
    profiler = None

    def profiled(start: bool) -> None:
        nonlocal profiler
        if not args.profile:
            return
        import cProfile
        import pstats

        if start:
            profiler = cProfile.Profile()
            profiler.enable()
        elif profiler is not None:
            profiler.disable()
            pstats.Stats(profiler).sort_stats("cumulative").print_stats(25)

    def phase(name: str, act: Callable[[], None], settle: float = 1.0) -> None:
        beat = Heartbeat()
        profiled(True)
        beat.start()
        if watch is not None:
            watch.start(beat)
        t0 = time.perf_counter()
        QtCore.QTimer.singleShot(0, act)  # the action runs inside the event loop, as a click's slot does
        pump(0.05)
        until_idle()
        wall = time.perf_counter() - t0
        pump(settle)  # the paints and cached work that follow
        gaps = beat.stop()
        profiled(False)
        if watch is not None:
            watch.report()
        results.append((name, gaps, wall))
        print(f"{name:<11} longest stall {gaps.max():8.1f} ms   p99 {np.percentile(gaps, 99):7.1f} ms   "
              f"wall {wall:6.1f} s   peak RSS {peak_rss_mib():7,.0f} MiB", flush=True)

    phase("open", lambda: w.open_path(data))
    if s.prep is None:
        print("the file did not open:", w.strip.text.text())
        return 2
    ds = s.dataset
    print(f"  {ds.source}: {len(ds):,} patches of {ds.shape[0]}x{ds.shape[1]}; gallery shows "
          f"{w.gallery.model.rowCount():,} tiles ({w.gallery.count.text()})")

    def binarize_to(method: str):
        def change() -> None:
            i = w.prep_panel.method.findData(method)
            w.prep_panel.method.setCurrentIndex(i)
            w.prep_panel.method.activated.emit(i)
        return change

    phase("binarize", binarize_to("fixed"))
    print(f"  now {s.binarizer.describe()}")
    # Back to Otsu, so that the data check and the climb see the file's own bits (a fixed level
    # of 128 leaves most of these patches blank: a climb on them measures little).
    phase("binarize", binarize_to("otsu"))
    print(f"  now {s.binarizer.describe()}")

    def data_check() -> None:
        v = w.check_view
        w.tabs.setCurrentWidget(v)
        for i in range(v.chooser.count()):
            v.chooser.setCurrentIndex(i)
            v.chooser.activated.emit(i)
            QtWidgets.QApplication.processEvents()
            if v.flagged_model.rowCount():
                v.show_group(int(v.flagged_model.rows[0]))
                QtWidgets.QApplication.processEvents()

    phase("data check", data_check)
    counts = s.check_counts()
    print("  findings: " + ", ".join(f"{k} {v:,}" for k, v in counts.items()))

    s.set_ladder(families=args.families.split(","), max_size=args.max_size, folds=args.folds)

    def climb() -> None:
        w.tabs.setCurrentWidget(w.gallery)
        w.act_climb.trigger()

    beat = Heartbeat()
    profiled(True)
    beat.start()
    if watch is not None:
        watch.start(beat)
    t0 = time.perf_counter()
    QtCore.QTimer.singleShot(0, climb)
    pump(0.05)
    run_until_stopped(s)
    wall = time.perf_counter() - t0
    pump(1.0)
    gaps = beat.stop()
    profiled(False)
    if watch is not None:
        watch.report()
    results.append(("climb", gaps, wall))
    print(f"{'climb':<11} longest stall {gaps.max():8.1f} ms   p99 {np.percentile(gaps, 99):7.1f} ms   "
          f"wall {wall:6.1f} s   peak RSS {peak_rss_mib():7,.0f} MiB", flush=True)
    print(f"  {len(s.rungs)} rungs ({args.families}, max size {args.max_size}, {args.folds} folds); "
          f"pickled to the trainer: {', '.join(f'{b:,} bytes' for b in sent) or 'nothing'}")
    print(f"  the window said: {w.strip.text.text()}")

    def browse() -> None:
        g = w.gallery
        w.tabs.setCurrentWidget(g)
        for i in range(1, g.filter.count()):
            g.filter.setCurrentIndex(i)
            g.filter.activated.emit(i)
            QtWidgets.QApplication.processEvents()
        g.filter.setCurrentIndex(0)
        g.filter.activated.emit(0)
        QtWidgets.QApplication.processEvents()
        g.view.scrollToBottom()
        QtWidgets.QApplication.processEvents()
        for k in range(len(s.rungs)):
            w.table.selectRow(k)
            QtWidgets.QApplication.processEvents()
            slider = w.inspector.slider
            if slider.isEnabled():
                slider.setValue((slider.minimum() + slider.maximum()) // 2)
                QtWidgets.QApplication.processEvents()
        n = g.model.rowCount()
        for row in (0, n // 2, n - 1):
            if n:
                g.view.clicked.emit(g.model.index(row, 0))
                QtWidgets.QApplication.processEvents()

    phase("browse", browse)

    worst = max(float(g.max()) for _, g, _ in results)
    print(f"peak resident memory of the GUI process: {peak_rss_mib():,.0f} MiB")
    print(f"goal: longest stall under {GOAL_MS:.0f} ms in every phase -> {'met' if worst < GOAL_MS else 'NOT met'} "
          f"(worst {worst:.1f} ms, {worst / GOAL_MS:.2f}x the goal); per phase: "
          + ", ".join(f"{name} {g.max() / GOAL_MS:.2f}x" for name, g, _ in results))
    lp._child_args = make_args
    w.stop_worker()
    w.close()
    tmp.cleanup()
    return 0 if worst < GOAL_MS else 1


if __name__ == "__main__":
    raise SystemExit(main())
