"""Rule files: one JSON document per trained model, validated on load, predicted with numpy only.

A rule file can never run code: it is parsed as JSON (NaN and infinity refused), checked
against the shipped JSON Schema, then checked field by field (shapes, ranges, table lengths)
before a :class:`Rule` is built from plain arrays.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
from collections.abc import Callable
from importlib import resources
from pathlib import Path

import jsonschema
import numpy as np

from pixelfit import __version__
from pixelfit._atomic import write_json
from pixelfit._numeric import linear_decision, sigmoid
from pixelfit.conventions import BOUND_CONVENTION, UNDEFINED_CONVENTION
from pixelfit.data import Binarizer
from pixelfit.errors import RuleFileError

RULE_FORMAT = "pixelfit-rule"
RULE_VERSION = 1
#: Rule files larger than this are refused before being read.
MAX_RULE_BYTES = 64 * 1024 * 1024
#: Deepest JSON nesting accepted (a valid rule file needs 5).
MAX_DEPTH = 32

CAUTION = ("A rule learned by pixelfit is evidence, not certification: its scores describe the patches it "
           "was trained and tested on. Validate it on your own line data, and where a wrong call can hurt "
           "someone, defer to the applicable inspection standards and qualified sign-off.")


def schema() -> dict:
    """The JSON Schema (draft 2020-12) of rule files, as shipped in the package."""
    text = resources.files("pixelfit.rulefile").joinpath("rule-v1.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


_VALIDATOR = None


def _validator():
    global _VALIDATOR
    if _VALIDATOR is None:
        s = schema()
        _VALIDATOR = jsonschema.Draft202012Validator(s)
    return _VALIDATOR


# ---------------------------------------------------------------------------------------------
# building a document from a trained rung


def _rc(i, w: int) -> list[int]:
    return [int(i) // w, int(i) % w]


def model_section(family: str, size: int, est, shape: tuple[int, int]) -> dict:
    """Everything needed to predict, for one fitted estimator of the ladder."""
    h, w = shape
    p = h * w
    m: dict = {"family": family, "size": int(size)}
    if family == "constant":
        m.update(label=bool(est.label_), score=float(est.rate_))
    elif family == "lut":
        m.update(pixels=[_rc(i, w) for i in est.pixels_], table=[int(v) for v in est.table_],
                 scores=[float(v) for v in est.rate_],
                 bit_order="bit j of a pattern code is the value of the j-th listed pixel")
    elif family == "memorize":
        cn, cp = est.counts_[:, 0], est.counts_[:, 1]
        m.update(patterns=[row.tobytes().hex() for row in est.patterns_], labels=[int(v) for v in cp > cn],
                 scores=[float(v) for v in cp / np.maximum(cp + cn, 1)], default_label=bool(est.default_),
                 default_score=float(est.prior_),
                 packing="each pattern is the row-major patch packed 8 pixels a byte, first pixel in the high bit")
    elif family == "nb":
        sel = np.flatnonzero(est.named_steps["select"].get_support())
        nb = est.named_steps["nb"]
        lp = nb.feature_log_prob_
        off = np.log(1 - np.exp(lp))
        weights = np.zeros(p)
        weights[sel] = (lp[1] - off[1]) - (lp[0] - off[0])
        m.update(pixels=[_rc(i, w) for i in sel], class_log_prior=[float(v) for v in nb.class_log_prior_],
                 log_prob_on=[[float(v) for v in row] for row in lp],
                 weights=weights.reshape(shape).tolist(),
                 bias=float(nb.class_log_prior_[1] - nb.class_log_prior_[0] + off[1].sum() - off[0].sum()))
    elif family == "logistic":
        m.update(weights=est.coef_.reshape(shape).astype(float).tolist(), bias=float(est.intercept_[0]))
    elif family == "tree":
        t = est.tree_
        nodes = []
        for i in range(t.node_count):
            leaf = t.children_left[i] == -1
            v = t.value[i][0]
            frac = float(v[1] / v.sum()) if v.sum() > 0 else 0.0
            nodes.append({"pixel": None if leaf else _rc(t.feature[i], w), "left": int(t.children_left[i]),
                          "right": int(t.children_right[i]), "label": int(v[1] > v[0]), "score": frac})
        m.update(nodes=nodes, branch="go to 'left' when the pixel is 0, to 'right' when it is 1")
    elif family == "mlp":
        m.update(activation=est.activation,
                 layers=[{"weights": W.astype(float).tolist(), "bias": b.astype(float).tolist()}
                         for W, b in zip(est.coefs_, est.intercepts_)],
                 output="logistic; positive when the output exceeds 0.5")
    else:
        raise RuleFileError(f"family {family!r} cannot be written to a rule file")
    return m


def rule_document(prep, rung, checks: dict | None = None) -> dict:
    """The rule-file document of one trained rung of a ladder.

    Parameters
    ----------
    prep : pixelfit.ladder.Prepared
    rung : pixelfit.ladder.Rung
    checks : dict or None
        The rung's ``bias_variance`` and ``stress`` figures (:meth:`pixelfit.robustness.Checks.rung_entry`),
        written as top-level fields of the same names when given.
    """
    doc = {
        "format": RULE_FORMAT,
        "schema_version": RULE_VERSION,
        "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "pixelfit_version": __version__,
        "patch_shape": list(prep.shape),
        "classes": {"positive": prep.positive, "negative": prep.negative},
        "binarize": prep.binarizer.to_dict(),
        "model": model_section(rung.family, rung.size, rung.estimator, prep.shape),
        "evaluation": {
            "train": rung.train, "cv": rung.cv, "test": rung.test, "search": rung.search,
            "parameters": rung.figures["parameters"], "log2_class_size": rung.figures["log2_class_size"],
            "vc_dim": rung.figures["vc_dim"], "bound": rung.bound, "bound_convention": BOUND_CONVENTION,
            "undefined_values": UNDEFINED_CONVENTION, "recommended": rung.recommended,
        },
        "training_data": {
            "fingerprint": prep.train_fingerprint,
            "fingerprint_of": "SHA-256 over the binarized training patches (bit-packed rows) and their labels",
            "source": prep.dataset.source, "n_train": int(len(prep.y_train)), "n_test": int(len(prep.y_test)),
            "split": {"test_fraction": prep.test_fraction, "seed": prep.seed, "presplit": prep.presplit,
                      "augment": getattr(prep, "augment", None)},
        },
        "caution": CAUTION,
    }
    if checks is not None:
        doc["bias_variance"] = checks.get("bias_variance")
        doc["stress"] = checks.get("stress")
    return doc


def save_rung(path: str | os.PathLike, prep, rung, checks: dict | None = None) -> Path:
    """Write the rule file of one rung atomically; returns the path (``checks``: see :func:`rule_document`)."""
    doc = rule_document(prep, rung, checks)
    parse_rule(doc)  # never write a file we would refuse to read
    return write_json(path, doc)


# ---------------------------------------------------------------------------------------------
# loading


def _refuse_constant(name: str):
    raise RuleFileError(f"the file holds {name}; rule files may only hold finite numbers")


def _depth(obj, limit: int) -> int:
    """Nesting depth of a parsed JSON value, stopping early past ``limit``."""
    stack = [(obj, 1)]
    deepest = 0
    while stack:
        o, d = stack.pop()
        deepest = max(deepest, d)
        if deepest > limit:
            return deepest
        if isinstance(o, dict):
            stack.extend((v, d + 1) for v in o.values())
        elif isinstance(o, list):
            stack.extend((v, d + 1) for v in o)
    return deepest


def _field(path) -> str:
    return "/".join(str(p) for p in path) or "(top level)"


def parse_rule(doc: str | bytes | dict) -> Rule:
    """Validate a rule document (JSON text or parsed) and build the :class:`Rule`.

    Raises
    ------
    RuleFileError
        Naming the field and the problem.
    """
    if isinstance(doc, (str, bytes, bytearray)):
        if len(doc) > MAX_RULE_BYTES:
            raise RuleFileError(f"rule file is {len(doc) / 1e6:.0f} MB; the limit is {MAX_RULE_BYTES / 1e6:.0f} MB")
        try:
            text = doc if isinstance(doc, str) else bytes(doc).decode("utf-8")
            doc = json.loads(text, parse_constant=_refuse_constant)
        except RuleFileError:
            raise
        except UnicodeDecodeError as exc:
            raise RuleFileError(f"not UTF-8 text (byte {exc.start})") from None
        except json.JSONDecodeError as exc:
            raise RuleFileError(f"invalid JSON at line {exc.lineno} column {exc.colno}: {exc.msg}") from None
        except RecursionError:  # the parser's own guard against absurd nesting
            raise RuleFileError(f"JSON nested deeper than {MAX_DEPTH} levels; not a rule file") from None
    if not isinstance(doc, dict):
        raise RuleFileError(f"a rule file is a JSON object, not {type(doc).__name__}")
    if _depth(doc, MAX_DEPTH) > MAX_DEPTH:
        raise RuleFileError(f"JSON nested deeper than {MAX_DEPTH} levels; not a rule file")
    fmt = doc.get("format")
    if fmt != RULE_FORMAT:
        raise RuleFileError(f"format: expected {RULE_FORMAT!r}, found {fmt!r}; not a pixelfit rule file")
    version = doc.get("schema_version")
    if isinstance(version, int) and not isinstance(version, bool) and version > RULE_VERSION:
        raise RuleFileError(f"schema_version: {version} is newer than this pixelfit reads ({RULE_VERSION}); "
                            "upgrade pixelfit")
    errors = sorted(_validator().iter_errors(doc), key=lambda e: (len(e.absolute_path), list(map(str, e.absolute_path))))
    if errors:
        e = min(errors, key=lambda e: len(list(e.absolute_path)) if e.validator != "if" else 99)
        raise RuleFileError(f"{_field(e.absolute_path)}: {e.message[:200]}")
    return Rule(doc)


def load_rule(path: str | os.PathLike) -> Rule:
    """Read and validate a rule file; see :func:`parse_rule`."""
    path = Path(path)
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise RuleFileError(f"{path}: cannot read ({exc.strerror or exc})") from None
    if not path.is_file():
        raise RuleFileError(f"{path}: not a file")
    if size > MAX_RULE_BYTES:
        raise RuleFileError(f"{path}: {size / 1e6:.0f} MB is larger than any rule file ({MAX_RULE_BYTES / 1e6:.0f} MB limit)")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise RuleFileError(f"{path}: cannot read ({exc.strerror or exc})") from None
    try:
        return parse_rule(data)
    except RuleFileError as exc:
        raise RuleFileError(f"{path}: {exc}") from None


def _array(value, field: str, shape: tuple | None = None, dtype=np.float64) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=dtype)
    except (ValueError, TypeError):
        raise RuleFileError(f"{field}: not a regular array of numbers") from None
    if shape is not None and arr.shape != shape:
        raise RuleFileError(f"{field}: expected shape {list(shape)}, found {list(arr.shape)}")
    if arr.dtype.kind == "f" and not np.isfinite(arr).all():
        raise RuleFileError(f"{field}: holds NaN or infinity")
    return arr


class Rule:
    """A loaded, validated rule. Predicts from 0/1 pixels with numpy only.

    Attributes
    ----------
    doc : dict
        The document as read.
    family, size, shape, positive, negative, binarizer
    """

    def __init__(self, doc: dict):
        self.doc = doc
        m = doc["model"]
        self.family: str = m["family"]
        self.size: int = int(m["size"])
        self.shape: tuple[int, int] = (int(doc["patch_shape"][0]), int(doc["patch_shape"][1]))
        self.positive: str = doc["classes"]["positive"]
        self.negative: str = doc["classes"]["negative"]
        try:
            self.binarizer = Binarizer.from_dict(doc["binarize"])
        except Exception as exc:
            raise RuleFileError(f"binarize: {exc}") from None
        if self.binarizer.method == "otsu" and self.binarizer.threshold is None:
            raise RuleFileError("binarize/threshold: an otsu rule must record its learned threshold")
        h, w = self.shape
        self.n_pixels = h * w
        self._build(m)

    @property
    def scored(self) -> bool:
        return self.family not in ("constant",)

    def _flat(self, pixels, field: str) -> np.ndarray:
        h, w = self.shape
        out = []
        for j, (r, c) in enumerate(pixels):
            if not (0 <= r < h and 0 <= c < w):
                raise RuleFileError(f"{field}/{j}: pixel ({r}, {c}) is outside the {h}x{w} patch")
            out.append(r * w + c)
        flat = np.asarray(out, dtype=np.intp)
        if len(set(out)) != len(out):
            raise RuleFileError(f"{field}: a pixel is listed twice")
        return flat

    def _build(self, m: dict) -> None:
        f = self.family
        if f == "constant":
            self._label, self._score = bool(m["label"]), float(m["score"])
        elif f == "lut":
            self._pixels = self._flat(m["pixels"], "model/pixels")
            k = len(self._pixels)
            if k != self.size:
                raise RuleFileError(f"model/pixels: {k} pixels listed for a size-{self.size} rule")
            if k > 24:
                raise RuleFileError(f"model/pixels: {k} pixels is more than a truth table can hold here (24)")
            self._table = _array(m["table"], "model/table", (2**k,), np.int64).astype(bool)
            self._scores = _array(m["scores"], "model/scores", (2**k,))
        elif f == "memorize":
            n_bytes = -(-self.n_pixels // 8)
            pats = m["patterns"]
            bad = [i for i, s in enumerate(pats) if len(s) != 2 * n_bytes]
            if bad:
                raise RuleFileError(f"model/patterns/{bad[0]}: expected {2 * n_bytes} hex digits for a "
                                    f"{self.shape[0]}x{self.shape[1]} patch")
            n = len(pats)
            self._labels = _array(m["labels"], "model/labels", (n,), np.int64).astype(bool)
            self._mscores = _array(m["scores"], "model/scores", (n,))
            self._index = {bytes.fromhex(s): i for i, s in enumerate(pats)}
            if len(self._index) != n:
                raise RuleFileError("model/patterns: a pattern is listed twice")
            self._default_label, self._default_score = bool(m["default_label"]), float(m["default_score"])
        elif f == "nb":
            self._pixels = self._flat(m["pixels"], "model/pixels")
            k = len(self._pixels)
            self._prior = _array(m["class_log_prior"], "model/class_log_prior", (2,))
            self._on = _array(m["log_prob_on"], "model/log_prob_on", (2, k))
            if (self._on >= 0).any():
                raise RuleFileError("model/log_prob_on: log probabilities must be below 0")
            self._off = np.log(1 - np.exp(self._on))  # as scikit-learn's BernoulliNB derives it
            _array(m["weights"], "model/weights", self.shape)
        elif f == "logistic":
            self._coef = _array(m["weights"], "model/weights", self.shape).reshape(1, -1)
            self._bias = float(m["bias"])
            if not math.isfinite(self._bias):
                raise RuleFileError("model/bias: not a finite number")
        elif f == "tree":
            nodes = m["nodes"]
            n = len(nodes)
            self._feat = np.full(n, -1, np.intp)
            self._left = np.zeros(n, np.intp)
            self._right = np.zeros(n, np.intp)
            self._tlabel = np.zeros(n, bool)
            self._tscore = np.zeros(n)
            for i, node in enumerate(nodes):
                leaf = node["pixel"] is None
                lo, ro = node["left"], node["right"]
                if leaf:
                    if lo != -1 or ro != -1:
                        raise RuleFileError(f"model/nodes/{i}: a leaf (pixel null) must have left = right = -1")
                else:
                    self._feat[i] = self._flat([node["pixel"]], f"model/nodes/{i}/pixel")[0]
                    # Children come after their parent: the tree has no cycles and every walk ends.
                    for side, child in (("left", lo), ("right", ro)):
                        if not (i < child < n):
                            raise RuleFileError(f"model/nodes/{i}/{side}: child {child} must be a later node (< {n})")
                self._left[i], self._right[i] = lo, ro
                self._tlabel[i], self._tscore[i] = bool(node["label"]), float(node["score"])
        elif f == "mlp":
            self._act = m["activation"]
            self._layers = []
            width = self.n_pixels
            for i, layer in enumerate(m["layers"]):
                W = _array(layer["weights"], f"model/layers/{i}/weights")
                if W.ndim != 2 or W.shape[0] != width:
                    raise RuleFileError(f"model/layers/{i}/weights: expected {width} rows, found shape {list(W.shape)}")
                b = _array(layer["bias"], f"model/layers/{i}/bias", (W.shape[1],))
                self._layers.append((W, b))
                width = W.shape[1]
            if width != 1:
                raise RuleFileError(f"model/layers: the last layer must have 1 output, it has {width}")

    # -- prediction ---------------------------------------------------------------------------

    def _check_bits(self, X) -> np.ndarray:
        X = np.asarray(X)
        if X.ndim == 3:
            X = X.reshape(len(X), -1)
        if X.ndim != 2 or X.shape[1] != self.n_pixels:
            raise RuleFileError(f"patches have {X.shape[-1] if X.ndim else 0} pixels; this rule reads "
                                f"{self.shape[0]}x{self.shape[1]} = {self.n_pixels}")
        return X.astype(bool)

    def _decide(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        f = self.family
        n = len(X)
        if f == "constant":
            return np.full(n, self._score), np.full(n, self._label)
        if f == "lut":
            codes = X[:, self._pixels].astype(np.intp) @ (1 << np.arange(len(self._pixels))).astype(np.intp)
            return self._scores[codes], self._table[codes]
        if f == "memorize":
            packed = np.packbits(X, axis=1)
            idx = np.array([self._index.get(row.tobytes(), -1) for row in packed], dtype=np.intp)
            seen = idx >= 0
            scores = np.where(seen, self._mscores[idx], self._default_score)
            return scores, np.where(seen, self._labels[idx], self._default_label)
        if f == "nb":
            # The same arithmetic as scikit-learn's BernoulliNB joint log-likelihood.
            Xs = X[:, self._pixels].astype(np.float64)
            off = self._off
            jll = Xs @ (self._on - off).T + (self._prior + off.sum(axis=1))
            top = jll.max(axis=1, keepdims=True)
            log_norm = top[:, 0] + np.log(np.exp(jll - top).sum(axis=1))
            return np.exp(jll[:, 1] - log_norm), jll[:, 1] > jll[:, 0]
        if f == "logistic":
            z = linear_decision(X, self._coef, self._bias)
            return sigmoid(z), z > 0
        if f == "tree":
            node = np.zeros(n, np.intp)
            rows = np.arange(n)
            for _ in range(len(self._feat)):
                inner = self._feat[node] >= 0
                if not inner.any():
                    break
                r = rows[inner]
                nd = node[inner]
                bit = X[r, self._feat[nd]]
                node[inner] = np.where(bit, self._right[nd], self._left[nd])
            return self._tscore[node], self._tlabel[node]
        if f == "mlp":
            a = X.astype(np.float64)
            for i, (W, b) in enumerate(self._layers):
                a = a @ W + b
                if i < len(self._layers) - 1:
                    a = _ACTIVATIONS[self._act](a)
            proba = sigmoid(a[:, 0])
            return proba, proba > 0.5
        raise RuleFileError(f"unknown family {f}")

    def scores(self, X) -> np.ndarray:
        """Score (estimated probability of the positive class) per patch, shape (n,)."""
        return self._decide(self._check_bits(X))[0]

    def predict(self, X, threshold: float | None = None) -> np.ndarray:
        """True where the patch is called positive. ``threshold``: call positive when score >= it.

        Parameters
        ----------
        X : ndarray of shape (n, n_pixels) or (n, h, w), 0/1
        """
        s, pred = self._decide(self._check_bits(X))
        return pred if threshold is None else s >= threshold

    def binarize(self, images: np.ndarray) -> np.ndarray:
        """The rule's own binarization of uint8 patches (n, h, w) -> bool (n, h*w)."""
        images = np.asarray(images)
        if images.ndim != 3 or images.shape[1:] != self.shape:
            raise RuleFileError(f"patches are {images.shape[1:]}, the rule reads {self.shape}")
        return self.binarizer.transform(images).reshape(len(images), -1)

    def pixels_used(self) -> list[int] | None:
        """Flat indices the rule reads; None when it reads the whole patch."""
        f = self.family
        if f == "constant":
            return []
        if f in ("lut", "nb"):
            return [int(i) for i in self._pixels]
        if f == "logistic":
            return [int(i) for i in np.flatnonzero(self._coef.ravel())]
        if f == "tree":
            return sorted({int(i) for i in self._feat[self._feat >= 0]})
        return None


_ACTIVATIONS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "relu": lambda a: np.maximum(a, 0),
    "tanh": np.tanh,
    "logistic": sigmoid,
    "identity": lambda a: a,
}
