"""constant: always the training majority (size 0). The floor every other rung is measured against."""

from __future__ import annotations

import numpy as np

from pixelfit.families._base import Family, IntegerModel, Model, figures, ops


class ConstantFamily(Family):
    name = "constant"
    description = "always the training majority"
    size_name = "size"
    title_format = "always the training majority"

    def size_text(self, size):
        return ""
    scored = False
    fixed_size = True

    def default_sizes(self, n_pixels):
        return [0]

    def make(self, size, n_pixels, seed):
        from pixelfit.models import ConstantRule

        return ConstantRule()

    def size_figures(self, est, size, n_pixels):
        return figures(1, log2_class_size=1.0)

    def section(self, est, shape):
        return {"label": bool(est.label_), "score": float(est.rate_)}

    def decode(self, m, shape):
        return ConstantModel(bool(m["label"]), float(m["score"]))


class ConstantModel(Model):
    scored = False

    def __init__(self, label: bool, score: float):
        self.label, self.score = label, score

    def decide(self, X):
        n = len(X)
        return np.full(n, self.score), np.full(n, self.label)

    def pixels_used(self):
        return []

    def explain(self, x, shape, threshold):
        return {"kind": "constant", "note": "reads no pixel: every patch gets the same score, the training "
                                            "share of the positive class"}

    def integer(self, threshold=None):
        return ConstantInteger(self.label if threshold is None else self.score > threshold)


class ConstantInteger(IntegerModel):
    def __init__(self, label: bool):
        self.label = bool(label)
        self.tables, self.facts = [], {}

    def predict(self, X):
        return np.full(len(X), self.label)

    def c_code(self, ident, P):
        return f"    (void)patch;\n    return {int(self.label)};"

    def ram_bytes(self):
        return 0

    def ops(self):
        return ops()
