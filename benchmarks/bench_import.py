"""Import speed and memory: pixelfit's loaders against the bare minimum in the same process.

Run from the repository root::

    python benchmarks/bench_import.py                      # both parts
    python benchmarks/bench_import.py --png 2000 --npz 100000   # smaller, quicker

1. ``load_dataset`` on a class-folder set of ``--png`` PNG patches (16x16) vs a bare Pillow
   loop (open, convert to L, to numpy) over the same files. Goal: at most 2x the bare loop.
2. Peak resident memory of a fresh process that imports ``--npz`` 16x16 patches from one .npz
   file with ``load_dataset`` (and then binarizes and splits them with ``prepare``). Goal: at
   most 2 GB for 1,000,000 patches.

The patches are invented noise written to a temporary folder that is removed afterwards.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from pixelfit.data import load_dataset

CHILD = """
import resource, sys, time
sys.path.insert(0, {root!r})
from pixelfit.data import Binarizer, load_dataset
from pixelfit.ladder import prepare
t0 = time.perf_counter()
ds = load_dataset({path!r})
t1 = time.perf_counter()
peak_load = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
prep = prepare(ds, Binarizer("otsu"), positive="mark")
t2 = time.perf_counter()
peak_prep = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(len(ds), t1 - t0, peak_load, t2 - t1, peak_prep)
"""


def write_pngs(root: Path, n: int, side: int, rng) -> list[Path]:
    files = []
    for i in range(n):
        label = "mark" if i % 3 == 0 else "clean"
        d = root / label
        d.mkdir(exist_ok=True)
        f = d / f"p{i:06d}.png"
        Image.fromarray(rng.integers(0, 256, (side, side), dtype=np.uint8)).save(f)
        files.append(f)
    return files


def bare_loop(root: Path) -> int:
    count = 0
    for d in sorted(root.iterdir()):
        for f in sorted(d.iterdir()):
            with Image.open(f) as im:
                np.asarray(im.convert("L"))
            count += 1
    return count


def best_of(fn, repeat):
    best = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        t = time.perf_counter() - t0
        best = t if best is None else min(best, t)
    return best


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--png", type=int, default=10_000)
    ap.add_argument("--npz", type=int, default=1_000_000)
    ap.add_argument("--side", type=int, default=16)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    print(f"cpus={os.cpu_count()}, load average {os.getloadavg()[0]:.2f}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        if args.png:
            root = tmp / "folders"
            root.mkdir()
            write_pngs(root, args.png, args.side, rng)
            bare_loop(root)  # warm the file cache for both
            t_bare = best_of(lambda: bare_loop(root), args.repeat)
            t_ours = best_of(lambda: load_dataset(root), args.repeat)
            print(f"\n1. {args.png:,} PNG patches {args.side}x{args.side}: bare Pillow loop {t_bare:.3f} s, "
                  f"load_dataset {t_ours:.3f} s, ratio {t_ours / t_bare:.2f} (goal <= 2)")
        if args.npz:
            path = tmp / "many.npz"
            images = rng.integers(0, 256, (args.npz, args.side, args.side), dtype=np.uint8)
            labels = np.where(rng.random(args.npz) < 0.3, "mark", "clean")
            np.savez(path, images=images, labels=labels)
            raw_mb = images.nbytes / 2**20
            del images, labels
            out = subprocess.run([sys.executable, "-c", CHILD.format(root=ROOT, path=str(path))],
                                 capture_output=True, text=True, check=True).stdout.split()
            n, t_load, peak_load, t_prep, peak_prep = int(out[0]), float(out[1]), int(out[2]), float(out[3]), int(out[4])
            gb = 1024 / 1e9  # ru_maxrss is in KiB on Linux
            print(f"\n2. {n:,} patches {args.side}x{args.side} from .npz ({raw_mb:.0f} MiB of pixels): "
                  f"load_dataset {t_load:.1f} s, peak {peak_load * gb:.2f} GB (goal <= 2 GB); "
                  f"after prepare (binarize + split) {t_prep:.1f} s, peak {peak_prep * gb:.2f} GB")


if __name__ == "__main__":
    main()
