"""Rule files: one JSON document per trained model, validated on load, predicted with numpy only.

A rule file can never run code: it is parsed as JSON (NaN and infinity refused), checked
against the shipped JSON Schema, then checked field by field (shapes, ranges, table lengths)
before a :class:`Rule` is built from plain arrays.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from importlib import resources
from pathlib import Path

import jsonschema
import numpy as np

from pixelfit import __version__
from pixelfit._atomic import write_json
from pixelfit.conventions import BOUND_CONVENTION, UNDEFINED_CONVENTION
from pixelfit.data import Binarizer
from pixelfit.errors import RuleFileError
from pixelfit.families import FAMILIES, IntegerModel, Model

RULE_FORMAT = "pixelfit-rule"
RULE_VERSION = 2
#: Schema versions this pixelfit reads (version 1 files have no ``operating`` entry: threshold 0.5).
READABLE_VERSIONS = (1, 2)
#: Where an operating threshold can have been chosen.
CHOSEN_ON = ("default", "cv", "train", "held-out", "manual")
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


def model_section(family: str, size: int, est, shape: tuple[int, int]) -> dict:
    """Everything needed to predict, for one fitted estimator of the ladder."""
    if family not in FAMILIES:
        raise RuleFileError(f"family {family!r} cannot be written to a rule file")
    return FAMILIES[family].model_section(est, size, shape)


def rule_document(prep, rung, operating: dict | None = None, checks: dict | None = None) -> dict:
    """The rule-file document of one trained rung of a ladder.

    Parameters
    ----------
    prep : pixelfit.ladder.Prepared
    rung : pixelfit.ladder.Rung
    operating : dict, optional
        ``{threshold, chosen_on}`` to ship; default the rung's own (its spec threshold, else 0.5).
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
        "operating": dict(operating or rung.operating_point),
        "evaluation": {
            "train": rung.train, "cv": rung.cv, "test": rung.test, "search": rung.search,
            "parameters": rung.figures["parameters"], "log2_class_size": rung.figures["log2_class_size"],
            "vc_dim": rung.figures["vc_dim"], "bound": rung.bound, "bound_convention": BOUND_CONVENTION,
            "undefined_values": UNDEFINED_CONVENTION, "recommended": rung.recommended,
            "cost": rung.cost, "spec": rung.spec, "verdict": None if rung.spec is None else rung.spec["verdict"],
        },
        "training_data": {
            "fingerprint": prep.train_fingerprint,
            "fingerprint_of": "SHA-256 over the binarized training patches (bit-packed rows) and their labels",
            "source": prep.dataset.source, "n_train": int(len(prep.y_train)), "n_test": int(len(prep.y_test)),
            "split": {"test_fraction": prep.test_fraction, "seed": prep.seed, "presplit": prep.presplit,
                      "augment": getattr(prep, "augment", None)},
        },
        "caution": CAUTION,
        **({} if getattr(rung, "quantized", None) is None else {"quantized": rung.quantized}),
    }
    if checks is not None:
        doc["bias_variance"] = checks.get("bias_variance")
        doc["stress"] = checks.get("stress")
    return doc


def save_rung(path: str | os.PathLike, prep, rung, operating: dict | None = None, checks: dict | None = None) -> Path:
    """Write the rule file of one rung atomically; returns the path. See :func:`rule_document`."""
    doc = rule_document(prep, rung, operating, checks)
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
    if isinstance(version, int) and not isinstance(version, bool) and version > max(READABLE_VERSIONS):
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


class Rule:
    """A loaded, validated rule. Predicts from 0/1 pixels with numpy only.

    Attributes
    ----------
    doc : dict
        The document as read.
    family, size, shape, positive, negative, binarizer
    """

    # Scores the stored decisions are derived from (set by _build for the families that have them).
    _score: float
    _scores: np.ndarray
    _mscores: np.ndarray
    _default_score: float
    _tscore: np.ndarray

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
        op = doc.get("operating") or {"threshold": 0.5, "chosen_on": "default"}
        #: A patch is called positive when its score is above this (0.5: the rule's own decision).
        self.operating_threshold: float = float(op["threshold"])
        #: Where the threshold was chosen: default, cv, train, held-out or manual.
        self.operating_chosen_on: str = str(op["chosen_on"])
        #: the decoded model: numpy prediction and the integer-only predictor of firmware
        self.model: Model = FAMILIES[self.family].decode(m, self.shape)

    @property
    def scored(self) -> bool:
        return self.model.scored

    # -- prediction ---------------------------------------------------------------------------

    def _check_bits(self, X) -> np.ndarray:
        X = np.asarray(X)
        if X.ndim == 3:
            X = X.reshape(len(X), -1)
        if X.ndim != 2 or X.shape[1] != self.n_pixels:
            raise RuleFileError(f"patches have {X.shape[-1] if X.ndim else 0} pixels; this rule reads "
                                f"{self.shape[0]}x{self.shape[1]} = {self.n_pixels}")
        return X.astype(bool)

    def scores(self, X) -> np.ndarray:
        """Score (estimated probability of the positive class) per patch, shape (n,)."""
        return self.model.decide(self._check_bits(X))[0]

    def predict(self, X, threshold: float | None = None) -> np.ndarray:
        """True where the patch's score is above ``threshold`` (default: :attr:`operating_threshold`).

        Parameters
        ----------
        X : ndarray of shape (n, n_pixels) or (n, h, w), 0/1
        """
        s = self.model.decide(self._check_bits(X))[0]
        return s > (self.operating_threshold if threshold is None else threshold)

    def binarize(self, images: np.ndarray) -> np.ndarray:
        """The rule's own binarization of uint8 patches (n, h, w) -> bool (n, h*w)."""
        images = np.asarray(images)
        if images.ndim != 3 or images.shape[1:] != self.shape:
            raise RuleFileError(f"patches are {images.shape[1:]}, the rule reads {self.shape}")
        return self.binarizer.transform(images).reshape(len(images), -1)

    def pixels_used(self) -> list[int] | None:
        """Flat indices the rule reads; None when it reads the whole patch."""
        return self.model.pixels_used()

    def integer(self, threshold: float | None = None) -> IntegerModel:
        """The integer-only predictor that firmware runs, at ``threshold`` (None: the rule's
        operating threshold); positive when the score is above it. See :mod:`pixelfit.families`."""
        return self.model.integer(self.operating_threshold if threshold is None else threshold)
