"""memorize: a truth table over the whole patch (every training pattern and its majority label)."""

from __future__ import annotations

import math

import numpy as np

from pixelfit.errors import RuleFileError
from pixelfit.families._base import CTable, Family, IntegerModel, Model, array, bits, figures, ops


class MemorizeFamily(Family):
    name = "memorize"
    description = "truth table over the whole patch"
    size_name = "pixels"
    title_format = "truth table over the whole patch ({n})"
    fixed_size = True

    def default_sizes(self, n_pixels):
        return [n_pixels]

    def make(self, size, n_pixels, seed):
        from pixelfit.models import MemorizeRule

        return MemorizeRule()

    def size_figures(self, est, size, n_pixels):
        from pixelfit.models import log2_memorize_class

        return figures(len(est.patterns_), log2_class_size=log2_memorize_class(n_pixels))

    def section(self, est, shape):
        cn, cp = est.counts_[:, 0], est.counts_[:, 1]
        return {"patterns": [row.tobytes().hex() for row in est.patterns_], "labels": [int(v) for v in cp > cn],
                "scores": [float(v) for v in cp / np.maximum(cp + cn, 1)],
                "counts": [[int(n), int(p)] for n, p in zip(cn, cp)], "default_label": bool(est.default_),
                "default_score": float(est.prior_),
                "packing": "each pattern is the row-major patch packed 8 pixels a byte, first pixel in the high bit"}

    def decode(self, m, shape):
        n_pixels = shape[0] * shape[1]
        n_bytes = -(-n_pixels // 8)
        pats = m["patterns"]
        bad = [i for i, s in enumerate(pats) if len(s) != 2 * n_bytes]
        if bad:
            raise RuleFileError(f"model/patterns/{bad[0]}: expected {2 * n_bytes} hex digits for a "
                                f"{shape[0]}x{shape[1]} patch")
        n = len(pats)
        labels = array(m["labels"], "model/labels", (n,), np.int64).astype(bool)
        scores = array(m["scores"], "model/scores", (n,))
        keys = [bytes.fromhex(s) for s in pats]
        if len(set(keys)) != n:
            raise RuleFileError("model/patterns: a pattern is listed twice")
        counts = None if m.get("counts") is None else array(m["counts"], "model/counts", (n, 2), np.int64)
        order = sorted(range(n), key=lambda i: keys[i])  # sorted, for a binary search in C
        # one buffer, not a Python int per byte (a 750,000-pattern rule took over a gigabyte that way)
        packed = np.frombuffer(b"".join(keys[i] for i in order), np.uint8).reshape(n, n_bytes).astype(np.int64)
        model = MemorizeModel(n_pixels, packed, labels[order], scores[order], bool(m["default_label"]),
                              float(m["default_score"]))
        model.counts = None if counts is None else counts[order]
        return model


def _lookup(X: np.ndarray, index: dict[bytes, int]) -> np.ndarray:
    packed = np.packbits(bits(X), axis=1)
    return np.array([index.get(row.tobytes(), -1) for row in packed], dtype=np.intp)


class MemorizeModel(Model):
    def __init__(self, n_pixels, patterns, labels, scores, default_label, default_score):
        self.n_pixels, self.patterns, self.labels, self.scores = n_pixels, patterns, labels, scores
        self.default_label, self.default_score = default_label, default_score
        rows = np.ascontiguousarray(patterns, dtype=np.uint8)
        self.index = {rows[i].tobytes(): i for i in range(len(rows))}
        #: training patches (negative, positive) per pattern, in the order of ``patterns``; None if not recorded
        self.counts: np.ndarray | None = None

    def decide(self, X):
        idx = _lookup(X, self.index)
        seen = idx >= 0
        return (np.where(seen, self.scores[idx], self.default_score),
                np.where(seen, self.labels[idx], self.default_label))

    def pixels_used(self):
        return None

    def explain(self, x, shape, threshold):
        i = int(_lookup(np.asarray(x, bool).reshape(1, -1), self.index)[0])
        if i < 0:
            return {"kind": "memorized patterns", "seen": False, "label": bool(self.default_label),
                    "score": float(self.default_score), "negative": None, "positive": None,
                    "note": "this exact pattern was not among the training patches: the default (majority) "
                            "label and the training share of the positive class"}
        c = self.counts
        return {"kind": "memorized patterns", "seen": True, "label": bool(self.labels[i]),
                "score": float(self.scores[i]), "negative": None if c is None else int(c[i, 0]),
                "positive": None if c is None else int(c[i, 1]),
                "note": "this exact pattern was seen in training; the counts are the training patches of each "
                        "class with it" + ("" if c is not None else " (not recorded in this rule file)")}

    def integer(self, threshold=None):
        if threshold is None:
            return MemorizeInteger(self.n_pixels, self.patterns, self.labels, self.default_label, self.index)
        return MemorizeInteger(self.n_pixels, self.patterns, self.scores > threshold,
                               self.default_score > threshold, self.index)


class MemorizeInteger(IntegerModel):
    """Sorted packed patterns searched by bisection, their 0/1 answers, a default: exact."""

    def __init__(self, n_pixels, patterns, labels, default_label, index):
        self.n_pixels, self.patterns, self.labels = n_pixels, patterns, np.asarray(labels, bool)
        self.default_label, self.index = bool(default_label), index
        self.n, self.n_bytes = patterns.shape
        self.tables = [CTable("patterns", "uint8_t", patterns), CTable("labels", "uint8_t", self.labels.astype(np.int64))]
        self.facts = {}

    def predict(self, X):
        idx = _lookup(X, self.index)
        return np.where(idx >= 0, self.labels[idx], self.default_label)

    def c_code(self, ident, P):
        nb = self.n_bytes
        return (
            f"    uint8_t key[{nb}];\n    uint16_t i;\n    int32_t lo = 0, hi = {self.n - 1}, mid, cmp;\n"
            f"    for (i = 0u; i < {nb}u; ++i) {{\n        key[i] = 0u;\n    }}\n"
            f"    for (i = 0u; i < {P}_PIXELS; ++i) {{\n        if (patch[i] != 0u) {{\n"
            f"            key[i / 8u] |= (uint8_t)(0x80u >> (i % 8u));\n        }}\n    }}\n"
            f"    while (lo <= hi) {{\n        mid = lo + (hi - lo) / 2;\n        cmp = 0;\n"
            f"        for (i = 0u; i < {nb}u && cmp == 0; ++i) {{\n"
            f"            cmp = (int32_t){ident}_patterns[mid][i] - (int32_t)key[i];\n        }}\n"
            f"        if (cmp == 0) {{\n            return {ident}_labels[mid];\n        }}\n"
            f"        if (cmp < 0) {{\n            lo = mid + 1;\n        }} else {{\n            hi = mid - 1;\n        }}\n"
            f"    }}\n    return {int(self.default_label)};")

    def ram_bytes(self):
        return self.n_bytes + 2 + 4 * 4

    def ops(self):
        probes = math.floor(math.log2(self.n)) + 1 if self.n else 0
        # Packing: a test and an OR per pixel. Each probe: the midpoint (3), up to n_bytes byte
        # differences, each tested, then the tests of the result (3 with the loop's lo <= hi).
        return ops(pixel_reads=self.n_pixels, additions=self.n_pixels + probes * (self.n_bytes + 3),
                   comparisons=self.n_pixels + probes * (self.n_bytes + 3))
