"""What every model family provides, and the numpy-only helpers the families share.

A family has two sides. The *trained* side turns a size into an unfitted estimator and reads a
fitted one (size figures, importance, the rule file's ``model`` section); it imports
scikit-learn only inside its methods. The *file* side (:class:`Model`) is decoded from a rule
file's ``model`` section with numpy alone: it predicts, names the pixels it reads, and gives the
:class:`IntegerModel` that ships to firmware (fixed-point arithmetic, its C tables and code, and
its exact cost). Importing this package never loads scikit-learn.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass

import numpy as np

from pixelfit.errors import RuleFileError

INT16_MAX = 2**15 - 1
INT32_MIN, INT32_MAX = -(2**31), 2**31 - 1

#: Bytes of each C type the export uses.
C_BYTES = {"uint8_t": 1, "int8_t": 1, "uint16_t": 2, "int16_t": 2, "uint32_t": 4, "int32_t": 4}


def figures(parameters: int, log2_class_size: float | None = None, vc_dim: int | None = None) -> dict:
    """The size figures of a fitted rung: parameters, log2 |H| where finite, VC dimension."""
    return {"parameters": int(parameters), "log2_class_size": log2_class_size, "vc_dim": vc_dim}


def powers_of_two_up_to(limit: int) -> list[int]:
    """1, 2, 4, ... below ``limit``, then ``limit`` itself."""
    sizes = [1]
    while sizes[-1] * 2 < limit:
        sizes.append(sizes[-1] * 2)
    return sorted(set(sizes + [limit]))


def rc(i, w: int) -> list[int]:
    """Flat pixel index -> [row, column]."""
    return [int(i) // w, int(i) % w]


def flat_pixels(pixels, shape: tuple[int, int], field: str) -> np.ndarray:
    """[[row, column], ...] from a rule file -> flat indices, each inside the patch and listed once."""
    h, w = shape
    out = []
    for j, (r, c) in enumerate(pixels):
        if not (0 <= r < h and 0 <= c < w):
            raise RuleFileError(f"{field}/{j}: pixel ({r}, {c}) is outside the {h}x{w} patch")
        out.append(r * w + c)
    if len(set(out)) != len(out):
        raise RuleFileError(f"{field}: a pixel is listed twice")
    return np.asarray(out, dtype=np.intp)


def array(value, field: str, shape: tuple | None = None, dtype=np.float64) -> np.ndarray:
    """A rule-file list as an array of the expected shape, finite."""
    try:
        arr = np.asarray(value, dtype=dtype)
    except (ValueError, TypeError):
        raise RuleFileError(f"{field}: not a regular array of numbers") from None
    except OverflowError:
        raise RuleFileError(f"{field}: a number too large for this field") from None
    if shape is not None and arr.shape != shape:
        raise RuleFileError(f"{field}: expected shape {list(shape)}, found {list(arr.shape)}")
    if arr.dtype.kind == "f" and not np.isfinite(arr).all():
        raise RuleFileError(f"{field}: holds NaN or infinity")
    return arr


def bits(X: np.ndarray) -> np.ndarray:
    return np.asarray(X).astype(bool)


# ---------------------------------------------------------------------------------------------
# C text


def c_type_for(values: np.ndarray, signed: bool = True) -> str:
    """The narrowest of int16/int32 (signed) or uint8/uint16 (unsigned) holding every value."""
    lo = int(values.min()) if values.size else 0
    hi = int(values.max()) if values.size else 0
    if signed:
        return "int16_t" if -(2**15) <= lo and hi < 2**15 else "int32_t"
    return "uint8_t" if hi < 2**8 else "uint16_t" if hi < 2**16 else "uint32_t"


@dataclass(frozen=True)
class CTable:
    """One ``static const`` object of the exported header: a scalar, a vector or a matrix.

    An empty vector is written with one 0 (C has no empty arrays); ``nbytes`` counts it, as
    ``sizeof`` does.
    """

    name: str
    ctype: str
    values: np.ndarray

    @property
    def dims(self) -> tuple[int, ...]:
        return tuple(max(1, d) for d in self.values.shape)

    @property
    def nbytes(self) -> int:
        return C_BYTES[self.ctype] * math.prod(self.dims)

    def declaration(self, ident: str) -> str:
        v = np.asarray(self.values, dtype=np.int64)
        if v.ndim == 0:
            return f"static const {self.ctype} {ident}_{self.name} = {_lit(int(v), self.ctype)};"
        dims = "".join(f"[{d}]" for d in self.dims)
        if v.ndim == 1:
            body = _rows([_lit(int(x), self.ctype) for x in v] or ["0"])
        else:
            rows = v if len(v) else np.zeros((1, v.shape[1]), np.int64)
            body = ",\n".join("    {" + (", ".join(_lit(int(x), self.ctype) for x in row) or "0") + "}"
                              for row in rows)
        return f"static const {self.ctype} {ident}_{self.name}{dims} = {{\n{body}\n}};"


def _lit(x: int, ctype: str) -> str:
    # INT32_MIN has no literal of its own in C: write it as an expression.
    if ctype == "int32_t" and x == INT32_MIN:
        return "(-2147483647 - 1)"
    return str(x)


def _rows(vals: list[str], per_line: int = 16) -> str:
    lines = [", ".join(vals[i : i + per_line]) for i in range(0, len(vals), per_line)]
    return "    " + ",\n    ".join(lines)


def ops(pixel_reads: int = 0, additions: int = 0, multiplications: int = 0, comparisons: int = 0) -> dict:
    """Worst-case operations of one prediction; see DEVELOPERS.md "Firmware cost" for what counts."""
    counts = {"pixel_reads": int(pixel_reads), "additions": int(additions),
              "multiplications": int(multiplications), "comparisons": int(comparisons)}
    return {**counts, "total": sum(counts.values())}


# ---------------------------------------------------------------------------------------------
# fixed point


def _logit(t: float) -> float:
    return math.log(t) - math.log1p(-t)


def quantize_threshold(threshold: float | None, frac_bits: int) -> int:
    """The integer decision threshold of a score ``sigmoid(z)``, where z is held as ``q / 2**frac_bits``.

    Positive when the accumulator ``q >= t``, which is pixelfit's one decision rule, score > T, in
    fixed point: ``q > logit(T) * 2**frac_bits``, so ``t = floor(logit(T) * 2**frac_bits) + 1``,
    clipped to int32. Without a threshold, the default decision z > 0 is ``q >= 1`` (the same as T = 0.5).
    """
    if threshold is None:
        return 1
    if threshold <= 0:
        return INT32_MIN
    if threshold >= 1:
        return INT32_MAX
    t = math.floor(_logit(threshold) * 2.0**frac_bits) + 1
    return int(min(max(t, INT32_MIN), INT32_MAX))


def choose_frac_bits(weights: np.ndarray, bias: np.ndarray, in_max: float = 1.0, max_bits: int = 30) -> int:
    """Fraction bits for int16 weights with an int32 accumulator that cannot overflow.

    The largest power of two 2**f with every ``|w| * 2**f`` within int16, and for every output
    ``|b| * 2**f + in_max * sum |w| * 2**f`` within int32 (``in_max``: the largest input).
    """
    w = np.abs(np.asarray(weights, np.float64))
    b = np.abs(np.asarray(bias, np.float64))
    top = float(w.max()) if w.size else 0.0
    f = max_bits if top == 0 else min(max_bits, math.floor(math.log2(INT16_MAX / top)))
    while f > -64:
        wq = np.abs(np.round(w * 2.0**f))
        colq = wq.sum(axis=0) if w.ndim == 2 else wq.sum(keepdims=True)
        worst = np.abs(np.round(b * 2.0**f)) + in_max * colq + 1
        if wq.max(initial=0) <= INT16_MAX and float(np.max(worst, initial=0)) <= INT32_MAX:
            return f
        f -= 1
    raise RuleFileError("weights too large for a 32-bit fixed-point predictor")


def fixed(values, frac_bits: int, dtype=np.int64) -> np.ndarray:
    """round(values * 2**frac_bits) as integers."""
    return np.round(np.asarray(values, np.float64) * 2.0**frac_bits).astype(dtype)


# ---------------------------------------------------------------------------------------------
# the interfaces


class IntegerModel(ABC):
    """The predictor that ships: integers only, the same arithmetic in numpy and in C.

    Attributes
    ----------
    tables : list of CTable
        Every ``static const`` object of the header, in order.
    facts : dict
        Fixed-point facts for the rule file and the header comment (``{}`` for exact families).
    """

    tables: list[CTable]
    facts: dict

    @abstractmethod
    def predict(self, X: np.ndarray) -> np.ndarray:
        """True where the patch is called positive; X of shape (n, n_pixels), 0/1."""

    @abstractmethod
    def c_code(self, ident: str, P: str) -> str:
        """The body of ``<ident>_predict(const uint8_t patch[P_PIXELS])``."""

    @abstractmethod
    def ram_bytes(self) -> int:
        """Bytes of the predict function's local variables, as declared."""

    @abstractmethod
    def ops(self) -> dict:
        """Worst-case operations of one prediction: pixel_reads, additions, multiplications, comparisons."""

    def cost(self) -> dict:
        """{'flash_bytes', 'ram_bytes', 'ops'} of this predictor as the C export lays it out."""
        return {"flash_bytes": sum(t.nbytes for t in self.tables), "ram_bytes": int(self.ram_bytes()),
                "ops": self.ops()}


class Model(ABC):
    """A family's ``model`` section decoded into arrays; predicts with numpy alone."""

    scored: bool = True

    @abstractmethod
    def decide(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(score, label) per patch of 0/1 rows X (n, n_pixels), in floating point."""

    @abstractmethod
    def pixels_used(self) -> list[int] | None:
        """Flat indices the model reads; None when it reads the whole patch."""

    @abstractmethod
    def integer(self, threshold: float | None = None) -> IntegerModel:
        """The integer-only predictor at ``threshold`` (call positive when score > it; None: the
        model's own decision)."""

    def explain(self, x: np.ndarray, shape: tuple[int, int], threshold: float) -> dict:
        """Why the model scores one patch as it does, as plain JSON-ready data.

        x : ndarray of shape (n_pixels,), bool. Every family gives at least ``kind``; the default
        is the one-pixel sensitivity (see :func:`flip_sensitivity`).
        """
        return flip_sensitivity(self, x, shape, threshold)


#: Most pixels listed by a one-pixel sensitivity (the flips that change the call are all listed).
MAX_SENSITIVE = 10


def flip_sensitivity(model: Model, x: np.ndarray, shape: tuple[int, int], threshold: float) -> dict:
    """Score of the patch with each single pixel flipped: the flips that change the call (score >
    ``threshold`` or not), and the pixels that move the score most, largest change first."""
    x = np.asarray(x, bool).reshape(-1)
    flipped = np.repeat(x[None, :], len(x), axis=0)
    idx = np.arange(len(x))
    flipped[idx, idx] = ~flipped[idx, idx]
    base = float(model.decide(x[None, :])[0][0])
    scores = model.decide(flipped)[0].astype(np.float64)
    change = scores - base
    order = np.argsort(-np.abs(change), kind="stable")
    w = shape[1]

    def entry(i) -> dict:
        return {"pixel": rc(i, w), "value": int(x[i]), "score_if_flipped": float(scores[i]),
                "change": float(change[i])}

    changes_call = [entry(i) for i in order if (scores[i] > threshold) != (base > threshold)]
    return {"kind": "sensitivity", "flips_that_change_call": changes_call,
            "most_sensitive": [entry(i) for i in order[:MAX_SENSITIVE] if change[i] != 0]}


def linear_explanation(pixels: np.ndarray, weights: np.ndarray, bias: float, x: np.ndarray,
                       shape: tuple[int, int], threshold: float) -> dict:
    """A weighted vote ``z = bias + sum of weights[j] * x[pixels[j]]``, score = sigmoid(z): each read
    pixel's contribution (its weight when lit, 0 when dark), largest magnitude first."""
    x = np.asarray(x, bool).reshape(-1)
    vals = x[pixels].astype(np.float64)
    contrib = vals * weights
    order = np.argsort(-np.abs(contrib), kind="stable")
    w = shape[1]
    rows = [{"pixel": rc(pixels[j], w), "value": int(vals[j]), "weight": float(weights[j]),
             "contribution": float(contrib[j])} for j in order]
    z = float(bias + contrib.sum())
    return {"kind": "linear", "contributions": rows, "bias": float(bias), "log_odds": z,
            "threshold_log_odds": None if not 0 < threshold < 1 else float(math.log(threshold / (1 - threshold))),
            "note": "score = 1 / (1 + exp(-(bias + sum of contributions))); a dark pixel contributes 0"}


class Family(ABC):
    """One model family of the ladder: its size axis, its estimator, and how it is written.

    Subclasses set the class attributes and implement the methods; one module per family.
    """

    name: str = ""
    description: str = ""
    size_name: str = "size"
    #: whether the family gives a graded score (a probability) rather than a hard label only
    scored: bool = True
    #: one rung only (constant, memorize)
    fixed_size: bool = False
    #: the size counts pixels, so it cannot exceed the pixels of a patch
    sized_in_pixels: bool = False
    #: the family and its size in words; ``{n}`` is replaced by :meth:`size_text`
    title_format: str = "{n}"
    #: what the family's own per-pixel map shows (``native_importance``); None where it has none
    map_name: str | None = None

    def size_text(self, size: int) -> str:
        """The size in words: '1 pixel', '3 pixels', '8 hidden units'; '' for a family without a size."""
        unit = self.size_name[:-1] if size == 1 and self.size_name.endswith("s") else self.size_name
        return f"{size} {unit}"

    def sizes_text(self, sizes: list[int]) -> str:
        """Several sizes in words: '1, 2, 4 pixels'."""
        return f"{', '.join(map(str, sizes))} {self.size_name}"

    def title(self, size: int) -> str:
        """The rung in words, such as 'decision tree of depth 4'."""
        return self.title_format.format(n=self.size_text(size))

    # -- the trained side (scikit-learn is imported inside these methods only) ----------------

    @abstractmethod
    def default_sizes(self, n_pixels: int) -> list[int]:
        """The sizes tried by default on patches of ``n_pixels`` pixels."""

    @abstractmethod
    def make(self, size: int, n_pixels: int, seed: int):
        """An unfitted scikit-learn compatible estimator of this size."""

    @abstractmethod
    def size_figures(self, est, size: int, n_pixels: int) -> dict:
        """Parameters, log2 class size (finite classes) and VC dimension of a fitted estimator."""

    @abstractmethod
    def section(self, est, shape: tuple[int, int]) -> dict:
        """The family's own fields of the rule file's ``model`` section."""

    def native_importance(self, est, X: np.ndarray, y: np.ndarray, shape: tuple[int, int]) -> np.ndarray | None:
        """The family's own per-pixel importance, of shape ``shape``; None where it has none."""
        return None

    def search_facts(self, est) -> dict | None:
        """How the fitted rung was searched, where the family searches (lut)."""
        return None

    def model_section(self, est, size: int, shape: tuple[int, int]) -> dict:
        """Everything needed to predict, for one fitted estimator of this family."""
        return {"family": self.name, "size": int(size), **self.section(est, shape)}

    # -- the file side (numpy only) -------------------------------------------------------------

    @abstractmethod
    def decode(self, m: dict, shape: tuple[int, int]) -> Model:
        """Build the :class:`Model` from a schema-valid ``model`` section, checking what the
        schema cannot (shapes, ranges); raises RuleFileError naming the field."""


class SparseLinearInteger(IntegerModel):
    """A weighted vote of k pixels in fixed point: ``acc = bias + sum of weight[j] over lit
    pixels[j]``, positive when ``acc >= threshold``. Weights int16, bias and threshold int32, all
    holding ``value * 2**frac_bits``; the accumulator cannot overflow int32 (see
    :func:`choose_frac_bits`). Used by the linear families (nb, logistic).
    """

    def __init__(self, pixels: np.ndarray, weights: np.ndarray, bias: float, threshold: float | None,
                 n_pixels: int):
        self.pixels = np.asarray(pixels, np.intp)
        f = choose_frac_bits(weights, np.array([bias]))
        self.frac_bits = f
        self.w = fixed(weights, f)
        self.b = int(fixed(bias, f))
        self.t = quantize_threshold(threshold, f)
        k = len(self.pixels)
        self.tables = [CTable("pixels", c_type_for(self.pixels, signed=False), self.pixels),
                       CTable("weights", "int16_t", self.w), CTable("bias", "int32_t", np.array(self.b)),
                       CTable("threshold", "int32_t", np.array(self.t))]
        self.k = k
        self.facts = {"weights": "int16", "accumulator": "int32", "frac_bits": f,
                      "meaning": f"a stored integer q stands for q / 2^{f}",
                      "threshold_q": self.t}

    def predict(self, X: np.ndarray) -> np.ndarray:
        acc = self.b + bits(X)[:, self.pixels].astype(np.int64) @ self.w
        return acc >= self.t

    def c_code(self, ident: str, P: str) -> str:
        if self.k == 0:
            return f"    (void)patch;\n    return {ident}_bias >= {ident}_threshold ? 1 : 0;"
        return (f"    int32_t acc = {ident}_bias;\n    uint16_t j;\n"
                f"    for (j = 0u; j < {self.k}u; ++j) {{\n        if (patch[{ident}_pixels[j]] != 0u) {{\n"
                f"            acc += {ident}_weights[j];\n        }}\n    }}\n"
                f"    return acc >= {ident}_threshold ? 1 : 0;")

    def ram_bytes(self) -> int:
        return 4 + 2

    def ops(self) -> dict:
        return ops(pixel_reads=self.k, additions=self.k, comparisons=self.k + 1)
