"""Static pictures for reports, drawn with Pillow: heatmaps and the bias-variance plot."""

from __future__ import annotations

import io

import numpy as np
from PIL import Image, ImageDraw, ImageFont

#: Diverging ramp for signed maps: negative -> slate blue, 0 -> near white, positive -> amber.
NEG_RGB = np.array([46, 92, 160], np.float64)
MID_RGB = np.array([246, 246, 242], np.float64)
POS_RGB = np.array([214, 120, 16], np.float64)
#: Sequential ramp for one-signed maps (every value >= 0): (position in [0, 1], colour) stops from
#: near white through amber to dark brown, so the whole scale carries the values.
SEQUENTIAL_STOPS = ((0.0, (246, 246, 242)), (0.5, (214, 120, 16)), (1.0, (96, 44, 6)))
#: One colour per model family: the window's ladder plot and table and the CLI's ladder.png.
FAMILY_RGB = {"constant": (110, 110, 110), "lut": (46, 92, 160), "nb": (40, 150, 70), "logistic": (150, 60, 150),
              "tree": (214, 120, 16), "mlp": (190, 50, 50), "memorize": (20, 150, 160)}
#: The error curves of the ladder: their labels, and the dash pattern of each in ladder.png
#: (lengths in pixels of drawn and skipped pieces; empty: solid), mirroring the window's pen styles.
CURVE_LABELS = {"train": "train error", "cv": "CV error", "test": "held-out error", "bound": "bound (95 %)"}
CURVE_DASHES: dict[str, tuple[int, ...]] = {"train": (7, 4), "cv": (), "test": (2, 3), "bound": (8, 3, 2, 3)}


#: Pixels between words: the default font's space is two pixels wide, and "CV error" read as "CVerror".
WORD_GAP = 4


def _text_len(d: ImageDraw.ImageDraw, text: str, font) -> float:
    words = text.split(" ")
    return sum(d.textlength(w, font=font) for w in words) + WORD_GAP * (len(words) - 1)


def _text(d: ImageDraw.ImageDraw, xy: tuple[float, float], text: str, fill, font) -> None:
    """Draw ``text`` word by word, WORD_GAP pixels apart."""
    x, y = xy
    for w in text.split(" "):
        if w:
            d.text((x, y), w, fill=fill, font=font)
        x += d.textlength(w, font=font) + WORD_GAP


def one_signed(values: np.ndarray) -> bool:
    """True when every finite value is >= 0: such a map gets the sequential scale."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    return bool(v.size) and float(v.min()) >= 0.0


def colorize(values: np.ndarray) -> np.ndarray:
    """Signed map -> RGB uint8 (h, w, 3), symmetric around 0; an all-zero map is uniform white."""
    v = np.asarray(values, dtype=np.float64)
    top = float(np.nanmax(np.abs(v))) if v.size else 0.0
    t = np.zeros_like(v) if top == 0 or not np.isfinite(top) else np.clip(v / top, -1, 1)
    t = np.nan_to_num(t)[..., None]
    rgb = np.where(t >= 0, MID_RGB + (POS_RGB - MID_RGB) * t, MID_RGB + (NEG_RGB - MID_RGB) * (-t))
    return np.rint(rgb).astype(np.uint8)


def colorize_sequential(values: np.ndarray) -> np.ndarray:
    """One-signed map -> RGB uint8 (h, w, 3): 0 near white, the largest value darkest."""
    v = np.asarray(values, dtype=np.float64)
    top = float(np.nanmax(v)) if v.size else 0.0
    t = np.zeros_like(v) if top <= 0 or not np.isfinite(top) else np.clip(np.nan_to_num(v) / top, 0, 1)
    pos = [p for p, _ in SEQUENTIAL_STOPS]
    rgb = np.stack([np.interp(t, pos, [c[k] for _, c in SEQUENTIAL_STOPS]) for k in range(3)], axis=-1)
    return np.rint(rgb).astype(np.uint8)


def heatmap_png(values: np.ndarray, scale: int = 24) -> bytes:
    """PNG bytes of a per-pixel map, each pixel drawn as a ``scale`` x ``scale`` square, row-major.

    One-signed maps use the sequential scale, signed maps the diverging one.
    """
    rgb = colorize_sequential(values) if one_signed(values) else colorize(values)
    im = Image.fromarray(rgb, "RGB").resize((rgb.shape[1] * scale, rgb.shape[0] * scale), Image.Resampling.NEAREST)
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()


def _dashed(d: ImageDraw.ImageDraw, pts: list[tuple[float, float]], fill, width: int, dashes: tuple[int, ...]) -> None:
    """A polyline with a repeating dash pattern of even length (empty: solid), running on across corners."""
    if not dashes:
        d.line(pts, fill=fill, width=width)
        return
    k, left, on = 0, float(dashes[0]), True
    for (x0, y0), (x1, y1) in zip(pts, pts[1:]):
        length = float(np.hypot(x1 - x0, y1 - y0))
        at = 0.0
        while at < length:
            step = min(left, length - at)
            if on:
                a, b = at / length, (at + step) / length
                d.line([(x0 + (x1 - x0) * a, y0 + (y1 - y0) * a), (x0 + (x1 - x0) * b, y0 + (y1 - y0) * b)],
                       fill=fill, width=width)
            at += step
            left -= step
            if left <= 1e-9:
                k = (k + 1) % len(dashes)
                left, on = float(dashes[k]), k % 2 == 0  # even pieces drawn, odd ones skipped


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
    for kind, label in CURVE_LABELS.items():  # line style keys in black; each panel is in its family's colour
        _dashed(d, [(x0, 14), (x0 + 24, 14)], (0, 0, 0), 3 if kind == "cv" else 2, CURVE_DASHES[kind])
        _text(d, (x0 + 30, 8), label, fill=(0, 0, 0), font=font)
        x0 += 46 + int(_text_len(d, label, font=font))
    for i, fam in enumerate(families):
        ox, oy = (i % cols) * pw, 28 + (i // cols) * ph
        left, top, right, bottom = ox + pad, oy + 18, ox + pw - 10, oy + ph - 28
        rgb = FAMILY_RGB.get(fam, (0, 0, 0))
        _text(d, (ox + pad, oy + 2), fam, fill=rgb, font=font)
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
            _text(d, (ox + 4, py(e) - 6), f"{e:.2f}", fill=(90, 90, 90), font=font)
        for s in sizes:
            _text(d, (px(s) - 6, bottom + 4), str(s), fill=(90, 90, 90), font=font)
        _text(d, (right - 70, bottom + 14), size_names.get(fam, "size"), fill=(90, 90, 90), font=font)
        for kind, dashes in CURVE_DASHES.items():
            pts = [(px(s), py(e)) for s, e in curves[fam].get(kind, []) if e is not None]
            if len(pts) > 1:
                _dashed(d, pts, rgb, 3 if kind == "cv" else 2, dashes)
            r = 3 if kind == "cv" else 2
            for x, y in pts:
                d.ellipse([x - r, y - r, x + r, y + r], fill=rgb)
        if recommended and recommended[0] == fam:
            x = px(recommended[1])
            d.line([(x, top), (x, bottom)], fill=(40, 150, 70), width=1)
            label_w = _text_len(d, "recommended", font=font)
            tx = x + 3 if x + 3 + label_w < right else x - 3 - label_w
            _text(d, (tx, top + 2), "recommended", fill=(40, 150, 70), font=font)
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()


#: Line colours of the bias-variance decomposition.
DECOMPOSITION_RGB = {"loss": (60, 60, 60), "bias": (46, 92, 160), "variance": (214, 120, 16)}
#: Line colours of the learning curves.
LEARNING_RGB = {"cv": (46, 92, 160), "test": (214, 120, 16)}


def _png(im: Image.Image) -> bytes:
    buf = io.BytesIO()
    im.save(buf, format="PNG")
    return buf.getvalue()


def _nice_top(values: list[float]) -> float:
    """The top of a 0-based axis: the largest value rounded up to a tenth (at least 0.1)."""
    top = max([v for v in values if v is not None and np.isfinite(v)], default=0.0)
    return max(0.1, float(np.ceil(top * 10 - 1e-9) / 10))


def _legend(d: ImageDraw.ImageDraw, font, items: list[tuple[str, tuple[int, int, int]]], y: int = 14) -> None:
    x0 = 8
    for label, rgb in items:
        d.line([(x0, y), (x0 + 18, y)], fill=rgb, width=3)
        _text(d, (x0 + 22, y - 6), label, fill=(0, 0, 0), font=font)
        x0 += 32 + int(_text_len(d, label, font=font))


def decomposition_png(curves: dict[str, list[tuple[float, dict | None]]], size_names: dict[str, str]) -> bytes:
    """PNG bytes of the measured bias and variance: one panel per family, against size.

    ``curves[family]`` is a list of (size, decomposition) with the keys of
    :func:`pixelfit.evaluate.bias_variance_01`; a None decomposition is left out.
    """
    families = list(curves)
    cols = min(4, max(1, len(families)))
    rows = max(1, -(-len(families) // cols))
    pw, ph, pad = 260, 200, 36
    im = Image.new("RGB", (cols * pw, rows * ph + 28), (255, 255, 255))
    d = ImageDraw.Draw(im)
    font = ImageFont.load_default()
    _legend(d, font, [("held-out loss", DECOMPOSITION_RGB["loss"]), ("bias", DECOMPOSITION_RGB["bias"]),
                      ("variance", DECOMPOSITION_RGB["variance"])])
    top_v = _nice_top([bv[k] for pts in curves.values() for _, bv in pts if bv for k in DECOMPOSITION_RGB])
    for i, fam in enumerate(families):
        ox, oy = (i % cols) * pw, 28 + (i // cols) * ph
        left, top, right, bottom = ox + pad, oy + 18, ox + pw - 10, oy + ph - 28
        _text(d, (ox + pad, oy + 2), fam, fill=(0, 0, 0), font=font)
        d.rectangle([left, top, right, bottom], outline=(180, 180, 180))
        pts = [(s, bv) for s, bv in curves[fam] if bv is not None and bv.get("loss") is not None]
        sizes = sorted({s for s, _ in curves[fam]})
        if not sizes:
            continue
        log_x = len(sizes) > 2 and sizes[0] > 0 and sizes[-1] / sizes[0] > 8
        xs = np.log2(sizes) if log_x else np.asarray(sizes, float)
        px = _x_axis(left + 6, right - 6, float(xs.min()), float(xs.max()), log_x)
        py = _error_grid(d, font, ox, left, right, top, bottom, top_v)
        for s in sizes:
            _text(d, (px(s) - 6, bottom + 4), str(s), fill=(90, 90, 90), font=font)
        _text(d, (right - 70, bottom + 14), size_names.get(fam, "size"), fill=(90, 90, 90), font=font)
        for kind, rgb in DECOMPOSITION_RGB.items():
            xy = [(px(s), py(bv[kind])) for s, bv in pts]
            if len(xy) > 1:
                d.line(xy, fill=rgb, width=2)
            for x, y in xy:
                d.ellipse([x - 2, y - 2, x + 2, y + 2], fill=rgb)
        if not pts:
            _text(d, (left + 8, top + 8), "not measured", fill=(120, 120, 120), font=font)
    return _png(im)


def _error_grid(d, font, ox: int, left: int, right: int, top: int, bottom: int, top_v: float):
    """Draw a panel's error axis (0 to ``top_v``, five grid lines with labels); returns error -> y."""
    unit = _y_axis(top, bottom)

    def py(e: float) -> float:
        return unit(e / top_v)

    for k in range(5):
        e = top_v * k / 4
        d.line([(left, py(e)), (right, py(e))], fill=(235, 235, 235))
        _text(d, (ox + 4, py(e) - 6), f"{e:.3g}", fill=(90, 90, 90), font=font)
    return py


def learning_curve_png(curve: dict) -> bytes:
    """PNG bytes of the learning curves: one panel per rung, error against training fraction.

    ``curve`` is the ``learning_curve`` entry of summary.json. The CV error is drawn with bars of
    one standard deviation over the repeats; each panel's verdict is written under it.
    """
    keys = list(curve.get("rungs") or [])
    pw, ph, pad = 300, 230, 36
    im = Image.new("RGB", (max(1, len(keys)) * pw, ph + 28), (255, 255, 255))
    d = ImageDraw.Draw(im)
    font = ImageFont.load_default()
    _legend(d, font, [("CV error (± 1 SD)", LEARNING_RGB["cv"]), ("held-out error", LEARNING_RGB["test"])])
    points = curve.get("points") or []
    top_v = _nice_top([(p["cv_error"] or 0) + (p["cv_error_std"] or 0) for p in points]
                      + [p["test_error"] for p in points])
    for i, key in enumerate(keys):
        ox, oy = i * pw, 28
        left, top, right, bottom = ox + pad, oy + 18, ox + pw - 10, oy + ph - 56
        _text(d, (ox + pad, oy + 2), key, fill=(0, 0, 0), font=font)
        d.rectangle([left, top, right, bottom], outline=(180, 180, 180))
        px = _x_axis(left + 6, right - 6, 0.0, 1.0, False)
        py = _error_grid(d, font, ox, left, right, top, bottom, top_v)
        mine = [p for p in points if p["rung"] == key]
        for p in mine:
            _text(d, (px(p["fraction"]) - 8, bottom + 4), f"{p['fraction']:.0%}", fill=(90, 90, 90), font=font)
        _text(d, (right - 120, bottom + 16), "share of training part", fill=(90, 90, 90), font=font)
        for kind, rgb in LEARNING_RGB.items():
            xy = [(px(p["fraction"]), py(p[f"{kind}_error"])) for p in mine if p[f"{kind}_error"] is not None]
            if len(xy) > 1:
                d.line(xy, fill=rgb, width=2)
            for x, y in xy:
                d.ellipse([x - 2, y - 2, x + 2, y + 2], fill=rgb)
        for p in mine:
            if p["cv_error"] is not None and p["cv_error_std"] is not None:
                x = px(p["fraction"])
                lo, hi = py(max(0.0, p["cv_error"] - p["cv_error_std"])), py(p["cv_error"] + p["cv_error_std"])
                d.line([(x, lo), (x, hi)], fill=LEARNING_RGB["cv"], width=1)
                d.line([(x - 3, lo), (x + 3, lo)], fill=LEARNING_RGB["cv"])
                d.line([(x - 3, hi), (x + 3, hi)], fill=LEARNING_RGB["cv"])
        verdict = (curve.get("verdict") or {}).get(key, "")
        for j, line in enumerate(_wrap(d, font, verdict, right - ox - 8)):
            _text(d, (ox + 8, bottom + 30 + 12 * j), line, fill=(0, 0, 0), font=font)
    return _png(im)


def _wrap(d: ImageDraw.ImageDraw, font, text: str, width: float) -> list[str]:
    lines: list[str] = []
    for word in text.split():
        if lines and _text_len(d, lines[-1] + " " + word, font=font) <= width:
            lines[-1] += " " + word
        else:
            lines.append(word)
    return lines


def stress_png(stress: dict[str, dict], cell: int = 22) -> bytes:
    """PNG bytes of the stress tests: one row per rung, one column per perturbation.

    Each cell is coloured by the drop of held-out F1 under the perturbation (amber: worse, blue:
    better, white: unchanged; the scale is symmetric and written under the grid); a cell where F1
    is undefined is grey.
    """
    keys = list(stress)
    names: list[str] = []
    for k in keys:
        names += [n for n in stress[k] if n != "worst" and n not in names]
    drops = np.full((len(keys), len(names)), np.nan)
    for i, k in enumerate(keys):
        base = _base_f1(stress[k])
        for j, n in enumerate(names):
            f1 = (stress[k].get(n) or {}).get("f1")
            if base is not None and f1 is not None:
                drops[i, j] = base - f1
    font = ImageFont.load_default()
    probe = ImageDraw.Draw(Image.new("RGB", (1, 1)))
    label_w = int(max([_text_len(probe, k, font=font) for k in keys], default=40)) + 12
    head_h = int(max([_text_len(probe, n, font=font) for n in names], default=40)) + 10
    w, h = label_w + cell * len(names) + 10, head_h + cell * len(keys) + 40
    im = Image.new("RGB", (max(w, 320), h), (255, 255, 255))
    d = ImageDraw.Draw(im)
    for j, n in enumerate(names):  # column names written upwards
        tw = int(_text_len(probe, n, font=font)) + 4
        txt = Image.new("RGB", (tw, 12), (255, 255, 255))
        _text(ImageDraw.Draw(txt), (2, 0), n, fill=(0, 0, 0), font=font)
        rot = txt.rotate(90, expand=True)
        im.paste(rot, (label_w + j * cell + (cell - 12) // 2, head_h - 4 - tw))
    top = float(np.nanmax(np.abs(drops))) if np.isfinite(drops).any() else 0.0
    rgb = colorize(np.nan_to_num(drops)) if drops.size else np.zeros((0, 0, 3), np.uint8)
    for i, k in enumerate(keys):
        y = head_h + i * cell
        _text(d, (4, y + 5), k, fill=(0, 0, 0), font=font)
        for j in range(len(names)):
            x = label_w + j * cell
            fill = (200, 200, 200) if np.isnan(drops[i, j]) else tuple(int(v) for v in rgb[i, j])
            d.rectangle([x, y, x + cell - 2, y + cell - 2], fill=fill)
            if stress[keys[i]].get("worst", {}).get("name") == names[j]:
                d.rectangle([x, y, x + cell - 2, y + cell - 2], outline=(0, 0, 0))
    _text(d, (4, head_h + cell * len(keys) + 8),
           f"colour: drop of held-out F1 (amber worse, blue better), scale ±{top:.3f}; outlined: worst",
           fill=(60, 60, 60), font=font)
    return _png(im)


def _base_f1(entry: dict) -> float | None:
    """The unperturbed F1 behind a rung's stress entry."""
    return (entry.get("worst") or {}).get("f1_unperturbed")
