"""Fits at once on threads: the same figures as one after the other."""

import numpy as np
import pytest
from conftest import make_patches

from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import TrainingError
from pixelfit.ladder import LadderCancelled, check_workers, in_threads, prepare, run_ladder
from pixelfit.robustness import CheckSettings, run_checks


def _strip(summary: dict) -> dict:
    """A rung's summary without what a clock measured (its seconds, a search's timed estimate)."""
    out = {k: v for k, v in summary.items() if k != "seconds"}
    if out.get("search"):
        out["search"] = {k: v for k, v in out["search"].items() if k != "estimated_seconds"}
    return out


def test_in_threads_keeps_the_order_and_runs_on_the_caller_alone():
    import threading

    seen = []

    def task(i):
        seen.append(threading.current_thread() is threading.main_thread())
        return i * i

    assert list(in_threads([lambda i=i: task(i) for i in range(7)], 1)) == [i * i for i in range(7)]
    assert all(seen)  # one worker: the calling thread, no pool
    seen.clear()
    assert list(in_threads([lambda i=i: task(i) for i in range(7)], 3)) == [i * i for i in range(7)]
    assert not any(seen)
    for bad in (0, -1, 1.5, True):
        with pytest.raises(TrainingError):
            check_workers(bad)


def test_a_ladder_and_its_checks_on_two_threads_give_the_same_figures(rng):
    imgs, labels = make_patches(rng, n=160)
    prep = prepare(Dataset(imgs, labels, [], "generated", "npz"), Binarizer("otsu"), seed=1)
    plan = [("constant", 0), ("lut", 2), ("nb", 4), ("logistic", 2), ("tree", 3), ("mlp", 2), ("memorize", 64)]
    runs, checks = [], []
    for workers in (1, 2):
        records = list(run_ladder(prep, plan, folds=3, workers=workers))
        rungs = [pr.rung for pr in records if pr.rung]
        runs.append(([_strip(r.summary(prep.shape)) for r in rungs], [pr.message for pr in records],
                     [r.test_scores for r in rungs]))
        last = None
        for pr in run_checks(prep, rungs, prep.dataset.images[prep.test_mask], rungs[1],
                             CheckSettings(bias_variance=3, workers=workers)):
            last = pr.checks or last
        checks.append((last.bias_variance, last.learning_curve, last.stress))
    assert runs[0][0] == runs[1][0] and runs[0][1] == runs[1][1]
    for a, b in zip(runs[0][2], runs[1][2]):
        assert (a is None and b is None) or np.array_equal(a, b)
    assert checks[0] == checks[1]


def test_cancel_on_two_threads_stops_the_ladder(rng):
    imgs, labels = make_patches(rng, n=120)
    prep = prepare(Dataset(imgs, labels, [], "generated", "npz"), Binarizer("otsu"), seed=1)
    calls = []

    def cancel():
        calls.append(1)
        return len(calls) > 3

    finished = []
    with pytest.raises(LadderCancelled):
        for pr in run_ladder(prep, [("tree", 1), ("tree", 2), ("tree", 3)], folds=3, cancel=cancel, workers=2):
            if pr.rung:
                finished.append(pr.rung.key)
    assert len(finished) < 3
