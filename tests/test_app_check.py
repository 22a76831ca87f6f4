"""The window's data-check view and import badge show the core check's findings (data, not pixels)."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from pixelfit.app.session import Session  # noqa: E402
from pixelfit.app.widgets.check_view import DataCheckView  # noqa: E402
from pixelfit.app.widgets.source_panel import ImportReport  # noqa: E402
from pixelfit.data import load_dataset  # noqa: E402
from pixelfit.ladder import prepare  # noqa: E402


@pytest.fixture
def copies_npz(tmp_path):
    rng = np.random.default_rng(4)
    images = rng.integers(0, 256, (80, 4, 4), dtype=np.uint8)
    images[1:4] = images[0]      # a group of four
    images[11] = images[10]      # a pair across classes (10 'a', 11 'b')
    labels = np.array(["a", "b"] * 40)
    path = tmp_path / "copies.npz"
    np.savez(path, images=images, labels=labels)
    return path


def test_view_and_badge_show_the_same_check_as_the_core(qtbot, copies_npz):
    s = Session()
    view = DataCheckView(s)
    report = ImportReport(s)
    qtbot.addWidget(view)
    qtbot.addWidget(report)
    assert not report.check_badge.isVisibleTo(report)
    assert s.open(copies_npz)
    core = prepare(load_dataset(copies_npz), s.binarizer, s.positive).check  # what the CLI computes
    assert s.check.figures == core.figures
    assert report.check_badge.isVisibleTo(report) and "2 duplicate group(s)" in report.check_badge.text()
    assert view.finding == "duplicate"
    assert sorted(view.flagged_model.rows.tolist()) == [0, 1, 2, 3, 10, 11]
    view.show_group(2)
    assert view.group_model.rows.tolist()[0] == 2 and sorted(view.group_model.rows.tolist()) == [0, 1, 2, 3]
    view.show_finding("conflict")
    assert set(view.flagged_model.rows.tolist()) >= {10, 11}
    # A set with no findings hides the badge again.
    rng = np.random.default_rng(0)
    clean = copies_npz.parent / "clean.npz"
    np.savez(clean, images=rng.integers(0, 256, (40, 8, 8), dtype=np.uint8), labels=np.array(["a", "b"] * 20))
    assert s.open(clean)
    assert not s.check.findings and not report.check_badge.isVisibleTo(report)
    assert s.split == "group-duplicates" and s.prep.split_method == "group-duplicates"
