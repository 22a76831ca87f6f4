"""The ladder in a child process: same records as in-process, cancellable, and it never outlives the call."""

import multiprocessing
import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import make_patches

from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import TrainingError
from pixelfit.ladder import LadderCancelled, prepare, run_ladder
from pixelfit.ladder_process import TrainerLost, run_ladder_in_process, slim, start_method, warm_up

PLAN = [("constant", 0), ("lut", 1), ("lut", 2), ("nb", 4), ("logistic", 2), ("tree", 2)]


@pytest.fixture
def prep(rng):
    imgs, labels = make_patches(rng, n=160)
    ds = Dataset(imgs, labels, [f"#{i}" for i in range(len(labels))], "generated", "npz")
    return prepare(ds, Binarizer("otsu"), seed=3)


def trainers():
    return [p for p in multiprocessing.active_children() if p.name == "pixelfit-trainer"]


def test_same_rungs_as_in_process(prep):
    warm_up()
    here = [pr for pr in run_ladder(prep, PLAN, folds=3, seed=1)]
    there = [pr for pr in run_ladder_in_process(prep, PLAN, folds=3, seed=1)]
    assert [(p.done, p.total, p.message) for p in there] == [(p.done, p.total, p.message) for p in here]
    a = [p.rung for p in here if p.rung]
    b = [p.rung for p in there if p.rung]
    assert [r.key for r in b] == [k + "-" + str(s) for k, s in PLAN]
    for ra, rb in zip(a, b):
        assert rb.train == ra.train and rb.test == ra.test and rb.cv == ra.cv and rb.pixels == ra.pixels
        assert np.array_equal(rb.test_pred, ra.test_pred)
        # the estimator came back whole: it predicts like the one trained here
        assert np.array_equal(rb.estimator.predict(prep.X_test), ra.estimator.predict(prep.X_test))
    assert start_method() in ("forkserver", "spawn")
    assert trainers() == []


def test_slim_keeps_what_training_reads(prep):
    s = slim(prep)
    assert s.shape == prep.shape and s.n_pixels == prep.n_pixels and len(s.dataset) == 0
    assert s.X_train is prep.X_train and s.y_test is prep.y_test and s.positive == prep.positive
    assert len(prep.dataset) == 160  # the original is untouched


def test_cancel_stops_the_child_and_keeps_earlier_records(prep):
    seen = []
    with pytest.raises(LadderCancelled):
        for pr in run_ladder_in_process(prep, [("lut", 1), ("lut", 2), ("lut", 3), ("lut", 4)], folds=3,
                                        cancel=lambda: any(p.rung for p in seen)):
            seen.append(pr)
    assert [p.rung.key for p in seen if p.rung] == ["lut-1"]
    assert trainers() == []


def test_refusal_comes_back_as_the_same_error(prep):
    with pytest.raises(TrainingError, match="must be at least 1"):
        list(run_ladder_in_process(prep, [("constant", 0), ("logistic", 0)], folds=2))
    assert trainers() == []


def test_a_bug_in_the_child_is_reported_not_raised_raw(prep):
    with pytest.raises(TrainerLost, match="KeyError"):
        list(run_ladder_in_process(prep, [("no-such-family", 1)], folds=2))


def test_a_killed_child_is_reported(prep):
    gen = run_ladder_in_process(prep, [("constant", 0)] + [("lut", k) for k in (1, 2, 3, 4)] * 3, folds=5)
    next(gen)
    (child,) = trainers()
    os.kill(child.pid, signal.SIGKILL)
    with pytest.raises(TrainerLost, match="ended without finishing"):
        for _ in gen:
            pass
    assert trainers() == []


def test_leaving_early_ends_the_child(prep):
    gen = run_ladder_in_process(prep, [("lut", k) for k in (1, 2, 3, 4)] * 3, folds=5)
    next(gen)
    assert len(trainers()) == 1
    t = time.perf_counter()
    gen.close()
    assert trainers() == []
    assert time.perf_counter() - t < 10


def test_unguarded_script_gets_a_clear_message(tmp_path):
    # The child re-imports the calling script (as multiprocessing does); without a main guard the
    # script would start a trainer again from inside the child, which Python refuses.
    import subprocess
    import sys

    script = tmp_path / "unguarded.py"
    script.write_text(
        "import numpy as np\n"
        "from pixelfit.data import Binarizer, Dataset\n"
        "from pixelfit.ladder import prepare\n"
        "from pixelfit.ladder_process import TrainerLost, run_ladder_in_process\n"
        "rng = np.random.default_rng(0)\n"
        "ds = Dataset((rng.random((40, 6, 6)) * 255).astype(np.uint8), np.array(['a', 'b'] * 20), [], 'x', 'npz')\n"
        "try:\n"
        "    list(run_ladder_in_process(prepare(ds, Binarizer('otsu')), [('constant', 0)], 2))\n"
        "    print('RAN')\n"
        "except TrainerLost as exc:\n"
        "    print('LOST', exc)\n")
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=120)
    last = out.stdout.strip().splitlines()[-1]
    assert last.startswith("LOST") and "__main__" in last, out.stdout + out.stderr


def test_a_child_that_does_not_stop_in_time_is_terminated(prep, monkeypatch):
    import pixelfit.ladder_process as lp

    monkeypatch.setattr(lp, "STOP_GRACE_S", 0.0)  # read by the caller's side, which does the waiting
    seen = []
    with pytest.raises(LadderCancelled):
        for pr in run_ladder_in_process(prep, [("lut", k) for k in (1, 2, 3, 4)] * 3, folds=5,
                                        cancel=lambda: bool(seen)):
            seen.append(pr)
    assert trainers() == []


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="reads the child's state from /proc")
def test_the_child_stops_when_its_caller_dies(tmp_path):
    # A caller killed mid-climb leaves no trainer running on: the child notices the closed pipe at
    # its next step.
    import subprocess
    import sys

    script = tmp_path / "caller.py"
    script.write_text(
        "import os, sys, numpy as np\n"
        "from pixelfit.data import Binarizer, Dataset\n"
        "from pixelfit.ladder import prepare\n"
        "from pixelfit.ladder_process import run_ladder_in_process\n"
        "import multiprocessing\n"
        "if __name__ == '__main__':\n"
        "    rng = np.random.default_rng(0)\n"
        "    ds = Dataset((rng.random((400, 8, 8)) * 255).astype(np.uint8), np.array(['a', 'b'] * 200), [], 'x', 'npz')\n"
        "    gen = run_ladder_in_process(prepare(ds, Binarizer('otsu')), [('lut', k) for k in (1, 2, 3, 4)] * 20, 5)\n"
        "    next(gen)\n"
        "    print(multiprocessing.active_children()[0].pid, flush=True)\n"
        "    os._exit(0)\n")  # no cleanup at all, as if killed
    # The script lives elsewhere: point it at this checkout, not at whichever copy is installed.
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=120, env=env)
    pid = int(out.stdout.split()[-1])
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            with open(f"/proc/{pid}/stat") as f:
                if f.read().rsplit(")", 1)[1].split()[0] == "Z":
                    break  # ended; only its exit status waits for a reaper
        except FileNotFoundError:
            break
        time.sleep(0.1)
    else:
        os.kill(pid, signal.SIGKILL)
        pytest.fail("the trainer outlived its caller by 30 s")
