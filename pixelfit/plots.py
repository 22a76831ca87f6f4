"""Static pictures for reports, drawn with Pillow: heatmaps and the bias-variance plot."""

from __future__ import annotations

import io

import numpy as np
from PIL import Image, ImageDraw, ImageFont

#: Diverging ramp for signed maps: negative -> slate blue, 0 -> near white, positive -> amber.
NEG_RGB = np.array([46, 92, 160], np.float64)
MID_RGB = np.array([246, 246, 242], np.float64)
POS_RGB = np.array([214, 120, 16], np.float64)
#: Line colours of the error curves.
CURVE_RGB = {"train": (60, 60, 60), "cv": (46, 92, 160), "test": (214, 120, 16), "bound": (150, 150, 150)}


def colorize(values: np.ndarray) -> np.ndarray:
    """Signed map -> RGB uint8 (h, w, 3), symmetric around 0; an all-zero map is uniform white."""
    v = np.asarray(values, dtype=np.float64)
    top = float(np.nanmax(np.abs(v))) if v.size else 0.0
    t = np.zeros_like(v) if top == 0 or not np.isfinite(top) else np.clip(v / top, -1, 1)
    t = np.nan_to_num(t)[..., None]
    rgb = np.where(t >= 0, MID_RGB + (POS_RGB - MID_RGB) * t, MID_RGB + (NEG_RGB - MID_RGB) * (-t))
    return np.rint(rgb).astype(np.uint8)


def heatmap_png(values: np.ndarray, scale: int = 24) -> bytes:
    """PNG bytes of a per-pixel map, each pixel drawn as a ``scale`` x ``scale`` square, row-major."""
    rgb = colorize(values)
    im = Image.fromarray(rgb, "RGB").resize((rgb.shape[1] * scale, rgb.shape[0] * scale), Image.Resampling.NEAREST)
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()


def _x_axis(x0: float, x1: float, lo: float, hi: float, log_x: bool):
    """Map a size to a pixel column (log2 axis when sizes span a wide range)."""
    span = hi - lo

    def px(s: float) -> float:
        x = float(np.log2(s)) if log_x else float(s)
        return x0 + (x1 - x0) * ((x - lo) / span if span > 0 else 0.5)

    return px


def _y_axis(top: float, bottom: float):
    """Map an error rate in [0, 1] to a pixel row."""

    def py(e: float) -> float:
        return bottom - (bottom - top) * min(1.0, max(0.0, e))

    return py


def ladder_png(curves: dict[str, dict[str, list[tuple[float, float | None]]]], size_names: dict[str, str],
               recommended: tuple[str, int] | None = None) -> bytes:
    """PNG bytes of the bias-variance plot: one panel per family, error rate against size.

    ``curves[family][kind]`` is a list of (size, error) points, kind one of train, cv, test, bound.
    """
    families = list(curves)
    cols = min(4, max(1, len(families)))
    rows = -(-len(families) // cols)
    pw, ph, pad = 260, 200, 36
    im = Image.new("RGB", (cols * pw, rows * ph + 28), (255, 255, 255))
    d = ImageDraw.Draw(im)
    font = ImageFont.load_default()
    x0 = 8
    for kind, rgb in CURVE_RGB.items():
        d.line([(x0, 14), (x0 + 18, 14)], fill=rgb, width=3)
        d.text((x0 + 22, 8), {"train": "train error", "cv": "CV error", "test": "held-out error",
                              "bound": "bound (95 %)"}[kind], fill=(0, 0, 0), font=font)
        x0 += 120
    for i, fam in enumerate(families):
        ox, oy = (i % cols) * pw, 28 + (i // cols) * ph
        left, top, right, bottom = ox + pad, oy + 18, ox + pw - 10, oy + ph - 28
        d.text((ox + pad, oy + 2), fam, fill=(0, 0, 0), font=font)
        d.rectangle([left, top, right, bottom], outline=(180, 180, 180))
        sizes = sorted({s for pts in curves[fam].values() for s, _ in pts})
        if not sizes:
            continue
        log_x = len(sizes) > 2 and sizes[0] > 0 and sizes[-1] / sizes[0] > 8
        xs = np.log2(sizes) if log_x else np.asarray(sizes, float)
        lo, hi = float(xs.min()), float(xs.max())

        px = _x_axis(left + 6, right - 6, lo, hi, log_x)
        py = _y_axis(top, bottom)

        for e in (0.0, 0.25, 0.5, 0.75, 1.0):
            d.line([(left, py(e)), (right, py(e))], fill=(235, 235, 235))
            d.text((ox + 4, py(e) - 6), f"{e:.2f}", fill=(90, 90, 90), font=font)
        for s in sizes:
            d.text((px(s) - 6, bottom + 4), str(s), fill=(90, 90, 90), font=font)
        d.text((right - 70, bottom + 14), size_names.get(fam, "size"), fill=(90, 90, 90), font=font)
        for kind, rgb in CURVE_RGB.items():
            pts = [(px(s), py(e)) for s, e in curves[fam].get(kind, []) if e is not None]
            if len(pts) > 1:
                d.line(pts, fill=rgb, width=2)
            for x, y in pts:
                d.ellipse([x - 2, y - 2, x + 2, y + 2], fill=rgb)
        if recommended and recommended[0] == fam:
            x = px(recommended[1])
            d.line([(x, top), (x, bottom)], fill=(40, 150, 70), width=1)
            label_w = d.textlength("recommended", font=font)
            tx = x + 3 if x + 3 + label_w < right else x - 3 - label_w
            d.text((tx, top + 2), "recommended", fill=(40, 150, 70), font=font)
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()
