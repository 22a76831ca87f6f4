"""Exact scoring of k-pixel truth-table rules, many pixel sets at a time.

For a pixel set S the best truth table labels each of its 2^k patterns with the majority class of
the training patches that show it, so the optimal training error of S is

    sum over patterns v of min(n_pos(v), n_neg(v)).

The pattern counts are never built per subset. For each class we count, for every T subset of
S, the patches whose pixels in T are all 1 (the "all-ones" count N(T)), then recover the exact
pattern counts by Moebius inversion over the subset lattice. N(T) for |T| <= 3 comes from dense
tables built once with matrix products; larger T from AND + popcount over bit-packed pixel
columns (``np.packbits`` to 64-bit words, ``np.bitwise_count``).

Pattern code convention: bit j of a pattern code is the value of the j-th pixel of the set, the
pixel set being sorted ascending. Candidate order is lexicographic, and ties in training error go
to the first set in that order (what a plain loop over ``itertools.combinations`` keeping the
first strict minimum gives).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

#: Rows of candidate sets scored per step; bounds memory and sets the progress granularity.
CHUNK = 8192
#: Largest order kept as a dense all-ones table (memory p^order).
TABLE_ORDER = 3


class SearchCancelled(Exception):
    """Raised inside a search when its cancel callback returns True."""


def pack_columns(X: np.ndarray) -> np.ndarray:
    """Bit-pack each pixel column.

    Parameters
    ----------
    X : ndarray of shape (n_patches, n_pixels), bool

    Returns
    -------
    ndarray of shape (n_pixels, n_words), uint64
    """
    X = np.asarray(X, dtype=bool)
    n, p = X.shape
    n_words = max(1, -(-n // 64))
    packed = np.packbits(X.T, axis=1, bitorder="little")
    pad = n_words * 8 - packed.shape[1]
    if pad:
        packed = np.pad(packed, ((0, 0), (0, pad)))
    return np.ascontiguousarray(packed).view(np.uint64).reshape(p, n_words)


@dataclass
class ClassCounts:
    """Everything needed to count patterns of one class: packed columns and low-order tables."""

    n: int
    packed: np.ndarray  # (p, words) uint64
    tables: list[np.ndarray]  # tables[o] has o axes of length p: all-ones counts of o pixels

    @classmethod
    def build(cls, X: np.ndarray, max_order: int) -> ClassCounts:
        X = np.asarray(X, dtype=bool)
        n, p = X.shape
        # float64 matrix products are exact for counts far beyond any patch set pixelfit handles
        Xf = X.astype(np.float64)
        tables: list[np.ndarray] = [np.array(float(n))]
        if max_order >= 1:
            tables.append(Xf.sum(axis=0))
        if max_order >= 2:
            tables.append(Xf.T @ Xf)
        if max_order >= 3:
            t3 = np.empty((p, p, p))
            for i in range(p):
                t3[i] = (Xf * Xf[:, i : i + 1]).T @ Xf
            tables.append(t3)
        return cls(n, pack_columns(X), [np.rint(t).astype(np.int64) for t in tables])


def _popcount_and(packed: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Popcount of the AND of the given columns, per row of ``cols`` (m, order)."""
    acc = packed[cols[:, 0]]
    for j in range(1, cols.shape[1]):
        acc = acc & packed[cols[:, j]]
    return np.bitwise_count(acc).sum(axis=1, dtype=np.int64)


def _subset_masks(k: int) -> list[list[int]]:
    return [[j for j in range(k) if mask >> j & 1] for mask in range(2**k)]


def pattern_counts(cc: ClassCounts, combos: np.ndarray) -> np.ndarray:
    """Exact pattern counts of one class for each pixel set.

    Parameters
    ----------
    cc : ClassCounts
    combos : ndarray of shape (m, k), int, each row sorted ascending

    Returns
    -------
    ndarray of shape (m, 2^k), int64: entry [i, code] counts the class's patches showing ``code``
    on pixel set ``combos[i]``.
    """
    m, k = combos.shape
    N = np.empty((m, 2**k), np.int64)
    for mask, members in enumerate(_subset_masks(k)):
        order = len(members)
        if order == 0:
            N[:, 0] = cc.n
        elif order < len(cc.tables):
            N[:, mask] = cc.tables[order][tuple(combos[:, j] for j in members)]
        else:
            N[:, mask] = _popcount_and(cc.packed, combos[:, members])
    # Moebius inversion: from "all ones on T" counts to exact pattern counts.
    for b in range(k):
        bit = 1 << b
        lo = np.array([mask for mask in range(2**k) if not mask & bit])
        N[:, lo] -= N[:, lo | bit]
    return N


def subset_errors(pos: ClassCounts, neg: ClassCounts, combos: np.ndarray) -> np.ndarray:
    """Optimal training error count (int64, shape (m,)) of each pixel set in ``combos``."""
    return np.minimum(pattern_counts(pos, combos), pattern_counts(neg, combos)).sum(axis=1)


def n_combinations(p: int, k: int) -> int:
    from math import comb

    return comb(p, k)


def iter_combinations(p: int, k: int, chunk: int = CHUNK) -> Iterator[np.ndarray]:
    """All k-subsets of range(p) in lexicographic order, as (m, k) int arrays of <= ~chunk rows."""
    if k == 0:
        yield np.zeros((1, 0), np.intp)
        return
    if k == 1:
        for s in range(0, p, chunk):
            yield np.arange(s, min(p, s + chunk), dtype=np.intp)[:, None]
        return
    # Rows sharing the first k-1 pixels are built together; prefixes come in lexicographic order.
    buf: list[np.ndarray] = []
    size = 0
    for prefix in iter_combinations(p, k - 1, chunk=max(1, chunk // max(1, p))):
        last = prefix[:, -1]
        counts = p - 1 - last
        keep = counts > 0
        prefix, last, counts = prefix[keep], last[keep], counts[keep]
        if len(prefix) == 0:
            continue
        rows = np.repeat(np.arange(len(prefix)), counts)
        starts = np.cumsum(counts) - counts
        tail = last[rows] + 1 + (np.arange(counts.sum()) - starts[rows])
        block = np.column_stack([prefix[rows], tail])
        buf.append(block)
        size += len(block)
        if size >= chunk:
            yield np.concatenate(buf)
            buf, size = [], 0
    if buf:
        yield np.concatenate(buf)


ProgressFn = Callable[[int, int], None]
CancelFn = Callable[[], bool]


def exhaustive_best(
    pos: ClassCounts,
    neg: ClassCounts,
    k: int,
    keep: int = 1,
    progress: ProgressFn | None = None,
    cancel: CancelFn | None = None,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Score every k-subset; return the ``keep`` best (combos (keep, k), errors (keep,)) and the count.

    Best means lowest error, ties broken by lexicographic order of the pixel set.
    """
    p = pos.packed.shape[0]
    total = n_combinations(p, k)
    best_c = np.zeros((0, k), np.intp)
    best_e = np.zeros(0, np.int64)
    done = 0
    for combos in iter_combinations(p, k):
        if cancel is not None and cancel():
            raise SearchCancelled
        errs = subset_errors(pos, neg, combos)
        best_c, best_e = _merge_best(best_c, best_e, combos, errs, keep)
        done += len(combos)
        if progress is not None:
            progress(done, total)
    return best_c, best_e, total


def _merge_best(best_c, best_e, combos, errs, keep):
    """Keep the ``keep`` lowest errors; stable, so earlier (lexicographically smaller) sets win ties."""
    if keep == 1 and len(best_e):
        i = int(np.argmin(errs))
        if errs[i] < best_e[0]:
            return combos[i : i + 1].copy(), errs[i : i + 1].copy()
        return best_c, best_e
    c = np.concatenate([best_c, combos])
    e = np.concatenate([best_e, errs])
    order = np.argsort(e, kind="stable")[:keep]
    return c[order].copy(), e[order].copy()


def beam_best(
    pos: ClassCounts,
    neg: ClassCounts,
    start: np.ndarray,
    k: int,
    width: int,
    progress: ProgressFn | None = None,
    cancel: CancelFn | None = None,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Grow the pixel sets in ``start`` (m, k0) one pixel at a time to size k, keeping ``width``.

    Returns the beam at size k (sorted best first), its errors, and the number of sets scored.
    """
    p = pos.packed.shape[0]
    beam = np.sort(start, axis=1)
    scored = 0
    errs = np.zeros(len(beam), np.int64)
    steps = k - beam.shape[1]
    for step in range(steps):
        if cancel is not None and cancel():
            raise SearchCancelled
        m, size = beam.shape
        ext = np.repeat(beam, p, axis=0)
        new = np.tile(np.arange(p), m)
        ok = ~(ext == new[:, None]).any(axis=1)
        cand = np.sort(np.column_stack([ext[ok], new[ok]]), axis=1)
        cand = np.unique(cand, axis=0)  # sorted rows: lexicographic order, duplicates gone
        errs = np.concatenate([subset_errors(pos, neg, cand[s : s + CHUNK]) for s in range(0, len(cand), CHUNK)])
        scored += len(cand)
        order = np.argsort(errs, kind="stable")[:width]
        beam, errs = cand[order], errs[order]
        if progress is not None:
            progress(step + 1, steps)
    return beam, errs, scored
