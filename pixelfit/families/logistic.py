"""logistic: logistic regression on the k pixels the lasso path picks first (see models.SparseLogistic)."""

from __future__ import annotations

import math

import numpy as np

from pixelfit._numeric import linear_decision, sigmoid
from pixelfit.errors import RuleFileError
from pixelfit.families._base import (
    Family,
    Model,
    SparseLinearInteger,
    array,
    bits,
    figures,
    linear_explanation,
    powers_of_two_up_to,
)


class LogisticFamily(Family):
    name = "logistic"
    description = "logistic regression on the k pixels the lasso path picks first"
    size_name = "pixels"
    title_format = "logistic regression on {n} picked by the lasso path"
    map_name = "weight of each pixel"
    sized_in_pixels = True

    def default_sizes(self, n_pixels):
        return powers_of_two_up_to(n_pixels)

    def make(self, size, n_pixels, seed):
        from pixelfit.models import SparseLogistic

        return SparseLogistic(k=size)

    def size_figures(self, est, size, n_pixels):
        k = int(est.n_nonzero_)
        return figures(k + 1, vc_dim=k + 1)

    def section(self, est, shape):
        return {"weights": est.coef_.reshape(shape).astype(float).tolist(), "bias": float(est.intercept_[0])}

    def native_importance(self, est, X, y, shape):
        return est.coef_.ravel().astype(np.float64).reshape(shape)

    def decode(self, m, shape):
        coef = array(m["weights"], "model/weights", shape).reshape(-1)
        bias = float(m["bias"])
        if not math.isfinite(bias):
            raise RuleFileError("model/bias: not a finite number")
        return LogisticModel(coef, bias)


class LogisticModel(Model):
    def __init__(self, coef: np.ndarray, bias: float):
        self.coef, self.bias = coef, bias

    def decide(self, X):
        z = linear_decision(bits(X), self.coef, self.bias)
        return sigmoid(z), z > 0

    def pixels_used(self):
        return [int(i) for i in np.flatnonzero(self.coef)]

    def explain(self, x, shape, threshold):
        used = np.flatnonzero(self.coef)
        return linear_explanation(used, self.coef[used], self.bias, x, shape, threshold)

    def integer(self, threshold=None):
        used = np.flatnonzero(self.coef)
        return SparseLinearInteger(used, self.coef[used], self.bias, threshold, len(self.coef))
