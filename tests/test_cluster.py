"""The lut search and a short ladder on a Dask cluster (two local worker processes).

Needs the ``cluster`` extra (``dask[distributed]``); skipped without it. One cluster serves the
module and is always closed; every wait has a timeout.
"""
from __future__ import annotations

import logging
import os
import signal
import time

import numpy as np
import pytest

distributed = pytest.importorskip("dask.distributed")

from pixelfit.data import Binarizer, Dataset  # noqa: E402
from pixelfit.errors import TrainingError  # noqa: E402
from pixelfit.ladder import cluster_engine, prepare, run_ladder  # noqa: E402
from pixelfit.models import SearchCancelled  # noqa: E402
from pixelfit.models import lut_engine as engine  # noqa: E402
from pixelfit.models.lut_engine import CountIndex, exhaustive_best  # noqa: E402

# joblib says how many units a cancelled search left unread; that is the point of cancelling.
pytestmark = pytest.mark.filterwarnings("ignore:.*tasks which were still being processed:UserWarning")

BUSY = ("processing", "queued", "waiting", "no-worker")


@pytest.fixture(scope="module")
def cluster():
    cl = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=logging.ERROR)
    client = distributed.Client(cl, timeout=30)
    try:
        client.wait_for_workers(2, timeout=60)
        yield cl, client
    finally:
        client.close(timeout=10)
        cl.close(timeout=10)


@pytest.fixture
def many_units(monkeypatch):
    # Small searches normally stay in the calling thread, in a few units: send them out, in many.
    monkeypatch.setattr(engine, "PARALLEL_MIN_WORDS", 0)
    monkeypatch.setattr(engine, "CHUNK_WORDS", 6000)


def case(seed=0, n=2000, p=24):
    rng = np.random.default_rng(seed)
    X = rng.random((n, p)) < 0.5
    y = X[:, 3] ^ X[:, 9] ^ (rng.random(n) < 0.2)
    return X, y


def busy_tasks(client) -> int:
    return client.run_on_scheduler(lambda dask_scheduler: sum(
        ts.state in BUSY for ts in dask_scheduler.tasks.values()))


def wait_idle(client, timeout=15.0) -> int:
    end = time.monotonic() + timeout
    while (left := busy_tasks(client)) and time.monotonic() < end:
        time.sleep(0.1)
    return left


def test_search_on_the_cluster_equals_the_local_one(cluster, many_units):
    cl, client = cluster
    X, y = case()
    local = exhaustive_best(CountIndex(X, y), 3, keep=6, n_jobs=1)
    with cluster_engine(cl.scheduler_address):
        remote = exhaustive_best(CountIndex(X, y), 3, keep=6, n_jobs=None)
    assert remote[0].tolist() == local[0].tolist() and remote[1].tolist() == local[1].tolist()
    prefixes = client.run_on_scheduler(lambda dask_scheduler: list(dask_scheduler.task_prefixes))
    assert any("_best_unit" in p for p in prefixes)  # the units did run on the workers
    assert "CountIndex" in prefixes  # the index travelled once per search, as scattered data


def test_short_ladder_on_the_cluster_equals_the_local_one(cluster, many_units):
    cl, _ = cluster
    X, y = case(1, n=400, p=36)
    images = np.where(X, 200, 30).astype(np.uint8).reshape(-1, 6, 6)
    labels = np.where(y, "hit", "miss")
    ds = Dataset(images, labels, [f"#{i}" for i in range(len(y))], "generated", "npz")
    prep = prepare(ds, Binarizer("otsu"), seed=2)
    plan = [("constant", 0), ("lut", 2), ("lut", 3)]
    here = [pr.rung for pr in run_ladder(prep, plan, folds=2, seed=2) if pr.rung]
    there = [pr.rung for pr in run_ladder(prep, plan, folds=2, seed=2, scheduler=cl.scheduler_address) if pr.rung]
    assert [r.key for r in there] == [r.key for r in here]
    for a, b in zip(here, there):
        assert a.pixels == b.pixels and a.train == b.train and a.test == b.test and a.cv == b.cv
        if a.family == "lut":
            assert a.estimator.table_.tolist() == b.estimator.table_.tolist()
            assert a.search["method"] == b.search["method"] == "exhaustive"


def test_cancel_stops_the_clusters_work(cluster, many_units):
    cl, client = cluster
    X, y = case(2, n=3000, p=40)
    seen = []
    with cluster_engine(cl.scheduler_address), pytest.raises(SearchCancelled):
        exhaustive_best(CountIndex(X, y), 4, n_jobs=None, progress=lambda d, t: seen.append((d, t)),
                        cancel=lambda: len(seen) >= 3)
    assert len(seen) == 3 and seen[-1][0] < seen[-1][1]
    assert wait_idle(client) == 0  # nothing left running or queued on the cluster


def test_a_killed_worker_is_retried_or_a_clear_error(cluster, many_units):
    cl, client = cluster
    X, y = case(3, n=3000, p=30)
    local = exhaustive_best(CountIndex(X, y), 4, keep=3, n_jobs=1)
    pids = client.run(os.getpid)
    killed = []

    def kill_one(done, total):
        if not killed:
            os.kill(next(iter(pids.values())), signal.SIGKILL)
            killed.append(done)

    try:
        with cluster_engine(cl.scheduler_address):
            remote = exhaustive_best(CountIndex(X, y), 4, keep=3, n_jobs=None, progress=kill_one)
    except TrainingError as exc:  # the cluster could not recover: said, and no result
        assert "the cluster lost work of the search" in str(exc)
    else:  # retried elsewhere: the same optimum as the local search
        assert remote[0].tolist() == local[0].tolist() and remote[1].tolist() == local[1].tolist()
    assert killed and killed[0] < local[2]  # the worker died while the search was under way
    client.wait_for_workers(2, timeout=60)  # the nanny restarts it for later tests


def test_unreachable_scheduler_is_one_clear_line(monkeypatch):
    import pixelfit.ladder as ladder
    from pixelfit.errors import PixelfitError

    monkeypatch.setattr(ladder, "CLUSTER_CONNECT_SECONDS", 1)
    with pytest.raises(PixelfitError, match="cannot reach the Dask scheduler"), \
            cluster_engine("tcp://127.0.0.1:9"):
        pass
