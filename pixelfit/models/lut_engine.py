"""Exact scoring of k-pixel truth-table rules, many pixel sets at a time.

For a pixel set S the best truth table labels each of its 2^k patterns with the majority class of
the training patches that show it, so the optimal training error of S is

    sum over patterns v of min(n_pos(v), n_neg(v)).

The pattern counts are never built per subset. For each class we count, for every T subset of
S, the patches whose pixels in T are all 1 (the "all-ones" count N(T)) and recover the exact
pattern counts by Moebius inversion over the subset lattice.

How the work is shared between subsets
--------------------------------------
Write S = P + {d} with d its largest pixel. All subsets with the same prefix P are scored
together, vectorised over d:

* N(P + {d}) for every d > max(P) is one AND of P's packed columns (computed once per prefix)
  with each later column, then a popcount: this is the only work that grows with the number of
  patches, one AND + popcount of n/64 words per subset.
* N(T + {d}) for the proper subsets T of P are lower-order counts, read as contiguous row slices
  of all-ones tables built level by level with the same kernel (table of order o: one row per
  (o-1)-set T in colex order, one column per pixel d).
* N(T) for T inside P are per-prefix scalars read from the same tables.

Patches are bit-packed per pixel column (``np.packbits`` to 64-bit words, ``np.bitwise_count``),
both classes side by side in one word array so one AND serves both, and only the class
difference of each count is kept (see :class:`CountIndex`). Repeated patches are collapsed into
weights when that shortens the word array: the distinct patches are split into bit planes of
their multiplicity, and plane b counts 2^b times.

Work units and parallelism
--------------------------
The subsets are cut into units (one prefix-maximum c and a block of prefixes), each with a bounded
AND buffer (:data:`CHUNK_WORDS`). A unit is a pure function of the read-only :class:`CountIndex`
and returns small arrays, so units run on joblib: threads by default (numpy releases the GIL in
these loops), or any joblib backend the caller activates, e.g. a cluster engine's::

    with joblib.parallel_config(backend="dask"):   # after dask.distributed.Client(...)
        rule.fit(X, y)

There the index (packed columns and tables, a few MB) travels to the workers once per search:
joblib's Dask backend scatters an argument whose size (``CountIndex.__sizeof__``) is large;
``pixelfit.ladder.cluster_engine`` opens such a client for ``--scheduler``. Progress is reported
and cancellation checked as each unit's result comes back; a search that does not get every
unit's result back raises instead of returning a smaller optimum.

Exhaustive or beam
------------------
:func:`plan_search` times a few work units of the search and extrapolates to all of its sets;
a search estimated over :data:`EXHAUSTIVE_SECONDS` becomes a beam unless forced.

Pattern code convention: bit j of a pattern code is the value of the j-th pixel of the set, the
pixel set being sorted ascending. Ties in training error go to the lexicographically first pixel
set (what a plain loop over ``itertools.combinations`` keeping the first strict minimum gives).
"""

from __future__ import annotations

import asyncio
import threading
import time
import warnings
from collections.abc import Callable, Iterator
from concurrent.futures import CancelledError
from dataclasses import dataclass
from math import comb

import numpy as np
from joblib import Parallel, delayed, effective_n_jobs
from threadpoolctl import threadpool_limits

from pixelfit.errors import TrainingError

#: Words in one unit's AND buffer (uint64, 8 MiB) and pattern-count array: bounds memory per worker.
CHUNK_WORDS = 1 << 20
#: Most entries one all-ones table may hold as int32 (128 MiB); larger orders are counted by
#: AND + popcount where they are needed (beam search only).
TABLE_LIMIT = 1 << 25
_MAX_TABLE_ORDER = 24
#: Searches smaller than this many words of AND + popcount run in the calling thread: below it,
#: starting workers costs more than it saves (a k = 3 search on 10,000 9x9 patches is ~13M).
PARALLEL_MIN_WORDS = 1 << 27

#: An exhaustive search estimated to take at most this many seconds runs by default; a longer
#: one becomes a beam search grown from the largest size that fits the same budget.
EXHAUSTIVE_SECONDS = 30.0
#: Time spent scoring sample units to estimate a search's length (the units are real work).
CALIBRATION_SECONDS = 0.05
_CALIBRATION_UNITS = 16

ProgressFn = Callable[[int, int], None]
CancelFn = Callable[[], bool]


class SearchCancelled(Exception):
    """Raised inside a search when its cancel callback returns True."""


def n_combinations(p: int, k: int) -> int:
    return comb(p, k)


def pack_columns(X: np.ndarray) -> np.ndarray:
    """Bit-pack each pixel column.

    Parameters
    ----------
    X : ndarray of shape (n_patches, n_pixels), bool

    Returns
    -------
    ndarray of shape (n_pixels, ceil(n_patches / 64)), uint64; padding bits are 0.
    """
    X = np.asarray(X, dtype=bool)
    n, p = X.shape
    n_words = -(-n // 64)
    packed = np.packbits(X.T, axis=1, bitorder="little")
    pad = n_words * 8 - packed.shape[1]
    if pad:
        packed = np.pad(packed, ((0, 0), (0, pad)))
    return np.ascontiguousarray(packed).view(np.uint64).reshape(p, n_words)


def _weight_planes(X: np.ndarray) -> list[tuple[np.ndarray, int]]:
    """Patches of one class as (rows, weight) groups whose weighted popcounts add up to the counts.

    Plain (every patch once, weight 1) unless collapsing repeats needs fewer words: distinct
    patches go to bit planes of their multiplicity, plane b counting 2^b times (a patch seen 5
    times sits in planes 0 and 2). The weights cost nothing extra: the kernel's reduction is one
    product with a weight per word.
    """
    n = len(X)
    if n < 128:  # two words at most: nothing to gain
        return [(X, 1)]
    # Sort packed rows (a few uint64 each) rather than np.unique(X, axis=0): 10-20x faster.
    rows = np.packbits(X, axis=1)
    rows = np.pad(rows, ((0, 0), (0, -rows.shape[1] % 8))).view(np.uint64)
    order = np.lexsort(rows.T[::-1])
    ordered = rows[order]
    first = np.ones(n, bool)
    first[1:] = (ordered[1:] != ordered[:-1]).any(axis=1)
    starts = np.flatnonzero(first)
    if len(starts) == n:
        return [(X, 1)]
    distinct, mult = X[order[starts]], np.diff(np.append(starts, n))
    planes = []
    for b in range(int(mult.max()).bit_length()):
        rows = distinct[(mult >> b) & 1 == 1]
        if len(rows):
            planes.append((rows, 1 << b))
    if sum(-(-len(r) // 64) for r, _ in planes) < -(-n // 64):
        return planes
    return [(X, 1)]


def colex_subsets(p: int, j: int) -> np.ndarray:
    """All j-subsets of range(p) in colex order (by largest element, then the next, ...).

    Returns ndarray of shape (C(p, j), j), int32, rows ascending. The j-subsets of range(c) are
    the first C(c, j) rows, and the colex rank of {t_1 < ... < t_j} is sum_i C(t_i, i).
    """
    if j == 0:
        return np.zeros((1, 0), np.int32)
    prev = colex_subsets(p, j - 1)
    blocks = [np.column_stack([prev[: comb(c, j - 1)], np.full(comb(c, j - 1), c, np.int32)])
              for c in range(j - 1, p)]
    return np.concatenate(blocks) if blocks else np.zeros((0, j), np.int32)


class CountIndex:
    """Packed pixel columns of both classes and their all-ones count tables.

    Only differences between the classes are kept: with D(v) = n_pos(v) - n_neg(v) the error
    sum_v min(n_pos(v), n_neg(v)) equals (n - sum_v |D(v)|) / 2, and D follows from the
    differences of all-ones counts by the same (linear) Moebius inversion. One count per subset
    instead of two halves the table lookups and the inversion work.

    Parameters
    ----------
    X : ndarray of shape (n_patches, n_pixels), bool
    y : ndarray of shape (n_patches,), bool
        True for the positive class.

    Attributes
    ----------
    n_pixels : int
    n_patches : int
    totals : ndarray of shape (2,), int64
        Patches per class, [negatives, positives].
    packed : ndarray of shape (n_pixels, n_words), uint64
        Columns of every weight plane of both classes, side by side.
    word_weights : ndarray of shape (n_words,), float
        What one set bit of each word adds to a difference count: +weight for positive words,
        -weight for negative ones. Float so the reduction is one BLAS product; exact because
        every partial sum is an integer of magnitude at most n_patches < 2^24 (float32) or
        2^53 (float64).
    """

    def __init__(self, X: np.ndarray, y: np.ndarray):
        X = np.asarray(X, dtype=bool)
        y = np.asarray(y, dtype=bool)
        self.n_pixels = p = X.shape[1]
        self.n_patches = len(y)
        self.totals = np.array([np.sum(~y), np.sum(y)], np.int64)
        blocks, weights = [], []
        for sign, Xc in ((-1, X[~y]), (1, X[y])):
            for rows, weight in _weight_planes(Xc):
                block = pack_columns(rows)
                blocks.append(block)
                weights.append(np.full(block.shape[1], sign * weight))
        self.packed = np.ascontiguousarray(np.concatenate(blocks, axis=1))
        ftype = np.float32 if self.n_patches < 2**24 else np.float64
        self.word_weights = np.concatenate(weights).astype(ftype)
        # Colex ranks need C(t, i) only for t <= p and orders whose table fits, where every value
        # is below TABLE_LIMIT: float64 Pascal sums are exact there; larger entries are unused.
        binom = np.zeros((p + 1, _MAX_TABLE_ORDER + 1))
        binom[:, 0] = 1
        for i in range(1, _MAX_TABLE_ORDER + 1):
            binom[1:, i] = np.cumsum(binom[:-1, i - 1])  # C(t, i) = sum over s < t of C(s, i - 1)
        self._binom = np.minimum(binom, 2.0**62).astype(np.int64)
        self._tables: dict[int, np.ndarray] = {}
        self._colex: dict[int, np.ndarray] = {}

    @property
    def n_words(self) -> int:
        return self.packed.shape[1]

    def __sizeof__(self) -> int:
        # What a process or cluster backend ships to its workers; a cluster engine sizes its
        # transfers by it (joblib's Dask backend scatters an argument once when it is large).
        arrays = [self.packed, self.word_weights, self._binom, *self._tables.values(), *self._colex.values()]
        return object.__sizeof__(self) + sum(a.nbytes for a in arrays)

    # -- helpers -----------------------------------------------------------------------------

    def rank(self, T: np.ndarray) -> np.ndarray:
        """Colex rank of each sorted row of ``T`` (m, j) among the j-subsets."""
        r = np.zeros(len(T), np.intp)
        for i in range(T.shape[1]):
            r += self._binom[T[:, i], i + 1]
        return r

    def colex(self, j: int) -> np.ndarray:
        if j not in self._colex:
            self._colex[j] = colex_subsets(self.n_pixels, j)
        return self._colex[j]

    def _count(self, words: np.ndarray) -> np.ndarray:
        """Difference counts from ANDed words (..., n_words) -> (...), int32."""
        shape = words.shape[:-1]
        flat = words.reshape(-1, self.n_words)
        bits = _scratch("bits", flat.shape, np.uint8)
        np.bitwise_count(flat, out=bits)
        weights = self.word_weights
        wide = _scratch("wide", flat.shape, weights.dtype)
        wide[...] = bits
        return np.rint(wide @ weights).astype(np.int32).reshape(shape)

    def _prefix_and(self, P: np.ndarray) -> np.ndarray:
        """AND of the packed columns of each prefix row (m, j) -> (m, n_words)."""
        if P.shape[1] == 0:
            return np.full((len(P), self.n_words), np.uint64(0xFFFFFFFFFFFFFFFF))
        acc = self.packed[P[:, 0]]
        for j in range(1, P.shape[1]):
            acc &= self.packed[P[:, j]]
        return acc

    def top_counts(self, P: np.ndarray, c: int) -> np.ndarray:
        """D(P + {d}) for each prefix row of ``P`` (m, j) and every pixel d > c.

        Returns ndarray of shape (m, n_pixels - 1 - c), int32. This is the kernel: one AND and
        one popcount of ``n_words`` words per (prefix, d).
        """
        acc = self._prefix_and(P)
        cols = self.packed[c + 1 :]
        words = _scratch("and", (len(P), len(cols), self.n_words), np.uint64)
        np.bitwise_and(acc[:, None, :], cols[None, :, :], out=words)
        return self._count(words)

    def all_ones(self, T: np.ndarray) -> np.ndarray:
        """D(T) for each sorted row of ``T`` (m, o) -> (m,) int32, from a table if one is built.

        Never builds one: workers may call this concurrently, and a table can cost more than
        the lookups it would save.
        """
        o = T.shape[1]
        if o == 0:
            return np.full(len(T), self.totals[1] - self.totals[0], np.int32)
        if o in self._tables:
            return self._tables[o][self.rank(T[:, :-1]), T[:, -1]]
        return self._count(self._prefix_and(T))

    # -- tables ------------------------------------------------------------------------------

    def table_fits(self, o: int) -> bool:
        return o - 1 <= _MAX_TABLE_ORDER and comb(self.n_pixels, o - 1) * self.n_pixels <= TABLE_LIMIT

    def table(self, o: int, n_jobs: int | None = 1, cancel: CancelFn | None = None) -> np.ndarray:
        """Difference all-ones counts of order ``o`` >= 1: entry [rank(T), d] = D(T + {d}), d > max(T).

        Returns ndarray of shape (C(n_pixels, o - 1), n_pixels), int32 (entries with d <= max(T)
        are unused). Built once and kept.
        """
        if o not in self._tables:
            if not self.table_fits(o):
                raise MemoryError(f"all-ones table of order {o} over {self.n_pixels} pixels is too large")
            L = np.zeros((comb(self.n_pixels, o - 1), self.n_pixels), np.int32)
            units = list(self.units(o - 1))
            for unit, block in run_units(_table_unit, self, units, n_jobs, cancel):
                _, c, lo, hi = unit
                start = comb(c, o - 1) if c >= 0 else 0
                L[start + lo : start + hi, c + 1 :] = block
            self._tables[o] = L
        return self._tables[o]

    def units(self, h: int) -> Iterator[tuple[int, int, int, int]]:
        """Work units over the h-prefixes: (h, c, lo, hi) = prefixes colex(h - 1)[lo:hi] + {c}.

        Every (h + 1)-subset is P + {d} for exactly one unit's prefix P and one d > c.
        """
        p = self.n_pixels
        if h == 0:
            yield (0, -1, 0, 1)
            return
        # Per set a unit holds n_words AND words and 2^h pattern counts: bound the larger.
        per_set = max(1, self.n_words, 1 << h)
        for c in range(h - 1, p - 1):
            count, r = comb(c, h - 1), p - 1 - c
            step = max(1, CHUNK_WORDS // (r * per_set))
            for lo in range(0, count, step):
                yield (h, c, lo, min(count, lo + step))

    def prefixes(self, unit: tuple[int, int, int, int]) -> np.ndarray:
        """The prefixes (m, h) of a unit, int32, each row ascending."""
        h, c, lo, hi = unit
        if h == 0:
            return np.zeros((1, 0), np.int32)
        S = self.colex(h - 1)[lo:hi]
        return np.column_stack([S, np.full(len(S), c, np.int32)])

    # -- scoring -----------------------------------------------------------------------------

    def unit_errors(self, unit: tuple[int, int, int, int]) -> tuple[np.ndarray, np.ndarray]:
        """Training errors of the k-subsets of one unit of (k - 1)-prefixes.

        Returns the prefixes (m, k - 1) and errors (m, n_pixels - 1 - c), int64: entry [i, j] is
        the set prefixes[i] + {c + 1 + j}. Fast when the tables of orders < k are built.
        """
        h, c = unit[0], unit[1]
        P = self.prefixes(unit)
        m, r = len(P), self.n_pixels - 1 - c
        if any(o not in self._tables for o in range(1, h + 1)):
            # Tables too large (many pixels and a large k): score the sets one by one instead.
            combos = np.column_stack([np.repeat(P, r, axis=0), np.tile(np.arange(c + 1, self.n_pixels), m)])
            return P, self.subset_errors(combos).reshape(m, r)
        M = 1 << h
        ones = np.empty((M, m, r), np.int32)  # D(T + {d}) for T inside P
        base = np.empty((M, m), np.int32)  # D(T)
        for mask in range(M):
            T = P[:, [j for j in range(h) if mask >> j & 1]]
            base[mask] = self.all_ones(T)
            if mask == M - 1:
                ones[mask] = self.top_counts(P, c)
            else:
                ones[mask] = self._tables[T.shape[1] + 1][:, c + 1 :][self.rank(T)]
        _moebius(ones, h)
        _moebius(base, h)
        # Per pattern v of P, |D(v, d=1)| + |D(v, d=0)| with D(v, d=0) = D(v) - D(v, d=1); and
        # |a| + |b - a| = max(|b|, |2a - b|).
        ones *= 2
        ones -= base[..., None]
        np.abs(ones, out=ones)
        np.maximum(ones, np.abs(base)[..., None], out=ones)
        return P, (self.n_patches - ones.sum(axis=0, dtype=np.int64)) // 2

    def subset_errors(self, combos: np.ndarray) -> np.ndarray:
        """Optimal training errors (m,) int64 of arbitrary sorted pixel sets ``combos`` (m, k)."""
        m, k = combos.shape
        D = np.empty((1 << k, m), np.int64)
        for mask in range(1 << k):
            D[mask] = self.all_ones(combos[:, [j for j in range(k) if mask >> j & 1]])
        _moebius(D, k)
        return (self.n_patches - np.abs(D).sum(axis=0)) // 2


_SCRATCH = threading.local()


def _scratch(name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
    """A reusable per-thread buffer of at least ``shape``: fresh multi-MB arrays cost page faults.

    Returned arrays are views into a buffer kept for the thread; a second call with the same name
    overwrites it, so callers use each one before asking for it again.
    """
    need = int(np.prod(shape))
    store = _SCRATCH.__dict__
    buf = store.get(name)
    if buf is None or buf.dtype != dtype or buf.size < need:
        buf = store[name] = np.empty(max(need, 1), dtype)
    return buf[:need].reshape(shape)


def _moebius(A: np.ndarray, h: int) -> None:
    """In place, over axis 0 of length 2^h: all-ones counts -> exact pattern counts.

    Entry [mask, ...] holds N(T_mask); after the call it holds the count of patterns that are 1
    exactly on T_mask (inclusion-exclusion one bit at a time).
    """
    V = A.reshape((2,) * h + A.shape[1:])
    for ax in range(h):
        lo = (slice(None),) * ax + (0,)
        hi = (slice(None),) * ax + (1,)
        V[lo] -= V[hi]


def _table_unit(index: CountIndex, unit: tuple[int, int, int, int]) -> np.ndarray:
    return index.top_counts(index.prefixes(unit), unit[1])


def _best_unit(index: CountIndex, unit: tuple[int, int, int, int], keep: int):
    """The ``keep`` best k-subsets of one unit (k = prefix length + 1): combos, errors."""
    P, err = index.unit_errors(unit)
    flat = err.ravel()
    if keep == 1:
        sel = np.flatnonzero(flat == flat.min())
    elif keep < flat.size:
        sel = np.flatnonzero(flat <= np.partition(flat, keep - 1)[keep - 1])
    else:
        sel = np.arange(flat.size)
    i, j = np.divmod(sel, err.shape[1])
    combos = np.column_stack([P[i], unit[1] + 1 + j]).astype(np.intp)
    return _lowest(combos, flat[sel].astype(np.int64), keep)


def _lowest(combos: np.ndarray, errs: np.ndarray, keep: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``keep`` rows of lowest error, ties in lexicographic order of the pixel set."""
    order = np.lexsort(tuple(combos.T[::-1]) + (errs,))[:keep]
    return combos[order], errs[order]


def run_units(func, index: CountIndex, units: list, n_jobs: int | None, cancel: CancelFn | None, *args):
    """Yield (unit, func(index, unit, *args)) in order; on joblib workers when n_jobs > 1.

    ``cancel`` is polled before each result is taken; True raises :class:`SearchCancelled`, and
    leaving the generator stops joblib from dispatching the remaining units.
    """
    if effective_n_jobs(n_jobs) == 1:
        for unit in units:
            if cancel is not None and cancel():
                raise SearchCancelled
            yield unit, func(index, unit, *args)
        return
    parallel = Parallel(n_jobs=n_jobs, prefer="threads", return_as="generator")
    results = parallel(delayed(func)(index, u, *args) for u in units)
    try:
        for unit, result in zip(units, _cluster_errors(results)):
            if cancel is not None and cancel():
                raise SearchCancelled
            yield unit, result
    finally:
        with warnings.catch_warnings():
            # joblib warns when a cancelled search leaves finished units unread; that is the point.
            warnings.filterwarnings("ignore", message=".*tasks (have been successfully executed|which were still being "
                                    "processed)", category=UserWarning)
            results.close()


@dataclass(frozen=True)
class SearchPlan:
    """How a k-pixel search will run, decided from its estimated time.

    Attributes
    ----------
    k : int
    sets : int
        Pixel sets of size k, C(n_pixels, k).
    method : {'exhaustive', 'beam'}
    estimated_seconds : float
        Estimated time of the exhaustive search at size k in one worker on this machine (from
        timing sample units of it), whether or not it runs.
    largest_exact_size : int
        The largest size searched exhaustively: k itself, or the size a beam grows from.
    """

    k: int
    sets: int
    method: str
    estimated_seconds: float
    largest_exact_size: int

    def as_dict(self) -> dict:
        return {"method": self.method, "sets": self.sets, "estimated_seconds": round(self.estimated_seconds, 3),
                "largest_exact_size": self.largest_exact_size}


def plan_search(index: CountIndex, k: int, max_seconds: float | None = None, exhaustive: bool = False,
                cancel: CancelFn | None = None) -> SearchPlan:
    """Estimate the exhaustive search of size ``k`` and choose exhaustive or beam.

    Builds the all-ones tables the search needs (kept in ``index``, timed into the estimate),
    then scores a few work units of size k (picked in proportion to their sets) and extrapolates
    their processor time per set to all C(n_pixels, k) sets. The search is exhaustive when ``exhaustive`` is True or the
    estimate is at most ``max_seconds``; otherwise a beam grows from the largest size whose own
    exhaustive search fits ``max_seconds`` at the same rate per set (at least 1). None:
    :data:`EXHAUSTIVE_SECONDS`.
    """
    if max_seconds is None:
        max_seconds = EXHAUSTIVE_SECONDS
    p = index.n_pixels
    sets = n_combinations(p, k)
    # Processor time of this thread, not wall time: on a shared machine the other processes'
    # load would otherwise decide how exact a rule is.
    t0 = time.thread_time()
    with threadpool_limits(1, user_api="blas"):
        for o in range(1, k):
            if index.table_fits(o):
                index.table(o, cancel=cancel)
        tables = time.thread_time() - t0
        units = list(index.units(k - 1))
        # Sample sets, not units: a unit is picked with the share of the sets it holds.
        cum = np.cumsum([(hi - lo) * (p - 1 - c) for _, c, lo, hi in units])
        picks = np.unique(np.searchsorted(cum, np.linspace(0, cum[-1] - 1, _CALIBRATION_UNITS), side="right"))
        sampled, spent = 0, 0.0
        for i in picks:
            if cancel is not None and cancel():
                raise SearchCancelled
            h, c, lo, hi = units[i]
            t1 = time.thread_time()
            _best_unit(index, units[i], 1)
            spent += time.thread_time() - t1
            sampled += (hi - lo) * (p - 1 - c)
            if spent >= CALIBRATION_SECONDS:
                break
    per_set = spent / max(1, sampled)
    estimate = tables + sets * per_set
    if exhaustive or estimate <= max_seconds:
        return SearchPlan(k, sets, "exhaustive", estimate, k)
    exact = max([j for j in range(1, k) if n_combinations(p, j) * per_set <= max_seconds], default=1)
    return SearchPlan(k, sets, "beam", estimate, exact)


def _cluster_errors(results: Iterator) -> Iterator:
    """``results``, with a cluster's failures (a lost worker, lost data) as one clear error.

    A cluster engine retries the units of a worker that dies; what it cannot recover ends the
    search with :class:`~pixelfit.errors.TrainingError`, never with a result missing units.
    """
    try:
        yield from results
    except (SearchCancelled, TrainingError, KeyboardInterrupt, SystemExit, GeneratorExit):
        raise
    except BaseException as exc:  # a cancelled future is an asyncio.CancelledError: no Exception
        if not (type(exc).__module__.startswith("distributed")
                or isinstance(exc, CancelledError | asyncio.CancelledError)):
            raise
        raise TrainingError(f"the cluster lost work of the search ({type(exc).__name__}: {exc}); "
                            "no result was kept: fit again") from exc


def exhaustive_best(
    index: CountIndex,
    k: int,
    keep: int = 1,
    progress: ProgressFn | None = None,
    cancel: CancelFn | None = None,
    n_jobs: int | None = 1,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Score every k-subset of the pixels.

    Parameters
    ----------
    index : CountIndex
    k : int, >= 1
    keep : int
        How many of the best sets to return.
    progress : callable (done, total), optional
        Called after each unit with the number of sets scored so far.
    cancel : callable () -> bool, optional
        Polled between units; True raises :class:`SearchCancelled`.
    n_jobs : int or None
        joblib workers (threads unless a backend is active); -1 for all cores.

    Returns
    -------
    combos : ndarray of shape (min(keep, total), k), intp, best first, rows ascending
    errors : ndarray of shape (min(keep, total),), int64
    total : int, the number of sets scored, C(n_pixels, k)

    Best means lowest training error, ties broken by lexicographic order of the pixel set.
    """
    p = index.n_pixels
    total = n_combinations(p, k)
    if total * index.n_words < PARALLEL_MIN_WORDS:
        n_jobs = 1
    best_c = np.zeros((0, k), np.intp)
    best_e = np.zeros(0, np.int64)
    done = 0
    # The reductions are small BLAS products; BLAS's own threads only fight our workers for cores.
    with threadpool_limits(1, user_api="blas"):
        for o in range(1, k):
            if index.table_fits(o):
                index.table(o, n_jobs=n_jobs, cancel=cancel)
        units = list(index.units(k - 1))
        for unit, (c, e) in run_units(_best_unit, index, units, n_jobs, cancel, keep):
            best_c, best_e = _lowest(np.concatenate([best_c, c]), np.concatenate([best_e, e]), keep)
            done += (unit[3] - unit[2]) * (p - 1 - unit[1])
            if progress is not None:
                progress(done, total)
    if done != total:  # every unit's result must be in: a lost one could hide the optimum
        raise RuntimeError(f"the search scored {done:,} of {total:,} pixel sets")
    return best_c, best_e, total


def beam_best(
    index: CountIndex,
    start: np.ndarray,
    k: int,
    width: int,
    progress: ProgressFn | None = None,
    cancel: CancelFn | None = None,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Grow the pixel sets in ``start`` (m, k0) one pixel at a time to size k, keeping ``width``.

    Returns the beam at size k (sorted best first, ties lexicographic), its errors, and the number
    of sets scored.
    """
    p = index.n_pixels
    beam = np.sort(np.asarray(start, np.intp), axis=1)
    scored = 0
    errs = np.zeros(len(beam), np.int64)
    steps = k - beam.shape[1]
    step_rows = max(1, CHUNK_WORDS // max(1, index.n_words))
    for step in range(steps):
        m = len(beam)
        ext = np.repeat(beam, p, axis=0)
        new = np.tile(np.arange(p), m)
        ok = ~(ext == new[:, None]).any(axis=1)
        cand = np.unique(np.sort(np.column_stack([ext[ok], new[ok]]), axis=1), axis=0)
        errs = np.empty(len(cand), np.int64)
        for s in range(0, len(cand), step_rows):
            if cancel is not None and cancel():
                raise SearchCancelled
            with threadpool_limits(1, user_api="blas"):
                errs[s : s + step_rows] = index.subset_errors(cand[s : s + step_rows])
        scored += len(cand)
        beam, errs = _lowest(cand, errs, width)
        if progress is not None:
            progress(step + 1, steps)
    return beam, errs, scored
