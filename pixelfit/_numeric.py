"""Small numeric functions shared by fitted models and rule files (numpy only)."""

from __future__ import annotations

import numpy as np


def sigmoid(z: np.ndarray) -> np.ndarray:
    """The logistic function, without overflow for large |z|."""
    z = np.asarray(z, dtype=np.float64)
    out = np.empty_like(z)
    pos = z >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-z[pos]))
    ez = np.exp(z[~pos])
    out[~pos] = ez / (1.0 + ez)
    return out


def linear_decision(X: np.ndarray, coef: np.ndarray, bias: float) -> np.ndarray:
    """X @ coef + bias for 0/1 patches X (n, p) and weights coef (p,): the one way both the fitted
    model and its rule file compute it, so their decisions agree to the bit."""
    return (np.asarray(X, dtype=np.float64) @ np.asarray(coef, dtype=np.float64).reshape(-1, 1)).ravel() + bias
