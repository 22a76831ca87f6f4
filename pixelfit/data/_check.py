"""The data check: exact duplicates, conflicting labels, leakage and near-duplicates across the split.

Everything is found by hashing rows, never by comparing patches pairwise, so the check stays
linear in the number of patches: grey patches get a multiplicative hash of their bytes, binarized
patches a hash that is linear over XOR (the hash of a patch with one bit flipped is the patch's hash
XOR one constant), which makes the one-bit neighbours of every patch cheap to look up. Equal hashes
are confirmed byte for byte, so the groups are exact; a collision (never seen, and about 2^-64 per
pair) falls back to an exact sort of the rows.

Finding names (``check.csv``): ``duplicate`` (an exact grey copy exists), ``conflict`` (identical
binarized patches carry both labels), ``leaked-grey`` / ``leaked-binary`` (a held-out patch whose
grey / binarized copy is in the training part), ``near-duplicate`` (a held-out patch with a
training patch at most one bit away after binarization) and ``suspect`` (set at the ladder level).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from pixelfit.errors import PixelfitError

#: The keys of ``dataset.check`` in summary.json and of check.json (a contract: do not rename).
CHECK_KEYS = ("duplicate_groups", "duplicate_patches", "cross_class_duplicate_groups", "conflict_groups",
              "conflict_patches", "error_floor", "leaked_test_grey", "leaked_test_binary", "near_duplicate_test",
              "suspects")
FINDINGS = ("duplicate", "conflict", "leaked-grey", "leaked-binary", "near-duplicate", "suspect")

_CHUNK = 1 << 14  # rows hashed at a time: a chunk's words stay in cache while every column is mixed in
_M1 = np.uint64(0x9E3779B97F4A7C15)
_M2 = np.uint64(0xBF58476D1CE4E5B9)
_FILTER_BITS = 25  # a 32 MB presence filter in front of the exact look-up of one-bit neighbours


@dataclass
class Groups:
    """Rows grouped by exact equality.

    Attributes
    ----------
    ids : ndarray of shape (n_rows,), int64 — group of each row, 0 .. n_groups-1
    sizes : ndarray of shape (n_groups,), int64
    first : ndarray of shape (n_groups,), int64 — first row of each group
    """

    ids: np.ndarray
    sizes: np.ndarray
    first: np.ndarray

    @property
    def all_single(self) -> bool:
        return bool(len(self.sizes) == 0 or self.sizes.max() == 1)


def _words(rows: np.ndarray) -> np.ndarray:
    """Rows of uint8 as uint64 words, zero-padded to a multiple of 8 bytes (no copy when aligned)."""
    n, p = rows.shape
    pad = -p % 8
    if pad or not rows.flags.c_contiguous:
        padded = np.zeros((n, p + pad), np.uint8)
        padded[:, :p] = rows
        rows = padded
    return rows.view(np.uint64)


def grey_hash(rows: np.ndarray) -> np.ndarray:
    """64-bit hash of each row of a uint8 matrix of shape (n_rows, n_bytes)."""
    out = np.empty(len(rows), np.uint64)
    with np.errstate(over="ignore"):
        for a in range(0, len(rows), _CHUNK):
            w = _words(rows[a:a + _CHUNK])
            h = np.full(len(w), 0x243F6A8885A308D3, np.uint64)
            for k in range(w.shape[1]):
                h ^= w[:, k]
                h *= _M1
                h ^= h >> np.uint64(31)
            h *= _M2
            h ^= h >> np.uint64(29)
            out[a:a + _CHUNK] = h
    return out


def _bit_keys(n_bits: int) -> np.ndarray:
    """A fixed random 64-bit key per bit position: the XOR-linear hash of a bit string is the XOR of
    the keys of its set bits."""
    return np.random.default_rng(0x5EED).integers(0, np.iinfo(np.uint64).max, n_bits, dtype=np.uint64, endpoint=True)


def bit_hash(packed: np.ndarray, n_bits: int) -> tuple[np.ndarray, np.ndarray]:
    """XOR-linear 64-bit hash of packed bit rows, and the key of each bit position.

    Parameters
    ----------
    packed : ndarray of shape (n_rows, ceil(n_bits / 8)), uint8 — ``np.packbits(B, axis=1)``
    """
    keys = _bit_keys(n_bits)
    nb = packed.shape[1]
    padded = np.zeros(nb * 8, np.uint64)
    padded[:n_bits] = keys
    # table[j, v]: XOR of the keys of the bits set in value v of byte j (packbits is big-endian).
    bits = np.unpackbits(np.arange(256, dtype=np.uint8)[:, None], axis=1).astype(bool)  # (256, 8)
    table = np.zeros((nb, 256), np.uint64)
    for b in range(8):
        table[:, bits[:, b]] ^= padded[b::8][:, None]
    out = np.zeros(len(packed), np.uint64)
    for a in range(0, len(packed), _CHUNK):
        chunk = packed[a:a + _CHUNK]
        h = np.zeros(len(chunk), np.uint64)
        for j in range(nb):
            h ^= table[j][chunk[:, j]]
        out[a:a + _CHUNK] = h
    return out, keys


def group_rows(rows: np.ndarray, hashes: np.ndarray) -> Groups:
    """Exact groups of equal rows, found through their hashes and confirmed byte for byte."""
    if len(rows) == 0:
        z = np.zeros(0, np.int64)
        return Groups(z, z, z)
    _, first, ids, sizes = np.unique(hashes, return_index=True, return_inverse=True, return_counts=True)
    ids = ids.reshape(-1)
    multi = sizes[ids] > 1
    for a in range(0, len(rows), _CHUNK):
        m = multi[a:a + _CHUNK]
        if m.any() and not (rows[a:a + _CHUNK][m] == rows[first[ids[a:a + _CHUNK][m]]]).all():
            # A hash collision: group by sorting the rows themselves instead.
            _, first, ids, sizes = np.unique(rows, axis=0, return_index=True, return_inverse=True, return_counts=True)
            ids = ids.reshape(-1)
            break
    # Number groups by first appearance, so ids read in import order.
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    return Groups(rank[ids].astype(np.int64), sizes[order].astype(np.int64), first[order].astype(np.int64))


def grey_groups(images: np.ndarray) -> Groups:
    """Groups of identical grey patches; ``images`` of shape (n_patches, height, width), uint8."""
    rows = np.ascontiguousarray(images, dtype=np.uint8).reshape(len(images), -1)
    return group_rows(rows, grey_hash(rows))


def _sorted_unique(values: np.ndarray) -> np.ndarray:
    """``np.unique(values)`` by sorting. numpy's hash-table unique keeps the interpreter lock for the
    whole call, so the window's GUI thread waited on it while a large set was checked on a worker
    thread (0.46 s with a million patches, benchmarks/bench_gui_million.py); a sort lets it go."""
    s = np.sort(values)
    return s[np.concatenate(([True], s[1:] != s[:-1]))] if len(s) else s


def distinct_count(values: np.ndarray) -> int:
    """How many distinct values ``values`` holds, by sorting (see :func:`_sorted_unique`)."""
    return len(_sorted_unique(np.asarray(values).ravel()))


def _near_duplicates(packed: np.ndarray, hashes: np.ndarray, keys: np.ndarray, train: np.ndarray,
                     test: np.ndarray, bits: Groups) -> tuple[np.ndarray, np.ndarray]:
    """Held-out rows with a training row at Hamming distance 0 or 1, and the bit group of one such row.

    Each distinct held-out pattern and each of its one-bit flips is looked up among the hashes of
    the training patterns; hits are confirmed on the packed bits.
    """
    near = np.zeros(len(packed), bool)
    match = np.full(len(packed), -1, np.int64)
    train_groups = _sorted_unique(bits.ids[train])
    test_groups = _sorted_unique(bits.ids[test])
    if not len(train_groups) or not len(test_groups):
        return near, match
    th = hashes[bits.first[train_groups]]
    order = np.argsort(th)
    th, train_groups = th[order], train_groups[order]
    present = np.zeros(1 << _FILTER_BITS, bool)
    present[th >> np.uint64(64 - _FILTER_BITS)] = True
    qh = hashes[bits.first[test_groups]]
    found = np.full(len(test_groups), -1, np.int64)  # matching training group per held-out group
    flips = np.concatenate([[np.uint64(0)], keys])   # 0: the pattern itself
    step = max(1, (1 << 22) // len(qh))
    for a in range(0, len(flips), step):
        open_ = found < 0
        if not open_.any():
            break
        q_idx = np.flatnonzero(open_)
        cand = qh[q_idx, None] ^ flips[None, a:a + step]
        hit = present[cand >> np.uint64(64 - _FILTER_BITS)]
        if not hit.any():
            continue
        qi, fi = np.nonzero(hit)
        c = cand[qi, fi]
        pos = np.minimum(np.searchsorted(th, c), len(th) - 1)
        ok = th[pos] == c
        qi, pos = qi[ok], pos[ok]
        if not len(qi):
            continue
        # Confirm on the bits: at most one differing bit between the two representatives.
        diff = np.bitwise_xor(packed[bits.first[test_groups[q_idx[qi]]]], packed[bits.first[train_groups[pos]]])
        ok = np.unpackbits(diff, axis=1).sum(axis=1) <= 1
        q, first_hit = np.unique(q_idx[qi[ok]], return_index=True)
        found[q] = train_groups[pos[ok]][first_hit]
    per_group = np.full(len(bits.sizes), -1, np.int64)
    per_group[test_groups] = found
    match[test] = per_group[bits.ids[test]]
    near[test] = match[test] >= 0
    return near, match


@dataclass
class DataCheck:
    """What the data check found; :meth:`counts` is the contract of summary.json and check.json.

    Attributes
    ----------
    grey, bits : Groups — identical grey patches, identical binarized patches
    findings : list of (row, finding, group) — one entry per flagged patch and finding
    suspects : list of dict or None — ``{path, label, score}``; None until a ladder has run
    """

    grey: Groups
    bits: Groups
    figures: dict
    findings: list[tuple[int, str, str]] = field(default_factory=list)
    suspects: list[dict] | None = None

    def counts(self) -> dict:
        return {**self.figures, "suspects": None if self.suspects is None else list(self.suspects)}

    @property
    def leaked(self) -> bool:
        return bool(self.figures["leaked_test_grey"] or self.figures["leaked_test_binary"])

    @property
    def anything(self) -> bool:
        """Whether any finding exists (the window's badge)."""
        return bool(self.findings) or bool(self.suspects)

    def members(self, group: str) -> np.ndarray:
        """Rows of a group named in ``findings`` (``grey-<id>`` or ``bits-<id>``)."""
        kind, _, num = group.partition("-")
        if not num.isdigit() or kind not in ("grey", "bits"):
            return np.zeros(0, np.intp)
        ids = self.grey.ids if kind == "grey" else self.bits.ids
        return np.flatnonzero(ids == int(num))

    def warning(self) -> str | None:
        """One line when leakage or conflicting labels are present, else None."""
        f = self.figures
        parts = []
        if self.leaked:
            parts.append(f"held-out patches with a copy in training: {f['leaked_test_grey']} grey, "
                         f"{f['leaked_test_binary']} binarized")
        if f["conflict_groups"]:
            floor = "" if f["error_floor"] is None else f"; no rule can do better than {100 * f['error_floor']:.1f} % " \
                                                        "training error at this binarization"
            parts.append(f"{f['conflict_groups']} group(s) of identical binarized patches carry both labels{floor}")
        return None if not parts else "warning: " + "; ".join(parts)


def check_data(images: np.ndarray, labels: np.ndarray, target: np.ndarray, packed: np.ndarray, n_bits: int,
               test_mask: np.ndarray | None = None, grey: Groups | None = None) -> DataCheck:
    """Run the data check on imported patches.

    Parameters
    ----------
    images : ndarray of shape (n_patches, height, width), uint8
    labels : ndarray of shape (n_patches,), str — class names (for duplicates across classes)
    target : ndarray of shape (n_patches,), bool — the label the rule learns (for conflicts)
    packed : ndarray of shape (n_patches, ceil(n_bits / 8)), uint8 — binarized patches, packed
    test_mask : ndarray of shape (n_patches,), bool, or None — held-out patches; None: no split,
        the leak counts are None and the error floor is over all patches
    grey : Groups, optional — :func:`grey_groups` of ``images`` when already computed

    Returns
    -------
    DataCheck
        Counts: ``duplicate_groups`` (groups of two or more identical grey patches) and
        ``duplicate_patches`` (the patches in them); ``cross_class_duplicate_groups`` (of those,
        groups holding more than one class); ``conflict_groups`` / ``conflict_patches`` (groups of
        identical binarized patches holding both target labels, over all patches);
        ``error_floor`` (the least training error any rule of the binarized patches can have,
        which the memorizing rule reaches: the minority label of each group of identical training
        patches, over the training patches; None without training patches); ``leaked_test_grey``,
        ``leaked_test_binary`` (held-out patches whose grey / binarized copy is in training) and
        ``near_duplicate_test`` (held-out patches with a training patch at Hamming distance 0 or
        1 after binarization); the last three None without a split.
    """
    n = len(images)
    if len(labels) != n or len(target) != n or len(packed) != n:
        raise PixelfitError("the data check needs one label, target and binarized row per patch")
    labels = np.asarray(labels)
    target = np.asarray(target, bool)
    grey = grey if grey is not None else grey_groups(images)
    hashes, keys = bit_hash(packed, n_bits)
    bits = group_rows(packed, hashes)
    findings: list[tuple[int, str, str]] = []

    dup = grey.sizes[grey.ids] > 1
    _, label_codes = np.unique(labels, return_inverse=True)
    label_codes = label_codes.reshape(-1)
    # A group holds more than one class when its smallest and largest class code differ.
    lo = np.full(len(grey.sizes), np.iinfo(np.int64).max)
    hi = np.full(len(grey.sizes), -1)
    np.minimum.at(lo, grey.ids, label_codes)
    np.maximum.at(hi, grey.ids, label_codes)
    multi_group = grey.sizes > 1
    for i in np.flatnonzero(dup):
        findings.append((int(i), "duplicate", f"grey-{grey.ids[i]}"))

    pos = np.bincount(bits.ids, weights=target, minlength=len(bits.sizes))
    conflict_group = (pos > 0) & (pos < bits.sizes)
    conflict = conflict_group[bits.ids]
    for i in np.flatnonzero(conflict):
        findings.append((int(i), "conflict", f"bits-{bits.ids[i]}"))

    train = np.ones(n, bool) if test_mask is None else ~np.asarray(test_mask, bool)
    n_train = int(train.sum())
    t_pos = np.bincount(bits.ids[train], weights=target[train], minlength=len(bits.sizes))
    t_all = np.bincount(bits.ids[train], minlength=len(bits.sizes))
    floor = None if n_train == 0 else float(np.minimum(t_pos, t_all - t_pos).sum() / n_train)

    figures = {
        "duplicate_groups": int(multi_group.sum()),
        "duplicate_patches": int(dup.sum()),
        "cross_class_duplicate_groups": int((multi_group & (lo != hi)).sum()),
        "conflict_groups": int(conflict_group.sum()),
        "conflict_patches": int(conflict.sum()),
        "error_floor": floor,
        "leaked_test_grey": None,
        "leaked_test_binary": None,
        "near_duplicate_test": None,
    }
    if test_mask is not None:
        test = ~train
        grey_in_train = np.bincount(grey.ids[train], minlength=len(grey.sizes)) > 0
        bits_in_train = t_all > 0
        leak_grey = test & grey_in_train[grey.ids]
        leak_bits = test & bits_in_train[bits.ids]
        near, match = _near_duplicates(packed, hashes, keys, train, test, bits)
        for i in np.flatnonzero(leak_grey):
            findings.append((int(i), "leaked-grey", f"grey-{grey.ids[i]}"))
        for i in np.flatnonzero(leak_bits):
            findings.append((int(i), "leaked-binary", f"bits-{bits.ids[i]}"))
        for i in np.flatnonzero(near):
            findings.append((int(i), "near-duplicate", f"bits-{match[i]}"))
        figures.update(leaked_test_grey=int(leak_grey.sum()), leaked_test_binary=int(leak_bits.sum()),
                       near_duplicate_test=int(near.sum()))
    return DataCheck(grey, bits, figures, findings)


def pack_binarized(B: np.ndarray) -> np.ndarray:
    """Binarized patches of shape (n, h, w) or (n, n_pixels), bool, packed 8 pixels a byte per row."""
    B = np.asarray(B, bool)
    return np.packbits(B.reshape(len(B), -1), axis=1)


def check_csv_rows(check: DataCheck, names: list[str], labels: np.ndarray) -> list[list[str]]:
    """Rows of check.csv (``path,label,finding,group``), in finding order, then import order."""
    rank = {f: k for k, f in enumerate(FINDINGS)}
    rows = sorted(check.findings, key=lambda t: (rank[t[1]], t[0]))
    out = [[names[i], str(labels[i]), f, g] for i, f, g in rows]
    by_name = {nm: i for i, nm in enumerate(names)}
    for s in check.suspects or []:
        i = by_name.get(s["path"])
        out.append([s["path"], s["label"] if i is None else str(labels[i]), "suspect", ""])
    return out
