import math

import numpy as np
import pytest

from pixelfit.evaluate import detection_metrics, wilson_interval


def test_wilson_published_example():
    # Newcombe (1998), "Two-sided confidence intervals for the single proportion: comparison of
    # seven methods", Statistics in Medicine 17, 857-872, Table I: 81/263 -> 0.2553 to 0.3662.
    lo, hi = wilson_interval(81, 263)
    assert lo == pytest.approx(0.2553, abs=5e-5)
    assert hi == pytest.approx(0.3662, abs=5e-5)


def test_wilson_edges():
    # Newcombe (1998), Table I, from memory: 0/20 -> 0 to 0.1611 (Wilson score method); it is also
    # the closed form z^2 / (n + z^2) for zero successes.
    lo, hi = wilson_interval(0, 20)
    assert lo == 0.0 and hi == pytest.approx(0.1611, abs=5e-5)
    lo, hi = wilson_interval(20, 20)
    assert hi == 1.0 and lo == pytest.approx(1 - 0.1611, abs=5e-5)
    assert wilson_interval(0, 0) is None


def test_mcc_textbook():
    # Matthews (1975) correlation coefficient from its definition:
    # (tp*tn - fp*fn) / sqrt((tp+fp)(tp+fn)(tn+fp)(tn+fn)) with tp=6, fp=2, fn=1, tn=11.
    y = np.array([1] * 6 + [0] * 2 + [1] * 1 + [0] * 11, bool)
    p = np.array([1] * 6 + [1] * 2 + [0] * 1 + [0] * 11, bool)
    m = detection_metrics(y, p)
    expect = (6 * 11 - 2 * 1) / math.sqrt(8 * 7 * 13 * 12)
    assert m["mcc"] == pytest.approx(expect)
    assert (m["tp"], m["fp"], m["fn"], m["tn"]) == (6, 2, 1, 11)
    assert m["precision"] == pytest.approx(6 / 8)
    assert m["recall"] == pytest.approx(6 / 7)
    assert m["f1"] == pytest.approx(2 * 6 / (2 * 6 + 2 + 1))


def test_undefined_ratios_are_none():
    y = np.array([True, False, False])
    m = detection_metrics(y, np.zeros(3, bool))
    assert m["precision"] is None and m["precision_ci"] is None
    assert m["recall"] == 0.0 and m["f1"] == 0.0
    assert m["mcc"] is None
    m = detection_metrics(np.zeros(3, bool), np.zeros(3, bool))
    assert m["recall"] is None and m["f1"] is None and m["accuracy"] == 1.0
