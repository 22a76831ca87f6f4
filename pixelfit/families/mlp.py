"""mlp: one hidden layer of h units (scikit-learn's MLPClassifier, lbfgs, relu)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from pixelfit._numeric import sigmoid
from pixelfit.errors import RuleFileError
from pixelfit.families._base import (
    INT16_MAX,
    CTable,
    Family,
    IntegerModel,
    Model,
    array,
    bits,
    choose_frac_bits,
    fixed,
    ops,
    quantize_threshold,
)

ACTIVATIONS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "relu": lambda a: np.maximum(a, 0),
    "tanh": np.tanh,
    "logistic": sigmoid,
    "identity": lambda a: a,
}
#: Hidden activations the integer-only predictor computes exactly in fixed point.
INTEGER_ACTIVATIONS = ("relu", "identity")


class MlpFamily(Family):
    name = "mlp"
    description = "one hidden layer of h units"
    size_name = "hidden units"
    title_format = "neural network with one hidden layer of {n}"

    def default_sizes(self, n_pixels):
        return [1, 2, 4, 8, 16, 32, 64]

    def make(self, size, n_pixels, seed):
        from sklearn.neural_network import MLPClassifier

        return MLPClassifier(hidden_layer_sizes=(size,), solver="lbfgs", max_iter=400, alpha=1e-3, random_state=seed)

    def size_figures(self, est, size, n_pixels):
        from pixelfit.families._base import figures

        return figures(sum(c.size for c in est.coefs_) + sum(b.size for b in est.intercepts_))

    def section(self, est, shape):
        return {"activation": est.activation,
                "layers": [{"weights": W.astype(float).tolist(), "bias": b.astype(float).tolist()}
                           for W, b in zip(est.coefs_, est.intercepts_)],
                "output": "logistic; positive when the output exceeds 0.5"}

    def decode(self, m, shape):
        layers = []
        width = shape[0] * shape[1]
        for i, layer in enumerate(m["layers"]):
            W = array(layer["weights"], f"model/layers/{i}/weights")
            if W.ndim != 2 or W.shape[0] != width:
                raise RuleFileError(f"model/layers/{i}/weights: expected {width} rows, found shape {list(W.shape)}")
            b = array(layer["bias"], f"model/layers/{i}/bias", (W.shape[1],))
            layers.append((W, b))
            width = W.shape[1]
        if width != 1:
            raise RuleFileError(f"model/layers: the last layer must have 1 output, it has {width}")
        return MlpModel(m["activation"], layers)


class MlpModel(Model):
    def __init__(self, activation: str, layers: list[tuple[np.ndarray, np.ndarray]]):
        self.activation, self.layers = activation, layers

    def decide(self, X):
        a = bits(X).astype(np.float64)
        for i, (W, b) in enumerate(self.layers):
            a = a @ W + b
            if i < len(self.layers) - 1:
                a = ACTIVATIONS[self.activation](a)
        proba = sigmoid(a[:, 0])
        return proba, proba > 0.5

    def pixels_used(self):
        return None

    def integer(self, threshold=None):
        return MlpInteger(self.activation, self.layers, threshold)


def _shift(a: np.ndarray, r: int) -> np.ndarray:
    """a / 2**r truncated toward zero, as C's integer division does."""
    return np.sign(a) * (np.abs(a) >> r) if r else a


class MlpInteger(IntegerModel):
    """Every layer in fixed point: int16 weights, int32 biases and accumulators.

    Layer l holds weights ``round(W * 2**f_l)`` and biases at the scale of its accumulator. A
    hidden unit is relu (or identity) of its int32 accumulator, divided by ``2**r`` (a shift) so
    that its worst case fits int16; ``f_l`` and ``r`` are chosen from the worst case over all
    inputs, so no accumulator can overflow. The output accumulator holds the pre-sigmoid value
    ``z * 2**e``; positive when it is at least the threshold ``floor(logit(T) * 2**e) + 1`` (score > T) (default: z > 0).
    """

    def __init__(self, activation: str, layers: list[tuple[np.ndarray, np.ndarray]], threshold: float | None):
        if len(layers) > 1 and activation not in INTEGER_ACTIVATIONS:
            raise RuleFileError(f"model/activation: the integer-only predictor computes "
                                f"{' and '.join(INTEGER_ACTIVATIONS)} hidden units, not {activation}")
        self.activation = activation
        self.W: list[np.ndarray] = []
        self.b: list[np.ndarray] = []
        self.shifts: list[int] = []
        facts_layers = []
        e, in_max = 0, 1  # the inputs are 0/1 pixels: scale 2**0
        for li, (W, b) in enumerate(layers):
            bias = np.asarray(b, np.float64) * 2.0**e
            f = choose_frac_bits(W, bias, in_max=in_max)
            Wq, bq = fixed(W, f), fixed(bias, f)
            self.W.append(Wq)
            self.b.append(bq)
            e += f
            layer = {"frac_bits": f}
            if li < len(layers) - 1:
                worst = int((np.abs(bq) + in_max * np.abs(Wq).sum(axis=0)).max(initial=0))
                r = 0
                while (worst >> r) > INT16_MAX:
                    r += 1
                self.shifts.append(r)
                e -= r
                in_max = max(1, worst >> r)
                layer["shift"] = r
            facts_layers.append(layer)
        self.out_frac_bits = e
        self.t = quantize_threshold(threshold, e)
        self.tables = []
        for li, (Wq, bq) in enumerate(zip(self.W, self.b)):
            self.tables += [CTable(f"w{li}", "int16_t", Wq), CTable(f"b{li}", "int32_t", bq)]
        self.tables.append(CTable("threshold", "int32_t", np.array(self.t)))
        self.widths = [Wq.shape[1] for Wq in self.W]
        self.facts = {"weights": "int16", "accumulator": "int32", "layers": facts_layers,
                      "hidden": f"{activation} of the accumulator, divided by 2^shift",
                      "output_frac_bits": e, "meaning": "a stored integer q of layer l stands for q / 2^(its scale)",
                      "threshold_q": self.t}

    def predict(self, X):
        a = self.b[0] + bits(X).astype(np.int64) @ self.W[0]
        for li in range(1, len(self.W)):
            h = np.maximum(a, 0) if self.activation == "relu" else a
            h = _shift(h, self.shifts[li - 1])
            a = self.b[li] + h @ self.W[li]
        return a[:, 0] >= self.t

    def _hidden(self, ident: str, n: int, r: int) -> str:
        value = "a[j] > 0 ? a[j] : 0" if self.activation == "relu" else "a[j]"
        scaled = f"({value}) / {2**r}" if r else f"{value}"
        return f"    for (j = 0u; j < {n}u; ++j) {{\n        h[j] = {scaled};\n    }}"

    def c_code(self, ident, P):
        widest = max(self.widths)
        lines = [f"    int32_t a[{widest}];"]
        if len(self.W) > 1:
            lines.append(f"    int32_t h[{max(self.widths[:-1])}];")
        lines.append("    uint16_t i, j;")
        n0 = self.widths[0]
        lines.append(f"    for (j = 0u; j < {n0}u; ++j) {{\n        a[j] = {ident}_b0[j];\n    }}\n"
                     f"    for (i = 0u; i < {P}_PIXELS; ++i) {{\n        if (patch[i] != 0u) {{\n"
                     f"            for (j = 0u; j < {n0}u; ++j) {{\n                a[j] += {ident}_w0[i][j];\n"
                     f"            }}\n        }}\n    }}")
        for li in range(1, len(self.W)):
            lines.append(self._hidden(ident, self.widths[li - 1], self.shifts[li - 1]))
            n_in, n_out = self.W[li].shape
            lines.append(f"    for (j = 0u; j < {n_out}u; ++j) {{\n        a[j] = {ident}_b{li}[j];\n"
                         f"        for (i = 0u; i < {n_in}u; ++i) {{\n            a[j] += h[i] * {ident}_w{li}[i][j];\n"
                         f"        }}\n    }}")
        lines.append(f"    return a[0] >= {ident}_threshold ? 1 : 0;")
        return "\n".join(lines)

    def ram_bytes(self):
        hidden = max(self.widths[:-1]) if len(self.W) > 1 else 0
        return 4 * max(self.widths) + 4 * hidden + 2 + 2

    def ops(self):
        p, n0 = self.W[0].shape
        adds, mults, comps = p * n0, 0, p + 1
        for li in range(1, len(self.W)):
            n_in, n_out = self.W[li].shape
            adds += n_in * n_out
            mults += n_in * n_out
            comps += n_in if self.activation == "relu" else 0
            mults += n_in if self.shifts[li - 1] else 0  # the division by a power of two
        return ops(pixel_reads=p, additions=adds, multiplications=mults, comparisons=comps)
