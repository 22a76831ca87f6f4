"""The held-out split, and the fingerprint that ties results to the exact training data."""

from __future__ import annotations

import hashlib

import numpy as np

from pixelfit.errors import TrainingError

SEED_MAX = 2**32 - 1


def check_seed(seed) -> int:
    """The seed as an int, or a refusal: scikit-learn and numpy take 0 .. 2**32-1."""
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or not 0 <= seed <= SEED_MAX:
        raise TrainingError(f"the seed must be a whole number from 0 to 2**32-1 ({SEED_MAX}), not {seed!r}", field="seed")
    return int(seed)


def stratified_split(y: np.ndarray, test_fraction: float = 0.25, seed: int = 0,
                     class_names: dict | None = None) -> np.ndarray:
    """Boolean mask of shape (n_patches,), True for held-out patches, stratified on ``y``.

    The same ``y``, fraction and seed always give the same split. ``class_names`` maps values of
    ``y`` to the names used in messages (for a boolean target, the class each value stands for).
    """
    if not 0 < test_fraction < 1:
        raise TrainingError(f"the held-out share must be between 0 and 1, not {test_fraction}", field="test_fraction")
    seed = check_seed(seed)
    y = np.asarray(y)
    classes, counts = np.unique(y, return_counts=True)
    if counts.min() < 2:
        small = classes[np.argmin(counts)]
        raise TrainingError(
            f"class {(class_names or {}).get(small, small)!r} has {counts.min()} patch(es); "
            "a stratified split needs at least 2 per class"
        )
    from sklearn.model_selection import train_test_split  # here, so rule files load without scikit-learn

    idx = np.arange(len(y))
    try:
        _, test_idx = train_test_split(idx, test_size=test_fraction, random_state=seed, stratify=y)
    except ValueError as exc:
        raise TrainingError(f"cannot split {len(y)} patches with a held-out share of {test_fraction}: {exc}",
                            field="test_fraction") from None
    mask = np.zeros(len(y), bool)
    mask[test_idx] = True
    return mask


def fingerprint(X: np.ndarray, y: np.ndarray) -> str:
    """SHA-256 over binarized patches and their labels, as hex.

    Parameters
    ----------
    X : ndarray of shape (n_patches, height, width) or (n_patches, n_pixels), bool
    y : ndarray of shape (n_patches,), bool
    """
    X = np.ascontiguousarray(np.asarray(X, dtype=bool))
    h = hashlib.sha256()
    h.update(repr(X.shape).encode())
    h.update(np.packbits(X.reshape(len(X), -1), axis=1).tobytes())
    h.update(np.packbits(np.asarray(y, dtype=bool)).tobytes())
    return h.hexdigest()


def raw_fingerprint(images: np.ndarray, labels: np.ndarray) -> str:
    """SHA-256 over the imported grayscale patches and their class names, as hex."""
    h = hashlib.sha256()
    images = np.ascontiguousarray(images, dtype=np.uint8)
    h.update(repr(images.shape).encode())
    h.update(images.tobytes())
    h.update("\n".join(map(str, labels)).encode())
    return h.hexdigest()


SPLIT_METHODS = ("group-duplicates", "stratified")


def grouped_split(y: np.ndarray, groups: np.ndarray, test_fraction: float = 0.25, seed: int = 0,
                  class_names: dict | None = None) -> np.ndarray:
    """Held-out mask like :func:`stratified_split`, with every group of ``groups`` on one side.

    It starts from the stratified draw, so with no group of two or more patches the split is that
    draw exactly. Each larger group then goes whole to the side where most of its patches fell
    (train on a tie), and patches that are alone in their group move between the sides until every
    class has as many held-out patches as the stratified draw gave it; that is exact whenever each
    class has enough such patches, and as close as they allow otherwise.

    Parameters
    ----------
    y : ndarray of shape (n_patches,)
    groups : ndarray of shape (n_patches,), int — patches with the same id stay together
    """
    mask = stratified_split(y, test_fraction, seed, class_names)
    y = np.asarray(y)
    groups = np.asarray(groups)
    _, ids, sizes = np.unique(groups, return_inverse=True, return_counts=True)
    ids = ids.reshape(-1)
    if sizes.max(initial=0) <= 1:
        return mask
    target = {c: int((mask & (y == c)).sum()) for c in np.unique(y)}
    held = np.bincount(ids, weights=mask, minlength=len(sizes))
    to_test = held * 2 > sizes  # a strict majority of the group was held out
    multi = sizes[ids] > 1
    mask[multi] = to_test[ids[multi]]
    rng = np.random.default_rng(seed)
    single = ~multi
    for c, want in target.items():
        of_c = single & (y == c)
        have = int((mask & (y == c)).sum())
        if have > want:
            pool = np.flatnonzero(of_c & mask)
            mask[rng.permutation(pool)[: have - want]] = False
        elif have < want:
            pool = np.flatnonzero(of_c & ~mask)
            mask[rng.permutation(pool)[: want - have]] = True
    for c, want in target.items():
        if want and not (mask & (y == c)).any() or (y == c).any() and (mask | (y != c)).all():
            name = (class_names or {}).get(c, c)
            side = "held-out" if want and not (mask & (y == c)).any() else "training"
            raise TrainingError(
                f"class {name!r} has no {side} patch when identical grey patches stay together "
                f"(the largest group of copies among its {int((y == c).sum())} patches holds "
                f"{int(sizes[ids[y == c]].max())}, counting every class); "
                "use --split stratified to measure anyway, knowing that copies will leak")
    return mask
