"""What keeps the window responsive on a large set: preparation on a worker thread, per-set summaries,
patch lists a page at a time. Checked on small generated sets (the timing is benchmarks/bench_gui_million.py's)."""
from __future__ import annotations

import threading
from collections import Counter

import numpy as np
import pytest

pytest.importorskip("pytestqt")
from conftest import make_patches  # noqa: E402

from pixelfit.app._qt import QtCore  # noqa: E402  (before any widget is built)
from pixelfit.app.main_window import MainWindow  # noqa: E402
from pixelfit.app.session import Session, run_here  # noqa: E402
from pixelfit.app.widgets.gallery import PatchListModel  # noqa: E402
from pixelfit.app.workers import run_in_thread  # noqa: E402
from pixelfit.data import FINDINGS  # noqa: E402


@pytest.fixture
def window(qtbot, tmp_path):
    settings = QtCore.QSettings(str(tmp_path / "settings.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=lambda *_: True)
    w.show()
    yield w
    w.stop_worker()
    w.close()
    w.deleteLater()


def npz_with_copies(tmp_path, rng, n=150):
    """Patches with exact copies (some across classes), so the data check has findings of several kinds."""
    imgs, labels = make_patches(rng, n)
    imgs[100:120] = imgs[0:20]  # copies: labels may agree or not
    path = tmp_path / "copies.npz"
    np.savez(path, images=imgs, labels=labels)
    return path, imgs, labels


def test_the_window_prepares_on_another_thread_with_the_actions_off(qtbot, window, tmp_path, rng):
    path, _, labels = npz_with_copies(tmp_path, rng)
    w, s = window, window.session
    threads: list[int] = []
    seen: list[tuple[bool, bool, bool, bool]] = []
    runner = s.runner

    def recording_runner(job):
        def wrapped():
            threads.append(threading.get_ident())
            return job()
        return runner(wrapped)

    s.runner = recording_runner
    s.subscribe("busy", lambda: seen.append((s.preparing, w.act_open.isEnabled(), w.act_climb.isEnabled(),
                                             w.prep_panel.method.isEnabled())))
    assert w.open_path(path)
    assert threads and all(t != threading.get_ident() for t in threads)  # not on the GUI thread
    assert seen[0] == (True, False, False, False)  # nothing that starts a second job while one runs
    assert seen[-1][0] is False and seen[-1][1] and seen[-1][3]
    assert w.act_climb.isEnabled()  # once the prepared set has been taken in
    assert s.prep is not None and s.class_counts() == dict(sorted(Counter(labels.tolist()).items()))
    n_jobs = len(threads)
    assert s.set_binarizer("fixed", 100.0)
    assert len(threads) == n_jobs + 1 and s.prep.binarizer.method == "fixed"


def test_a_job_turns_the_event_loop_and_raises_on_the_gui_thread(qtbot):
    ticks: list[int] = []
    timer = QtCore.QTimer()
    timer.setInterval(5)
    timer.timeout.connect(lambda: ticks.append(1))
    timer.start()
    release = threading.Event()
    QtCore.QTimer.singleShot(60, release.set)  # only the event loop turning can let the job end

    def job():
        assert release.wait(10)
        return threading.get_ident()

    assert run_in_thread(job) != threading.get_ident()
    assert ticks  # the timer fired while the job ran
    timer.stop()

    def refuse():
        raise ValueError("no")

    with pytest.raises(ValueError, match="no"):
        run_in_thread(refuse)


def test_busy_session_refuses_a_second_job():
    s = Session()
    said: list[tuple[str, bool]] = []
    s.subscribe("message", lambda text, error: said.append((text, error)))
    s.preparing = True
    assert not s.set_binarizer("fixed", 90.0)
    assert s.binarizer.method == "otsu"
    assert not s.open("anywhere")
    assert s.start_run() is None
    assert all(error for _, error in said) and len(said) == 3
    assert s.runner is run_here


def test_closing_while_preparing_waits_for_the_job(qtbot, tmp_path, rng):
    path, _, _ = npz_with_copies(tmp_path, rng)
    settings = QtCore.QSettings(str(tmp_path / "s.ini"), QtCore.QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, ask=lambda *_: True)
    w.show()
    release = threading.Event()
    still_open: list[bool] = []

    def close_then_release():
        w.close()  # a job's thread is running: the window stays
        still_open.append(w.isVisible())
        release.set()

    runner = w.session.runner
    w.session.runner = lambda job: runner(lambda: (release.wait(10), job())[1])
    QtCore.QTimer.singleShot(30, close_then_release)
    assert w.open_path(path)
    assert still_open == [True]
    qtbot.waitUntil(lambda: not w.isVisible(), timeout=3000)  # closed once the job returned
    w.deleteLater()


def test_summary_rows_and_groups_match_the_data_check(tmp_path, rng):
    path, imgs, labels = npz_with_copies(tmp_path, rng)
    s = Session()
    assert s.open(path)
    check = s.check
    assert check is not None and check.findings
    # brute force from the check's own list of (row, finding, group)
    for f in FINDINGS:
        if f == "suspect":
            continue
        expect = sorted(i for i, g, _ in check.findings if g == f)
        assert s.check_rows(f).tolist() == expect
        assert s.check_counts()[f] == len(expect)
        for i, g, group in check.findings:
            if g == f:
                got = s.check_group(i, f)
                assert got[0] == i and sorted(got.tolist()) == sorted(check.members(group).tolist())
    assert s.check_group(10_000, "duplicate").tolist() == [10_000]  # a row without the finding: alone
    counts, thresholds = s.histogram()
    train = s.prep.dataset.images[~s.prep.test_mask]
    assert counts.tolist() == np.bincount(train.ravel(), minlength=256).tolist()
    assert thresholds is not None and thresholds.tolist() == [s.prep.binarizer.threshold]


def test_the_climb_copies_the_grey_held_out_patches_off_the_gui_thread(tmp_path, rng):
    path, imgs, _ = npz_with_copies(tmp_path, rng)
    s = Session()
    assert s.open(path)
    s.set_ladder(families=["constant"], folds=2)
    spec = s.start_run()
    assert spec is not None and spec.grey_test is None  # nothing copied when the climb starts
    assert np.array_equal(spec.held_out_grey(), imgs[s.prep.test_mask])
    s.end_run("cancelled")


def test_patch_lists_show_one_page_at_a_time(qtbot, window, tmp_path, rng):
    path, _, labels = npz_with_copies(tmp_path, rng)
    w = window
    assert w.open_path(path)
    g = w.gallery
    assert g.model.per_page >= len(labels) and not g.pager.isVisibleTo(w)  # a small set fits one page
    assert g.count.text() == f"{len(labels)} patches"
    g.model.per_page = 40
    g._refill()
    m = g.model
    assert m.pages == 4 and m.rowCount() == 40 and m.rows.tolist() == list(range(40))
    assert g.pager.isVisibleTo(w) and not g.pager.back.isEnabled() and g.pager.next.isEnabled()
    assert g.count.text() == f"patches 1–40 of {len(labels)}"
    g.pager.next.click()
    assert m.page == 1 and m.rows.tolist() == list(range(40, 80))
    assert g.count.text() == f"patches 41–80 of {len(labels)}"
    for _ in range(5):  # past the last page: stays there
        g.pager.next.click()
    assert m.page == 3 and m.rowCount() == len(labels) - 120 and not g.pager.next.isEnabled()
    # a click on a tile of the page means that page's patch
    index = m.index(2, 0)
    assert m.data(index) == labels[122]
    # another class filter starts again at the first page
    g.session.set_gallery_class("spot")
    assert m.page == 0 and m.all_rows.tolist() == np.flatnonzero(labels == "spot").tolist()


def test_a_model_asks_for_its_rows_once_per_reset(qtbot):
    s = Session()
    calls: list[int] = []

    def rows():
        calls.append(1)
        return np.arange(10)

    m = PatchListModel(s, rows_fn=rows, per_page=4)
    m.reset()
    m.set_page(2)
    assert len(calls) == 1 and m.rows.tolist() == [8, 9] and m.span_text("tiles") == "tiles 9–10 of 10"


def test_maps_of_the_training_data_are_computed_by_the_runner_once(tmp_path, rng):
    path, _, _ = npz_with_copies(tmp_path, rng)
    s = Session()
    assert s.open(path)
    jobs: list[int] = []
    s.runner = lambda job: (jobs.append(1), job())[1]
    s.set_map_kind("mutual_information")
    values, caption = s.heatmap()
    assert values is not None and len(jobs) == 1
    s.set_map_kind("mean_difference")
    assert s.heatmap()[0] is not None and len(jobs) == 1  # both maps came from the one job
    s.preparing = True  # asked again while another job runs: no second job, a caption that says so
    s._data_maps = None
    assert s.heatmap() == (None, "data: lit-rate difference: computing…") and len(jobs) == 1


def test_the_summary_made_by_the_job_is_the_one_the_panels_read(tmp_path, rng, monkeypatch):
    import pixelfit.app.session as session_module

    path, _, _ = npz_with_copies(tmp_path, rng)
    s = Session()
    made: list[str] = []
    original = session_module.PrepSummary.__init__

    def counting(self, dataset, prep):
        made.append("job" if s.preparing else "here")
        original(self, dataset, prep)

    monkeypatch.setattr(session_module.PrepSummary, "__init__", counting)
    s.subscribe("dataset", lambda: s.class_counts())  # a panel asking before the prepared set is in
    assert s.open(path)
    s.class_counts(), s.histogram(), s.check_counts()
    assert made == ["job"]
