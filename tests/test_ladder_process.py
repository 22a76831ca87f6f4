"""The ladder in a child process: same records as in-process, cancellable, and it never outlives the call."""

import glob
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
from pixelfit.ladder_process import SHM_PREFIX, TrainerLost, _child_args, run_ladder_in_process, slim, start_method, warm_up

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
    assert s.test_mask is prep.test_mask and s.groups is prep.groups and s.check is None  # CV folds read both
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
        "    print(os.getpid(), multiprocessing.active_children()[0].pid, flush=True)\n"
        "    os._exit(0)\n")  # no cleanup at all, as if killed
    # The script lives elsewhere: point it at this checkout, not at whichever copy is installed.
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=120, env=env)
    caller, pid = map(int, out.stdout.split()[-2:])
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
    # The caller made no cleanup; multiprocessing's resource tracker unlinks its shared block.
    while blocks(caller) and time.monotonic() < deadline + 30:
        time.sleep(0.1)
    assert blocks(caller) == []


# --- the large arrays travel through shared memory, not the pipe ---------------------------------

def blocks(pid: int | None = None) -> list[str]:
    """The shared-memory blocks this process (or ``pid``) made for its trainers, by name."""
    return sorted(glob.glob(f"/dev/shm/{SHM_PREFIX}{os.getpid() if pid is None else pid}-*"))


needs_dev_shm = pytest.mark.skipif(not os.path.isdir("/dev/shm"), reason="lists the blocks in /dev/shm")


def _digest_in_child(conn, name, layout):  # runs in a spawned child
    import hashlib

    from pixelfit.ladder_process import SharedArrays

    _block, views = SharedArrays.attach(name, layout)
    conn.send({k: (v.dtype.str, v.shape, v.flags.writeable, hashlib.sha256(v.tobytes()).hexdigest())
               for k, v in views.items()})
    conn.close()


def test_the_child_maps_the_same_arrays(prep):
    import hashlib

    grey = prep.dataset.images[prep.test_mask]
    shell, grey_stub, shared = _child_args(prep, grey)
    assert shared is not None
    try:
        # what is pickled holds no data: every shared array arrives empty
        assert shell.X_train.shape == (0, prep.n_pixels) and shell.y_test.size == 0 and grey_stub.shape == (0, 8, 8)
        ctx = multiprocessing.get_context("spawn")
        here, there = ctx.Pipe()
        child = ctx.Process(target=_digest_in_child, args=(there, shared.name, shared.layout))
        child.start()
        seen = here.recv()
        child.join(60)
    finally:
        shared.release()
    expect = {k: getattr(prep, k) for k in ("X_train", "y_train", "X_test", "y_test", "test_mask", "groups")}
    expect["grey_test"] = grey
    assert set(seen) == set(expect)
    for k, a in expect.items():
        a = np.ascontiguousarray(a)
        assert seen[k] == (a.dtype.str, a.shape, False, hashlib.sha256(a.tobytes()).hexdigest()), k


def test_what_is_pickled_to_the_child_does_not_grow_with_the_set(rng):
    import pickle

    imgs = (rng.random((20_000, 16, 16)) * 255).astype(np.uint8)
    ds = Dataset(imgs, np.array(["a", "b"] * 10_000), [], "generated", "npz")
    p = prepare(ds, Binarizer("otsu"), seed=0, split="stratified")
    grey = imgs[p.test_mask]
    before = len(pickle.dumps((slim(p), grey)))
    shell, grey_stub, shared = _child_args(p, grey)
    assert shared is not None
    shared.release()
    after = len(pickle.dumps((shell, grey_stub, (shared.name, shared.layout))))
    assert before > 20_000 * 256  # at least the boolean matrix, one byte a pixel
    assert after < 50_000, after


def test_duplicate_groups_reach_the_child(rng):
    # Identical grey patches must stay in one CV fold in the child as they do in-process.
    imgs, labels = make_patches(rng, n=160)
    imgs[80:120] = imgs[0:40]
    labels[80:120] = labels[0:40]
    ds = Dataset(imgs, labels, [f"#{i}" for i in range(160)], "generated", "npz")
    p = prepare(ds, Binarizer("otsu"), seed=3)
    assert p.train_groups is not None
    plan = [("lut", 2), ("tree", 2)]
    here = [pr.rung for pr in run_ladder(p, plan, folds=3, seed=1) if pr.rung]
    there = [pr.rung for pr in run_ladder_in_process(p, plan, folds=3, seed=1) if pr.rung]
    assert [r.cv for r in there] == [r.cv for r in here]


@needs_dev_shm
def test_the_block_is_gone_after_a_normal_run(prep):
    gen = run_ladder_in_process(prep, [("constant", 0), ("lut", 1)], folds=2)
    next(gen)
    assert len(blocks()) == 1
    list(gen)
    assert blocks() == []


@needs_dev_shm
def test_the_block_is_gone_after_a_cancel_a_kill_and_an_early_exit(prep):
    seen = []
    with pytest.raises(LadderCancelled):
        for pr in run_ladder_in_process(prep, [("lut", k) for k in (1, 2, 3, 4)], folds=3,
                                        cancel=lambda: any(p.rung for p in seen)):
            seen.append(pr)
    assert blocks() == []
    gen = run_ladder_in_process(prep, [("constant", 0)] + [("lut", k) for k in (1, 2, 3, 4)] * 3, folds=5)
    next(gen)
    (child,) = trainers()
    os.kill(child.pid, signal.SIGKILL)
    with pytest.raises(TrainerLost):
        list(gen)
    assert blocks() == []
    gen = run_ladder_in_process(prep, [("lut", k) for k in (1, 2, 3, 4)] * 3, folds=5)
    next(gen)
    gen.close()
    assert blocks() == []
    with pytest.raises(TrainingError):
        list(run_ladder_in_process(prep, [("logistic", 0)], folds=2))
    assert blocks() == []
