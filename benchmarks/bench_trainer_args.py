"""What a climb hands its trainer process: pickled bytes and hand-over time, shared memory against the pipe.

Run from the repository root::

    python benchmarks/bench_trainer_args.py              # 200,000 patches of 16x16
    python benchmarks/bench_trainer_args.py --n 1000000

Prepares N generated patches (those of bench_million.py) as the window does, then measures what
:func:`pixelfit.ladder_process.run_ladder_in_process` sends to the child: the pickled size of the
child's arguments, with the large arrays in one shared-memory block (now) and pickled through the
pipe (the reference: what the code did before, and still does when ``/dev/shm`` has too little room),
and the time from the call to the child's first record for a one-rung ladder (constant, no CV),
both ways, in the same process.
"""

from __future__ import annotations

import argparse
import pickle
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench_million import make_patches  # noqa: E402

import pixelfit.ladder_process as lp  # noqa: E402
from pixelfit.data import Binarizer, Dataset  # noqa: E402
from pixelfit.ladder import prepare  # noqa: E402


def first_record_seconds(prep, grey) -> float:
    t0 = time.perf_counter()
    gen = lp.run_ladder_in_process(prep, [("constant", 0)], folds=0, grey_test=grey)
    next(gen)
    took = time.perf_counter() - t0
    gen.close()
    return took


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=200_000)
    args = ap.parse_args()
    images, labels = make_patches(args.n)
    t0 = time.perf_counter()
    prep = prepare(Dataset(images, labels, [], "generated", "npz"), Binarizer("otsu"), seed=0)
    print(f"{args.n:,} patches of 16x16 prepared in {time.perf_counter() - t0:.1f} s; "
          f"training matrix {prep.X_train.nbytes / 2**20:.1f} MiB, held-out {prep.X_test.nbytes / 2**20:.1f} MiB")
    grey = images[prep.test_mask]
    piped = len(pickle.dumps((lp.slim(prep), grey), protocol=pickle.HIGHEST_PROTOCOL))
    shell, grey_stub, shared = lp._child_args(prep, grey)
    assert shared is not None, "no room in /dev/shm for the block"
    block = shared.nbytes
    shared.release()
    now = len(pickle.dumps((shell, grey_stub, (shared.name, shared.layout)), protocol=pickle.HIGHEST_PROTOCOL))
    print(f"pickled to the child: {piped:,} bytes through the pipe (reference), {now:,} bytes with a "
          f"{block / 2**20:.1f} MiB shared block: {piped / now:,.0f}x fewer")
    lp.warm_up()
    first_record_seconds(prep, grey)  # the fork server's first start is no part of either figure
    t_shared = min(first_record_seconds(prep, grey) for _ in range(3))
    fits = lp.SharedArrays.fits
    lp.SharedArrays.fits = staticmethod(lambda nbytes: False)  # type: ignore[method-assign]
    try:
        t_piped = min(first_record_seconds(prep, grey) for _ in range(3))
    finally:
        lp.SharedArrays.fits = fits  # type: ignore[method-assign]
    print(f"call to the child's first record (best of 3): {t_piped:.3f} s pickled (reference), "
          f"{t_shared:.3f} s shared: {t_piped / t_shared:.2f}x")


if __name__ == "__main__":
    main()
