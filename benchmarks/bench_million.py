"""`pixelfit fit` end to end on a large generated set: wall time and peak resident memory.

Run from the repository root::

    python benchmarks/bench_million.py                 # 1,000,000 patches of 16x16
    python benchmarks/bench_million.py --n 200000      # smaller, quicker
    python benchmarks/bench_million.py --families all  # the command line's default families

Writes N seeded synthetic 16x16 patches to an uncompressed ``.npz`` in a temporary folder (or
``--keep DIR``), then runs ``python -m pixelfit fit FILE --out DIR`` on it as a child process, with
the families, ``--max-size`` and ``--folds`` given here (by default the command line's own: every
family at its default sizes, 5 folds, the checks at their defaults). The child's own progress bar
is shown as it runs, with this script's elapsed time every ``--every`` seconds. The reference run
of the issue (63 minutes, 5.3 GB before the large-set work) used
``--families constant,lut,nb,logistic,tree --max-size 4 --folds 3``.

Measured: the child's wall time, and its peak resident set size (``ru_maxrss`` of the waited-for
children, which covers the child and anything it starts), printed against the goals (20 minutes,
4 GiB), and the seconds of each family summed from ``summary.json``. The patches are a scenario
of our own: dark noise, and in about 30 % of them (the class ``mark``) a brighter 3x3 blot over
the central 2x2 (shifted by up to a pixel), with 2 % of the labels flipped so no rung is perfect.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import subprocess
import sys
import tempfile
import threading
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
GOAL_SECONDS = 20 * 60
GOAL_BYTES = 4 << 30


def make_patches(n: int, side: int = 16, seed: int = 0, chunk: int = 100_000) -> tuple[np.ndarray, np.ndarray]:
    """``n`` grey patches (uint8, n x side x side) and their labels, generated in chunks."""
    rng = np.random.default_rng(seed)
    images = np.empty((n, side, side), np.uint8)
    mark = rng.random(n) < 0.3
    lo, span = side // 2 - 2, 2  # blot corners: every blot covers the central 2x2
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        block = rng.integers(0, 120, (b - a, side, side), dtype=np.uint8)
        rows = np.flatnonzero(mark[a:b])
        r = lo + rng.integers(0, span, len(rows))
        c = lo + rng.integers(0, span, len(rows))
        level = rng.integers(110, 230, len(rows)).astype(np.uint8)
        for dr in range(3):
            for dc in range(3):
                block[rows, r + dr, c + dc] = np.maximum(block[rows, r + dr, c + dc], level)
        images[a:b] = block
    flip = rng.random(n) < 0.02
    labels = np.where(mark ^ flip, "mark", "plain")
    return images, labels


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="patches to generate (1,000,000)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--families", default="all",
                    help="passed to --families; 'all' (default) leaves the option out: the command line's default")
    ap.add_argument("--max-size", default="none", help="passed to --max-size; 'none' (default) leaves it out")
    ap.add_argument("--folds", type=int, default=5, help="passed to --folds (5, the command line's default)")
    ap.add_argument("--every", type=float, default=60.0, help="seconds between elapsed-time lines (60)")
    ap.add_argument("--keep", metavar="DIR", help="write the .npz and the run here and keep them")
    args = ap.parse_args()

    with tempfile.TemporaryDirectory(prefix="pixelfit-bench-") as tmp:
        where = Path(args.keep or tmp)
        where.mkdir(parents=True, exist_ok=True)
        data, out = where / f"patches-{args.n}.npz", where / "run"
        t0 = time.perf_counter()
        images, labels = make_patches(args.n, seed=args.seed)
        np.savez(data, images=images, labels=labels)
        del images, labels
        print(f"generated {args.n:,} patches of 16x16 into {data} ({data.stat().st_size / 2**20:,.0f} MiB) "
              f"in {time.perf_counter() - t0:.1f} s", flush=True)
        cmd = [sys.executable, "-m", "pixelfit", "fit", str(data), "--out", str(out), "--overwrite",
               "--folds", str(args.folds)]
        if args.families != "all":
            cmd += ["--families", args.families]
        if args.max_size != "none":
            cmd += ["--max-size", args.max_size]
        print("running:", " ".join(cmd), flush=True)
        load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
        before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
        t0 = time.perf_counter()
        # The child's output passes through here, so that the step it was at is known at any moment.
        child = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                 env={**os.environ, "PYTHONUNBUFFERED": "1"})
        done = threading.Event()
        step = {"text": "(starting)", "peak": 0, "at": "", "when": 0.0}

        def relay() -> None:
            assert child.stdout is not None
            line = b""
            while chunk := os.read(child.stdout.fileno(), 4096):
                sys.stdout.buffer.write(chunk)
                sys.stdout.flush()
                for ch in re.split(rb"([\r\n])", chunk):
                    if ch in (b"\r", b"\n"):
                        if line.strip():
                            step["text"] = line.decode(errors="replace").strip()
                        line = b""
                    else:
                        line += ch

        def watch() -> None:  # the child's resident memory, twice a second, and the step at its peak
            status = Path(f"/proc/{child.pid}/status")
            while not done.wait(0.5):
                try:
                    rss = next(int(x.split()[1]) for x in status.read_text().splitlines() if x.startswith("VmRSS"))
                except (OSError, StopIteration, ValueError):
                    continue
                if rss > step["peak"]:
                    step.update(peak=rss, at=step["text"], when=time.perf_counter() - t0)

        def tick() -> None:
            while not done.wait(args.every):
                print(f"\n[bench] {time.perf_counter() - t0:,.0f} s elapsed", file=sys.stderr, flush=True)

        relayer = threading.Thread(target=relay, daemon=True)
        relayer.start()
        threading.Thread(target=watch, daemon=True).start()
        threading.Thread(target=tick, daemon=True).start()
        try:
            rc = child.wait()
        except KeyboardInterrupt:  # the child got the same Ctrl-C: let it keep its finished rungs
            rc = child.wait()
        done.set()
        relayer.join(timeout=5)
        wall = time.perf_counter() - t0
        peak_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
        peak = peak_kib * 1024 if sys.platform != "darwin" else peak_kib  # bytes on macOS
        if peak_kib <= before:
            print("note: the peak below may be an earlier child's (ru_maxrss is the largest of all children)")
        per_family: dict[str, float] = defaultdict(float)
        summary = out / "summary.json"
        if summary.exists():
            for r in json.loads(summary.read_text())["rungs"]:
                per_family[r["family"]] += r["seconds"]
        print(f"\nexit code {rc}; {args.n:,} patches; load average at the start {load:.1f}")
        print(f"wall time {wall:,.1f} s ({wall / GOAL_SECONDS:.2f}x the 20-minute goal)")
        print(f"peak resident memory {peak / 2**30:.2f} GiB ({peak / GOAL_BYTES:.2f}x the 4 GiB goal)")
        if step["peak"]:
            print(f"largest resident memory sampled: {step['peak'] / 2**20:.2f} GiB at {step['when']:,.0f} s, "
                  f"during: {step['at']}")
        if per_family:
            rungs = sum(per_family.values())
            print("seconds per family (rungs, from summary.json): "
                  + ", ".join(f"{k} {v:,.0f}" for k, v in per_family.items()))
            print(f"rungs {rungs:,.0f} s; everything else (import, split, data check, checks after the ladder, "
                  f"outputs) {wall - rungs:,.0f} s")
        return rc


if __name__ == "__main__":
    sys.exit(main())
