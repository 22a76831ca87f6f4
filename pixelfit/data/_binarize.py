"""Turn grayscale patches into binary ones, recording exactly how.

Conventions (stated once, used everywhere):

``fixed:T``
    a pixel is 1 when its value is >= T (T as the user wrote it, 0..256).
``otsu``
    one Otsu threshold t over all training pixels; a pixel is 1 when its value is > t, i.e. t
    belongs to the dark class (the convention of scikit-image's ``threshold_otsu``).
``otsu-patch``
    Otsu per patch, same > t convention; a patch with a single grey level becomes all 0.
``mean-patch``
    per-patch mean m; a pixel is 1 when its value is > m (scikit-image's ``threshold_mean``).
``invert``
    flips every bit after thresholding (for dark objects on a bright background).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pixelfit.errors import PixelfitError

METHODS = ("fixed", "otsu", "otsu-patch", "mean-patch")


def otsu_threshold(values: np.ndarray) -> int:
    """Otsu's threshold of uint8 values: the grey level t maximising between-class variance.

    The dark class is ``values <= t``. Among equal maxima the lowest t wins. When all values
    are equal, that value is returned (so ``values > t`` is empty).

    Parameters
    ----------
    values : ndarray of uint8, any shape
    """
    return int(_otsu_from_hist(grey_histogram(values)[None, :])[0])


def grey_histogram(values: np.ndarray, chunk: int = 1 << 22) -> np.ndarray:
    """Counts of each grey level 0..255 as float64 (256,), in chunks.

    ``np.bincount`` widens its input to machine integers; counting in chunks keeps that copy
    small for large training sets.
    """
    flat = np.asarray(values, dtype=np.uint8).ravel()
    hist = np.zeros(256, np.float64)
    for start in range(0, len(flat), chunk):
        hist += np.bincount(flat[start : start + chunk], minlength=256)
    return hist


def _otsu_from_hist(hist: np.ndarray) -> np.ndarray:
    """Otsu thresholds for each row of ``hist`` (n, 256); vectorised over rows."""
    levels = np.arange(256, dtype=np.float64)
    w1 = np.cumsum(hist, axis=1)
    total = w1[:, -1:]
    m1 = np.cumsum(hist * levels, axis=1)
    w2 = total - w1
    m2 = m1[:, -1:] - m1
    with np.errstate(invalid="ignore", divide="ignore"):
        mean1 = m1 / w1
        mean2 = m2 / w2
        var = w1 * w2 * (mean1 - mean2) ** 2
    # Only thresholds between the lowest and highest occupied level split the data.
    var = np.where(np.isfinite(var) & (w1 > 0) & (w2 > 0), var, -1.0)
    best = np.argmax(var, axis=1)
    lowest = np.argmax(hist > 0, axis=1)
    flat = var.max(axis=1) < 0  # a single grey level
    return np.where(flat, lowest, best)


@dataclass(frozen=True)
class Binarizer:
    """Binarization settings. ``threshold`` is learned by :meth:`fit` for ``otsu``.

    Parameters
    ----------
    method : {'fixed', 'otsu', 'otsu-patch', 'mean-patch'}
    threshold : float or None
        The fixed threshold, or the learned global Otsu threshold; None for per-patch methods.
    invert : bool
    """

    method: str = "otsu"
    threshold: float | None = None
    invert: bool = False

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise PixelfitError(f"unknown binarize method {self.method!r}; use one of: fixed:T, {', '.join(METHODS[1:])}")
        if self.method == "fixed":
            if self.threshold is None or not (0 <= float(self.threshold) <= 256):
                raise PixelfitError("fixed binarization needs a threshold T in 0..256 (fixed:T)")

    @classmethod
    def parse(cls, spec: str, invert: bool = False) -> Binarizer:
        """Read ``fixed:T``, ``otsu``, ``otsu-patch`` or ``mean-patch``; ``,invert`` may follow."""
        parts = [p.strip() for p in spec.split(",") if p.strip()]
        if not parts:
            raise PixelfitError("empty binarize setting")
        if "invert" in parts[1:]:
            invert = True
            parts = [p for p in parts if p != "invert"]
        if len(parts) != 1:
            raise PixelfitError(f"cannot read binarize setting {spec!r}")
        head = parts[0]
        if head.startswith("fixed"):
            _, _, t = head.partition(":")
            try:
                value = float(t)
            except ValueError:
                raise PixelfitError(f"fixed binarization needs a number: fixed:T, not {head!r}") from None
            return cls("fixed", value, invert)
        return cls(head, None, invert)

    @property
    def fitted(self) -> bool:
        return self.method != "otsu" or self.threshold is not None

    def fit(self, images: np.ndarray) -> Binarizer:
        """Learn the global threshold (``otsu``) from training images; others are returned as is."""
        if self.method == "otsu":
            return Binarizer("otsu", float(otsu_threshold(images)), self.invert)
        return self

    def transform(self, images: np.ndarray) -> np.ndarray:
        """Binarize.

        Parameters
        ----------
        images : ndarray of shape (n_patches, height, width), uint8

        Returns
        -------
        ndarray of shape (n_patches, height, width), bool
        """
        images = np.asarray(images)
        if images.ndim == 2:
            return self.transform(images[None])[0]
        if not self.fitted:
            raise PixelfitError("the otsu binarizer must be fitted on training images first")
        if self.method == "fixed":
            out = images >= self.threshold
        elif self.method == "otsu":
            out = images > self.threshold
        else:
            t = self.patch_thresholds(images)
            out = images > t[:, None, None]
        return ~out if self.invert else out

    def patch_thresholds(self, images: np.ndarray) -> np.ndarray:
        """Per-patch thresholds of shape (n_patches,) for the per-patch methods."""
        flat = np.asarray(images, dtype=np.uint8).reshape(len(images), -1)
        if self.method == "mean-patch":
            return flat.mean(axis=1)
        if self.method == "otsu-patch":
            # One bincount over (patch, level) codes gives every patch's histogram at once.
            codes = (np.arange(len(flat), dtype=np.intp)[:, None] * 256 + flat).ravel()
            hist = np.bincount(codes, minlength=len(flat) * 256).reshape(len(flat), 256).astype(np.float64)
            return _otsu_from_hist(hist).astype(np.float64)
        raise PixelfitError(f"{self.method} has one global threshold, not one per patch")

    def to_dict(self) -> dict:
        return {"method": self.method, "threshold": self.threshold, "invert": self.invert}

    @classmethod
    def from_dict(cls, d: dict) -> Binarizer:
        t = d.get("threshold")
        return cls(str(d["method"]), None if t is None else float(t), bool(d.get("invert", False)))

    def describe(self) -> str:
        core = f"fixed:{self.threshold:g}" if self.method == "fixed" else self.method
        if self.method == "otsu" and self.threshold is not None:
            core = f"otsu (t={self.threshold:g})"
        return core + (", inverted" if self.invert else "")
