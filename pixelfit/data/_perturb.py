"""Deployment perturbations of grey patches: one-pixel shifts, lamp gain and offset, sensor noise.

Every function takes and returns uint8 patches of shape (n_patches, height, width); nothing here
binarizes. The stress tests apply these to the grey held-out patches and then the rung's own
binarization; ``--augment shift1`` adds the eight shifts of every training patch.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

#: The eight one-pixel displacements (dy, dx), row-major order, (0, 0) left out.
SHIFTS: tuple[tuple[int, int], ...] = tuple((dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1) if (dy, dx) != (0, 0))
GAINS = (0.9, 1.1)
OFFSETS = (-10, 10)
NOISE_SIGMAS = (4, 8)


def shift_patches(images: np.ndarray, dy: int, dx: int) -> np.ndarray:
    """Move the content of every patch by (dy, dx) pixels (dy down, dx right), edges replicated.

    The pixel at (r, c) of the result is the input's pixel at (r - dy, c - dx), clamped into the
    patch: a camera that moved by one pixel sees the scene one pixel further along, and the
    border it uncovers is filled with the nearest pixel it still sees.
    """
    images = np.asarray(images)
    h, w = images.shape[-2:]
    rows = np.clip(np.arange(h) - dy, 0, h - 1)
    cols = np.clip(np.arange(w) - dx, 0, w - 1)
    return images[..., rows[:, None], cols[None, :]]


def shift_name(dy: int, dx: int) -> str:
    """Name of a shift in the summary: ``shift:dx,dy`` (x to the right, y down)."""
    return f"shift:{dx},{dy}"


def _clip(values: np.ndarray) -> np.ndarray:
    return np.clip(np.rint(values), 0, 255).astype(np.uint8)


def grey_perturbations(images: np.ndarray, seed: int = 0) -> Iterator[tuple[str, np.ndarray]]:
    """The grey-level perturbations of the stress tests, by name, in a fixed order.

    ``shift:dx,dy`` for the eight one-pixel shifts; ``gain:0.9`` and ``gain:1.1`` (every level
    multiplied); ``offset:-10`` and ``offset:+10`` (every level moved); ``noise:4`` and ``noise:8``
    (Gaussian noise of that standard deviation, seeded by ``seed`` and sigma). Results are rounded
    and clipped to 0..255.
    """
    images = np.asarray(images, dtype=np.uint8)
    grey = images.astype(np.float64)
    for dy, dx in SHIFTS:
        yield shift_name(dy, dx), shift_patches(images, dy, dx)
    for g in GAINS:
        yield f"gain:{g:g}", _clip(grey * g)
    for o in OFFSETS:
        yield f"offset:{o:+d}", _clip(grey + o)
    for s in NOISE_SIGMAS:
        rng = np.random.default_rng([seed, s])
        yield f"noise:{s}", _clip(grey + rng.normal(0.0, s, grey.shape))


def stuck_pixel(images: np.ndarray, pixel: int, level: int) -> np.ndarray:
    """Copies of ``images`` with the flat pixel index ``pixel`` forced to ``level`` in every patch."""
    out = np.array(images, dtype=np.uint8, copy=True)
    flat = out.reshape(len(out), -1)
    flat[:, pixel] = level
    return out


def with_shifts(images: np.ndarray) -> np.ndarray:
    """The patches followed by their eight one-pixel shifts, in :data:`SHIFTS` order: 9 x n patches."""
    images = np.asarray(images)
    return np.concatenate([images] + [shift_patches(images, dy, dx) for dy, dx in SHIFTS])
