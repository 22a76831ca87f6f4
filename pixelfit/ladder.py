"""Train the ladder: families x sizes, each rung measured the same way.

:func:`run_ladder` is a generator of :class:`Progress` records so that the CLI can draw a progress
bar and the GUI can show rungs as they finish; it checks a cancel callback between steps and
never touches anything but data. Rungs that finished before a cancel are kept.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable, Generator, Iterator
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from sklearn.base import clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import StratifiedKFold
from threadpoolctl import threadpool_limits

from pixelfit.data import Binarizer, Dataset, binary_target, choose_positive, fingerprint, stratified_split
from pixelfit.errors import TrainingError
from pixelfit.evaluate import (
    detection_metrics,
    error_rate,
    generalization_bound,
    mcnemar,
    mean_difference_map,
    mutual_information_map,
    one_standard_error_choice,
    operating_points,
    permutation_map,
    threshold_for_target,
)
from pixelfit.models import (
    FAMILIES,
    LutRule,
    SearchCancelled,
    native_importance,
    pixels_used,
    size_figures,
)

CancelFn = Callable[[], bool]


class LadderCancelled(Exception):
    """The ladder was cancelled; the rungs finished so far stay in the records already yielded."""


@dataclass
class Prepared:
    """A dataset split and binarized, ready for the ladder.

    Attributes
    ----------
    X_train, X_test : ndarray of shape (n, n_pixels), bool
    y_train, y_test : ndarray of shape (n,), bool — True for the positive class
    test_mask : ndarray of shape (n_patches,), bool — over the whole dataset
    """

    dataset: Dataset
    binarizer: Binarizer
    positive: str
    negative: str
    test_mask: np.ndarray
    X_train: np.ndarray
    y_train: np.ndarray
    X_test: np.ndarray
    y_test: np.ndarray
    test_fraction: float | None
    seed: int
    presplit: bool
    augment: str | None = None  # how the training rows were extended (``shift1``), None when not

    @property
    def shape(self) -> tuple[int, int]:
        return self.dataset.shape

    @property
    def n_pixels(self) -> int:
        return self.shape[0] * self.shape[1]

    @cached_property
    def train_fingerprint(self) -> str:
        return fingerprint(self.X_train, self.y_train)

    def data_maps(self) -> dict[str, np.ndarray]:
        """Maps of the training data itself: class-mean difference and mutual information."""
        return {"mean_difference": mean_difference_map(self.X_train, self.y_train, self.shape),
                "mutual_information": mutual_information_map(self.X_train, self.y_train, self.shape)}


def prepare(dataset: Dataset, binarizer: Binarizer, positive: str | None = None,
            test_fraction: float = 0.25, seed: int = 0) -> Prepared:
    """Pick the positive class, split (unless pre-split), fit the binarizer on training patches."""
    pos, neg = choose_positive(dataset.counts, positive)
    y = binary_target(dataset, pos)
    if dataset.subset is not None:
        test_mask = dataset.subset == "test"
        presplit = True
    else:
        test_mask = stratified_split(y, test_fraction, seed, {True: pos, False: neg})
        presplit = False
    train_mask = ~test_mask
    if not y[train_mask].any() or y[train_mask].all():
        raise TrainingError("the training part must hold patches of both classes")
    fitted = binarizer.fit(dataset.images[train_mask])
    B = fitted.transform(dataset.images).reshape(len(dataset), -1)
    return Prepared(dataset, fitted, pos, neg, test_mask, B[train_mask], y[train_mask], B[test_mask], y[test_mask],
                    None if presplit else test_fraction, seed, presplit)


@dataclass
class Rung:
    """One trained rung and everything measured about it."""

    family: str
    size: int
    estimator: object
    train: dict
    test: dict
    cv: dict | None
    figures: dict
    bound: dict | None
    pixels: list[int] | None
    importance: dict[str, np.ndarray | None]
    test_pred: np.ndarray
    test_scores: np.ndarray | None
    operating: dict | None
    search: dict | None = None
    notes: list[str] = field(default_factory=list)
    seconds: float = 0.0
    recommended: bool = False
    versus_smaller: dict | None = None
    rule_file: str | None = None

    @property
    def key(self) -> str:
        return f"{self.family}-{self.size}"

    @property
    def scored(self) -> bool:
        return self.test_scores is not None

    def summary(self, shape: tuple[int, int]) -> dict:
        """The JSON-ready entry of ``summary.json``."""
        w = shape[1]
        return {
            "family": self.family,
            "size": self.size,
            "search": self.search,
            "train": self.train,
            "test": self.test,
            "cv": self.cv,
            "parameters": self.figures["parameters"],
            "log2_class_size": self.figures["log2_class_size"],
            "vc_dim": self.figures["vc_dim"],
            "bound": self.bound,
            "recommended": self.recommended,
            "versus_smaller": self.versus_smaller,
            "operating": self.operating,
            "rule_file": self.rule_file,
            "pixels": None if self.pixels is None else [[i // w, i % w] for i in self.pixels],
            "notes": self.notes,
            "seconds": round(self.seconds, 3),
        }


@dataclass
class Progress:
    """One step of the ladder: ``done`` of ``total`` steps; ``rung`` is set when a rung finished."""

    done: int
    total: int
    message: str
    rung: Rung | None = None


def effective_folds(y: np.ndarray, folds: int) -> tuple[int, str | None]:
    """Folds that the training classes allow, and a note when fewer than asked."""
    if folds == 0:
        return 0, None
    if folds < 2:
        raise TrainingError(f"--folds must be 0 (off) or at least 2, not {folds}")
    smallest = int(min(np.sum(y), np.sum(~y)))
    if smallest >= folds:
        return folds, None
    if smallest >= 2:
        return smallest, (f"cross-validation uses {smallest} folds, not {folds}: "
                          f"the smaller class has only {smallest} training patches")
    return 0, f"cross-validation is off: the smaller class has only {smallest} training patch"


def identical_note(X: np.ndarray) -> str | None:
    """A note when every training patch is the same after binarization, else None.

    Then every rule gives all training patches one answer, and none can do better there than the
    constant: the ladder still runs, so that the numbers show it.
    """
    if len(X) and bool((X == X[0]).all()):
        return ("all training patches are the same after binarization: no rule can tell the classes apart, "
                "so none does better than the constant on them")
    return None


def _fit(est, X, y, cancel: CancelFn | None, notes: list[str] | None = None):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        try:
            if isinstance(est, LutRule):
                est.fit(X, y, cancel=cancel)
            else:
                est.fit(X, y)
        except SearchCancelled:
            raise LadderCancelled from None
    if notes is not None and any(issubclass(w.category, ConvergenceWarning) for w in caught):
        msg = "optimiser stopped at its iteration limit before converging"
        if msg not in notes:
            notes.append(msg)
    return est


def _scores_of(est, X) -> np.ndarray:
    """Scores of a family that has them; see :func:`_score`."""
    s = _score(est, X)
    if s is None:
        raise TrainingError(f"{type(est).__name__} gives no scores")
    return s


def _score(est, X) -> np.ndarray | None:
    if not hasattr(est, "predict_proba"):
        return None
    proba = est.predict_proba(X)
    return proba[:, -1] if proba.shape[1] == 2 else np.zeros(len(X))


def train_rung(prep: Prepared, family: str, size: int, folds: int = 5, seed: int = 0,
               cancel: CancelFn | None = None, target_precision: float | None = None,
               target_recall: float | None = None) -> Rung:
    """Fit one rung on the training part, cross-validate it there, measure it on the held-out part."""
    steps = _rung_steps(prep, family, size, folds, seed, cancel, target_precision, target_recall)
    while True:
        try:
            next(steps)
        except StopIteration as stop:
            return stop.value


def _rung_steps(prep: Prepared, family: str, size: int, folds: int, seed: int,
                cancel: CancelFn | None, target_precision: float | None,
                target_recall: float | None) -> Generator[str, None, Rung]:
    """:func:`train_rung` as a generator: yields a message after each fit, returns the rung."""
    fam = FAMILIES[family]
    t0 = time.perf_counter()
    notes: list[str] = []
    X, y = prep.X_train, prep.y_train
    template = fam.make(size, prep.n_pixels, seed)
    cv = None
    oof = np.full(len(y), np.nan) if fam.scored else None
    if folds:
        f1s, errs = [], []
        splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
        for i, (tr, va) in enumerate(splitter.split(X, y)):
            if cancel is not None and cancel():
                raise LadderCancelled
            est = _fit(clone(template), X[tr], y[tr], cancel, notes)
            pred = est.predict(X[va])
            fold = detection_metrics(y[va], pred)
            f1s.append(fold["f1"] or 0.0)
            errs.append(1.0 - fold["accuracy"])
            if oof is not None:
                s = _score(est, X[va])
                if s is not None:
                    oof[va] = s
            yield f"{family}-{size}: fold {i + 1} of {folds}"
        cv = {"folds": folds, "f1_mean": float(np.mean(f1s)), "f1_std": float(np.std(f1s, ddof=1)),
              "f1_folds": [float(v) for v in f1s], "error_mean": float(np.mean(errs)),
              "error_std": float(np.std(errs, ddof=1))}
    if cancel is not None and cancel():
        raise LadderCancelled
    est = _fit(clone(template), X, y, cancel, notes)
    yield f"{family}-{size}: final fit"
    train_pred = np.asarray(est.predict(X), bool)
    test_pred = np.asarray(est.predict(prep.X_test), bool)
    train = detection_metrics(y, train_pred)
    test = detection_metrics(prep.y_test, test_pred)
    figures = size_figures(family, est, size, prep.n_pixels)
    bound = generalization_bound(family, figures, error_rate(y, train_pred), len(y), prep.n_pixels)
    used = pixels_used(family, est, prep.n_pixels)
    importance = {
        "native": native_importance(family, est, X, y, prep.shape),
        "permutation": permutation_map(est, prep.X_test, prep.y_test, prep.shape, pixels=used, seed=seed),
    }
    test_scores = _score(est, prep.X_test) if fam.scored else None
    operating = None
    if test_scores is not None:
        choose_on = "cv" if folds and oof is not None and not np.isnan(oof).any() else "train"
        basis = oof if choose_on == "cv" and oof is not None else _scores_of(est, X)
        target = None
        if target_precision is not None or target_recall is not None:
            pick = threshold_for_target(operating_points(y, basis), target_precision, target_recall)
            if pick is not None:
                held = detection_metrics(prep.y_test, test_scores >= pick["threshold"])
                target = {"threshold": pick["threshold"], "chosen_on": choose_on,
                          "chosen_precision": pick["precision"], "chosen_recall": pick["recall"],
                          "test_precision": held["precision"], "test_recall": held["recall"]}
            else:
                target = {"threshold": None, "chosen_on": choose_on, "met": False}
        operating = {"test_points": operating_points(prep.y_test, test_scores), "target": target}
    search = None
    if family == "lut":
        search = {"method": est.search_, "candidates": est.n_candidates_}
    return Rung(family, size, est, train, test, cv, figures, bound, used, importance, test_pred, test_scores,
                operating, search, notes, time.perf_counter() - t0)


def run_ladder(prep: Prepared, rungs: list[tuple[str, int]], folds: int = 5, seed: int = 0,
               cancel: CancelFn | None = None, target_precision: float | None = None,
               target_recall: float | None = None) -> Iterator[Progress]:
    """Train every rung in order, yielding a :class:`Progress` per step.

    Raises :class:`LadderCancelled` between steps when ``cancel()`` returns True. Call
    :func:`conclude` on the finished rungs to mark the recommended one and the comparisons.
    """
    # Ladder matrices are small: threads in BLAS only add overhead (and stall badly on a busy
    # machine), so numeric libraries run single-threaded while the ladder trains.
    with threadpool_limits(limits=1):
        yield from _run(prep, rungs, folds, seed, cancel, target_precision, target_recall)


def _run(prep, rungs, folds, seed, cancel, target_precision, target_recall) -> Iterator[Progress]:
    folds, fold_note = effective_folds(prep.y_train, folds)
    notes = [n for n in (fold_note, identical_note(prep.X_train)) if n]
    per_rung = folds + 1
    total = per_rung * len(rungs)
    done = 0
    for note in notes:
        yield Progress(done, total, note)
    for family, size in rungs:
        steps = _rung_steps(prep, family, size, folds, seed, cancel, target_precision, target_recall)
        while True:
            try:
                message = next(steps)
            except StopIteration as stop:
                rung = stop.value
                break
            done += 1
            if done % per_rung:  # the last step of a rung is reported with the rung itself
                yield Progress(done, total, message)
        rung.notes.extend(notes)
        yield Progress(done, total, f"{rung.key} done", rung)


def conclude(rungs: list[Rung], y_test: np.ndarray) -> Rung | None:
    """Mark the recommended rung (one-standard-error rule on CV F1) and compare neighbours.

    Each rung is compared with the next smaller rung of its family on the held-out patches with
    McNemar's test. Returns the recommended rung, or None without cross-validation.
    """
    for r in rungs:
        r.recommended = False
    prev: dict[str, Rung] = {}
    for r in rungs:
        before = prev.get(r.family)
        if before is not None:
            test = mcnemar(y_test, r.test_pred, before.test_pred)
            better = r.test["accuracy"] > before.test["accuracy"]
            r.versus_smaller = {"size": before.size, **test, "better": bool(better),
                                "significant": bool(better and test["p_value"] < 0.05)}
        prev[r.family] = r
    folds = max((r.cv["folds"] for r in rungs if r.cv), default=0)
    pick = one_standard_error_choice([r.cv["f1_mean"] if r.cv else None for r in rungs],
                                     [r.cv["f1_std"] if r.cv else None for r in rungs], folds,
                                     [r.figures["parameters"] for r in rungs])
    if pick is None:
        return None
    rungs[pick].recommended = True
    return rungs[pick]

