"""numpy arrays to Qt images, and the colour map of per-pixel maps."""

from __future__ import annotations

import numpy as np

from pixelfit.app._qt import QtGui, pg
from pixelfit.plots import MID_RGB, NEG_RGB, POS_RGB, SEQUENTIAL_STOPS, one_signed

#: Grey of the one-pixel frame around the bits, so white bits stand out from a white background.
FRAME_GREY = 150


def side_by_side(raw: np.ndarray, binary: np.ndarray, scale: int = 4, gap: int = 2) -> np.ndarray:
    """A grey patch and its binarized version next to each other, enlarged; the bits framed.

    Parameters
    ----------
    raw : ndarray of shape (h, w), uint8
    binary : ndarray of shape (h, w), bool

    Returns
    -------
    ndarray of shape (h * scale, (2 * w) * scale + gap), uint8
    """
    big_raw = np.kron(raw, np.ones((scale, scale), np.uint8))
    big_bin = np.kron(binary.astype(np.uint8) * 255, np.ones((scale, scale), np.uint8))
    if min(big_bin.shape) > 2:
        big_bin[[0, -1], :] = FRAME_GREY
        big_bin[:, [0, -1]] = FRAME_GREY
    spacer = np.full((big_raw.shape[0], gap), 128, np.uint8)
    return np.ascontiguousarray(np.hstack([big_raw, spacer, big_bin]))


def gray_qimage(arr: np.ndarray) -> QtGui.QImage:
    """A QImage owning a copy of a 2-D uint8 array (row-major: arr[r, c] is pixel (x=c, y=r))."""
    arr = np.ascontiguousarray(arr, dtype=np.uint8)
    h, w = arr.shape
    img = QtGui.QImage(arr.data, w, h, arr.strides[0], QtGui.QImage.Format.Format_Grayscale8)
    return img.copy()  # detach from the numpy buffer, which may be freed


def enlarged_pixmap(raw: np.ndarray, scale: int = 4) -> QtGui.QPixmap:
    return QtGui.QPixmap.fromImage(gray_qimage(np.kron(raw, np.ones((scale, scale), np.uint8))))


def signed_colormap() -> pg.ColorMap:
    """The project's diverging ramp (the same colours as the report heatmaps)."""
    colors = np.array([NEG_RGB, MID_RGB, POS_RGB], np.float64).astype(np.uint8)
    return pg.ColorMap(pos=np.array([0.0, 0.5, 1.0]), color=colors)


def sequential_colormap() -> pg.ColorMap:
    """The ramp of one-signed maps (the same stops as the report heatmaps)."""
    pos = np.array([p for p, _ in SEQUENTIAL_STOPS])
    return pg.ColorMap(pos=pos, color=np.array([c for _, c in SEQUENTIAL_STOPS], np.uint8))


def map_scale(values: np.ndarray) -> tuple[pg.ColorMap, tuple[float, float]]:
    """Colour map and levels of a per-pixel map: sequential from 0 for a one-signed map (every
    value >= 0), diverging around 0 otherwise; see :func:`pixelfit.plots.heatmap_png`."""
    if one_signed(values):
        top = float(np.nanmax(values))
        return sequential_colormap(), (0.0, top if np.isfinite(top) and top > 0 else 1.0)
    return signed_colormap(), symmetric_levels(values)


def symmetric_levels(values: np.ndarray) -> tuple[float, float]:
    """(-m, m) with m the largest magnitude; (-1, 1) for an all-zero or non-finite map."""
    v = np.asarray(values, dtype=np.float64)
    m = float(np.nanmax(np.abs(v))) if v.size else 0.0
    if not np.isfinite(m) or m == 0.0:
        m = 1.0
    return -m, m
