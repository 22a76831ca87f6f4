"""lut: a truth table over the k best pixels, found by an exact (or beam) search."""

from __future__ import annotations

import numpy as np

from pixelfit.errors import RuleFileError
from pixelfit.families._base import CTable, Family, IntegerModel, Model, array, bits, c_type_for, figures, flat_pixels, ops, rc

#: The most pixels a truth table read from a file may have (2**24 entries).
MAX_LUT_PIXELS = 24


class LutFamily(Family):
    name = "lut"
    description = "truth table over the k best pixels"
    size_name = "pixels"
    title_format = "truth table over the best {n}"
    map_name = "rise in training error without each pixel"
    sized_in_pixels = True

    def default_sizes(self, n_pixels):
        return [k for k in (1, 2, 3, 4) if k <= n_pixels]

    def make(self, size, n_pixels, seed):
        from pixelfit.models import LutRule

        return LutRule(k=size)

    def size_figures(self, est, size, n_pixels):
        from pixelfit.models import log2_lut_class

        return figures(size + 2**size, log2_class_size=log2_lut_class(n_pixels, size))

    def section(self, est, shape):
        w = shape[1]
        return {"pixels": [rc(i, w) for i in est.pixels_], "table": [int(v) for v in est.table_],
                "scores": [float(v) for v in est.rate_],
                "counts": [[int(n), int(p)] for n, p in est.counts_],
                "bit_order": "bit j of a pattern code is the value of the j-th listed pixel"}

    def native_importance(self, est, X, y, shape):
        # The rise in training error rate when each chosen pixel is dropped (best table on the others).
        out = np.zeros(shape[0] * shape[1])
        base = est.train_errors_ / len(y)
        pix = est.pixels_
        yb = np.asarray(y == est.classes_[-1])
        for j, pixel in enumerate(pix):
            rest = np.delete(pix, j)
            if len(rest) == 0:
                err = min(yb.mean(), 1 - yb.mean())
            else:
                codes = X[:, rest].astype(np.intp) @ (1 << np.arange(len(rest)))
                cp = np.bincount(codes[yb], minlength=2 ** len(rest))
                cn = np.bincount(codes[~yb], minlength=2 ** len(rest))
                err = np.minimum(cp, cn).sum() / len(y)
            out[pixel] = err - base
        return out.reshape(shape)

    def search_facts(self, est):
        return {"method": est.search_, "candidates": est.n_candidates_}

    def decode(self, m, shape):
        pixels = flat_pixels(m["pixels"], shape, "model/pixels")
        k = len(pixels)
        if k != int(m["size"]):
            raise RuleFileError(f"model/pixels: {k} pixels listed for a size-{m['size']} rule")
        if k > MAX_LUT_PIXELS:
            raise RuleFileError(f"model/pixels: {k} pixels is more than a truth table can hold here ({MAX_LUT_PIXELS})")
        table = array(m["table"], "model/table", (2**k,), np.int64).astype(bool)
        counts = None if m.get("counts") is None else array(m["counts"], "model/counts", (2**k, 2), np.int64)
        return LutModel(pixels, table, array(m["scores"], "model/scores", (2**k,)), counts)


def _codes(X: np.ndarray, pixels: np.ndarray) -> np.ndarray:
    return bits(X)[:, pixels].astype(np.intp) @ (1 << np.arange(len(pixels))).astype(np.intp)


class LutModel(Model):
    def __init__(self, pixels: np.ndarray, table: np.ndarray, scores: np.ndarray, counts: np.ndarray | None = None):
        self.pixels, self.table, self.scores = pixels, table, scores
        #: training patches (negative, positive) per pattern code; None when the file records none
        self.counts = counts

    def decide(self, X):
        codes = _codes(X, self.pixels)
        return self.scores[codes], self.table[codes]

    def pixels_used(self):
        return [int(i) for i in self.pixels]

    def explain(self, x, shape, threshold):
        code = int(_codes(np.asarray(x, bool).reshape(1, -1), self.pixels)[0])
        w = shape[1]
        row = {"code": code, "label": bool(self.table[code]), "score": float(self.scores[code]),
               "negative": None if self.counts is None else int(self.counts[code, 0]),
               "positive": None if self.counts is None else int(self.counts[code, 1])}
        return {"kind": "truth table", "pixels": [rc(i, w) for i in self.pixels],
                "bits": [int(x[i]) for i in self.pixels], "code": code, "row": row,
                "note": ("bit j of the code is the j-th listed pixel; the row's counts are the training patches "
                         "of each class with this pattern" if self.counts is not None else
                         "bit j of the code is the j-th listed pixel; this rule file records no counts per "
                         "pattern, only the score (the positive share of the training patches with it)")}

    def integer(self, threshold=None):
        return LutInteger(self.pixels, self.table if threshold is None else self.scores > threshold)


class LutInteger(IntegerModel):
    """The pattern code of the k pixels indexes a table of 0/1 answers: exact, no rounding."""

    def __init__(self, pixels: np.ndarray, table: np.ndarray):
        self.pixels, self.table = pixels, np.asarray(table, bool)
        self.k = len(pixels)
        self.tables = [CTable("pixels", c_type_for(pixels, signed=False), pixels),
                       CTable("table", "uint8_t", self.table.astype(np.int64))]
        self.facts = {}

    def predict(self, X):
        return self.table[_codes(X, self.pixels)]

    def c_code(self, ident, P):
        if self.k == 0:
            return f"    (void)patch;\n    return {ident}_table[0];"
        return (f"    uint32_t code = 0u;\n    uint16_t j;\n    for (j = 0u; j < {self.k}u; ++j) {{\n"
                f"        if (patch[{ident}_pixels[j]] != 0u) {{\n            code |= (uint32_t)1u << j;\n"
                f"        }}\n    }}\n    return {ident}_table[code];")

    def ram_bytes(self):
        return 0 if self.k == 0 else 4 + 2

    def ops(self):
        return ops(pixel_reads=self.k, additions=self.k, comparisons=self.k)
