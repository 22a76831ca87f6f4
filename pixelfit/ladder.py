"""Train the ladder: families x sizes, each rung measured the same way.

:func:`run_ladder` is a generator of :class:`Progress` records so that the CLI can draw a progress
bar and the GUI can show rungs as they finish; it checks a cancel callback between steps and
never touches anything but data. Rungs that finished before a cancel are kept.
"""

from __future__ import annotations

import contextlib
import functools
import os
import time
import warnings
from collections.abc import Callable, Generator, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from sklearn.base import clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold
from threadpoolctl import threadpool_limits

from pixelfit.conventions import HELD_OUT_SAMPLE, SUBSAMPLE_PATCHES, SUBSAMPLED_FAMILIES
from pixelfit.data import (
    SPLIT_METHODS,
    Binarizer,
    DataCheck,
    Dataset,
    binary_target,
    check_data,
    check_seed,
    choose_positive,
    distinct_count,
    fingerprint,
    grey_groups,
    grouped_split,
    pack_binarized,
    stratified_split,
)
from pixelfit.errors import PixelfitError, TrainingError
from pixelfit.evaluate import (
    cost_order,
    detection_metrics,
    error_rate,
    generalization_bound,
    mcnemar,
    mean_difference_map,
    mutual_information_map,
    one_standard_error_choice,
    operating_points,
    permutation_map,
    quantization_check,
)
from pixelfit.families import FAMILIES, Model
from pixelfit.models import LutRule, SearchCancelled

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
    split_method : ``stratified``, ``group-duplicates`` or ``given`` (a pre-split folder)
    groups : ndarray of shape (n_patches,), int — group of identical grey patches of each patch
    check : DataCheck — duplicates, conflicts and leakage of this split and binarization
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
    split_method: str = "stratified"
    groups: np.ndarray | None = None
    check: DataCheck | None = None

    @property
    def train_groups(self) -> np.ndarray | None:
        """Grey-duplicate groups of the training patches when CV folds must keep them together."""
        if self.split_method != "group-duplicates" or self.groups is None:
            return None
        g = self.groups[~self.test_mask]
        return g if distinct_count(g) < len(g) else None
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
            test_fraction: float = 0.25, seed: int = 0, split: str = "group-duplicates") -> Prepared:
    """Pick the positive class, split (unless pre-split), fit the binarizer on training patches,
    and run the data check on the result.

    ``split`` is ``group-duplicates`` (identical grey patches stay on one side; the same draw as
    ``stratified`` when there are none) or ``stratified``; a pre-split folder keeps its split.

    Refuses a binarization that makes every training pixel the same bit: every patch would be
    blank (or full), and a whole ladder would be trained on nothing.
    """
    seed = check_seed(seed)
    if split not in SPLIT_METHODS:
        raise TrainingError(f"the split must be one of {', '.join(SPLIT_METHODS)}, not {split!r}", field="split")
    pos, neg = choose_positive(dataset.counts, positive)
    y = binary_target(dataset, pos)
    grey = grey_groups(dataset.images)
    names = {True: pos, False: neg}
    if dataset.subset is not None:
        test_mask = dataset.subset == "test"
        presplit, method = True, "given"
    elif split == "group-duplicates":
        test_mask = grouped_split(y, grey.ids, test_fraction, seed, names)
        presplit, method = False, split
    else:
        test_mask = stratified_split(y, test_fraction, seed, names)
        presplit, method = False, split
    train_mask = ~test_mask
    if not y[train_mask].any() or y[train_mask].all():
        raise TrainingError("the training part must hold patches of both classes")
    fitted = binarizer.fit(dataset.images[train_mask])
    B = fitted.transform(dataset.images).reshape(len(dataset), -1)
    _refuse_uniform(B[train_mask], dataset.images[train_mask], fitted)
    check = check_data(dataset.images, dataset.labels, y, pack_binarized(B), B.shape[1], test_mask, grey)
    return Prepared(dataset, fitted, pos, neg, test_mask, B[train_mask], y[train_mask], B[test_mask], y[test_mask],
                    None if presplit else test_fraction, seed, presplit, method, grey.ids, check)


def _refuse_uniform(X_train: np.ndarray, images: np.ndarray, fitted: Binarizer) -> None:
    if X_train.size and (X_train.all() or not X_train.any()):
        lo, hi = int(images.min()), int(images.max())
        why = (f"every training pixel has grey level {lo}, and no threshold splits them" if lo == hi else
               f"the training patches hold grey levels from {lo} to {hi}; choose a threshold inside that range")
        raise TrainingError(f"{fitted.describe()} makes every training pixel {int(X_train.flat[0])}: {why}",
                            field="binarize")


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
    #: out-of-fold scores of the training patches when CV ran; NaN outside a large set's CV subsample
    oof_scores: np.ndarray | None = None
    #: Scores the operating threshold is chosen on (out-of-fold CV scores, or training scores), and which.
    choice_scores: np.ndarray | None = None
    chosen_on: str | None = None
    #: The labels of ``choice_scores`` (the training labels, or those of a large set's CV subsample).
    choice_labels: np.ndarray | None = None
    #: The rung's entry for a spec (see :func:`pixelfit.evaluate.apply_spec`); None without one.
    spec: dict | None = None
    notes: list[str] = field(default_factory=list)
    seconds: float = 0.0
    recommended: bool = False
    versus_smaller: dict | None = None
    rule_file: str | None = None
    #: firmware cost of the integer-only predictor: {flash_bytes, ram_bytes, ops}
    cost: dict | None = None
    #: the integer-only predictor against the floating-point model on the held-out part
    quantized: dict | None = None
    #: the rung decoded as its rule file holds it (numpy only): what it reads, its integer predictor
    model: Model | None = None
    #: ``{n, of}`` when the rung trained on a stratified subsample of n of the ``of`` training patches
    subsample: dict | None = None

    @property
    def key(self) -> str:
        return f"{self.family}-{self.size}"

    @property
    def scored(self) -> bool:
        return self.test_scores is not None

    @property
    def operating_point(self) -> dict:
        """``{threshold, chosen_on}``: the spec's threshold (chosen on CV or training scores), else 0.5."""
        if self.spec is not None:
            return {"threshold": self.spec["threshold"], "chosen_on": self.spec["chosen_on"]}
        return {"threshold": 0.5, "chosen_on": "default"}

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
            "operating": {**self.operating_point,
                          "test_points": self.operating["test_points"] if self.operating else None},
            "cost": self.cost,
            "spec": self.spec,
            "rule_file": self.rule_file,
            "quantized": self.quantized,
            "pixels": None if self.pixels is None else [[i // w, i % w] for i in self.pixels],
            "notes": self.notes,
            "subsample": self.subsample,
            "seconds": round(self.seconds, 3),
        }


@dataclass
class Progress:
    """One step of the ladder: ``done`` of ``total`` steps; ``rung`` is set when a rung finished."""

    done: int
    total: int
    message: str
    rung: Rung | None = None
    notice: bool = False  # a fact to keep in view (e.g. a search's estimate), not a step


class _Notice(str):
    """A message of :func:`_rung_steps` that is no step of the ladder."""


def effective_folds(y: np.ndarray, folds: int, groups: np.ndarray | None = None) -> tuple[int, str | None]:
    """Folds that the training classes (and groups of identical patches) allow, and a note when
    fewer than asked."""
    if folds == 0:
        return 0, None
    if folds < 2:
        raise TrainingError(f"cross-validation folds must be 0 (off) or at least 2, not {folds}", field="folds")
    if groups is not None:
        n_groups = distinct_count(groups)
        if n_groups < folds:
            if n_groups >= 2:
                return n_groups, (f"cross-validation uses {n_groups} folds, not {folds}: the training part "
                                  f"holds only {n_groups} distinct patches")
            return 0, "cross-validation is off: every training patch is the same grey patch"
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


def stratified_subsample(y: np.ndarray, n: int, seed: int) -> np.ndarray:
    """``n`` row indices of ``y`` (sorted), drawn without replacement, each class in its share.

    Each class gets ``n * (its count) / len(y)`` rows, rounded by largest remainder (so the counts
    add up to ``n``), and at least one row when ``n`` leaves room for every class.
    """
    y = np.asarray(y)
    if n >= len(y):
        return np.arange(len(y))
    classes, inverse = np.unique(y, return_inverse=True)
    counts = np.bincount(inverse)
    share = counts * n / len(y)
    take = np.maximum(np.floor(share).astype(int), np.minimum(counts, 1))
    for c in np.argsort(-(share - np.floor(share)), kind="stable")[:max(0, n - int(take.sum()))]:
        take[c] += 1
    while take.sum() > n:  # the rare classes' one row each came from the largest
        take[np.argmax(take)] -= 1
    rng = np.random.default_rng(seed)
    rows = [rng.choice(np.flatnonzero(inverse == c), int(take[c]), replace=False) for c in range(len(classes))]
    return np.sort(np.concatenate(rows))


def training_sample(y: np.ndarray, seed: int) -> np.ndarray | None:
    """The training rows a large set's repeated fits use: a stratified subsample of
    :data:`SUBSAMPLE_PATCHES` when the training part is larger, None when every row is used.

    Every family's CV folds and the checks' refits run on these rows, and the families in
    :data:`SUBSAMPLED_FAMILIES` train their final fit on them too (the same rows for every rung).
    """
    if len(y) <= SUBSAMPLE_PATCHES:
        return None
    return stratified_subsample(y, SUBSAMPLE_PATCHES, seed)


def subsample_for(family: str, y: np.ndarray, seed: int) -> np.ndarray | None:
    """The training rows ``family`` trains on (CV folds and final fit) when the training part is
    larger than its size in :data:`SUBSAMPLED_FAMILIES`: a stratified subsample of that many,
    drawn from :func:`training_sample`'s rows when there are any; None when it trains on all."""
    if _family_size(family, len(y)) is None:
        return None
    return _family_rows(family, y, seed, training_sample(y, seed))


def _family_size(family: str, n_train: int) -> int | None:
    """The subsample size of ``family`` on ``n_train`` training patches; None: it trains on all."""
    n = SUBSAMPLED_FAMILIES.get(family)
    return None if n is None or n_train <= n else n


def _family_rows(family: str, y: np.ndarray, seed: int, rows: np.ndarray | None) -> np.ndarray | None:
    """:func:`subsample_for` given :func:`training_sample`'s ``rows`` already."""
    n = _family_size(family, len(y))
    if n is None:
        return None
    if rows is None:
        return stratified_subsample(y, n, seed)
    return rows if n >= len(rows) else rows[stratified_subsample(y[rows], n, seed)]


def held_out_sample(y: np.ndarray, seed: int) -> np.ndarray | None:
    """Held-out rows of the permutation importance maps and the stress tests: a stratified subsample
    of :data:`HELD_OUT_SAMPLE` when the held-out part is larger, None when every row is used."""
    if len(y) <= HELD_OUT_SAMPLE:
        return None
    return stratified_subsample(y, HELD_OUT_SAMPLE, seed)


def sampling_facts(n_train: int, n_test: int) -> dict:
    """What a run of this size computed on subsamples (``summary.json``'s ``sampling``): ``{n, of}``
    per part, None where every patch was used."""
    def part(n: int, cap: int) -> dict | None:
        return {"n": cap, "of": n} if n > cap else None

    return {"cv_and_checks": part(n_train, SUBSAMPLE_PATCHES),
            "subsampled_families": {f: n for f, n in SUBSAMPLED_FAMILIES.items() if _family_size(f, n_train)},
            "importance_and_stress": part(n_test, HELD_OUT_SAMPLE)}


def subsample_note(n: int, of: int) -> str:
    return (f"trained on a stratified subsample of {n:,} of the {of:,} training patches "
            f"(this family above {n:,}); held-out figures use every held-out patch")


def cv_sample_note(n: int, of: int) -> str:
    return (f"cross-validated on a stratified subsample of {n:,} of the {of:,} training patches "
            f"(every family above {SUBSAMPLE_PATCHES:,}); the final fit uses all of them")


def in_threads(tasks: Sequence[Callable[[], object]], workers: int = 1) -> Generator:
    """Run ``tasks`` (callables without arguments), up to ``workers`` at a time on threads, and yield
    their results in the order of the list.

    One worker runs them one after the other on the calling thread, exactly as a plain loop. The
    fits of a ladder release the interpreter lock in their numeric work (tree building, matrix
    products, the truth-table engine), so threads use a machine's cores without copying the data.
    When the caller stops early (an exception, a cancel, the generator closed), the tasks not yet
    started are dropped; those running finish on their own and their results are discarded.
    """
    if workers <= 1 or len(tasks) <= 1:
        for task in tasks:
            yield task()
        return
    pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="pixelfit-fit")
    try:
        futures = [pool.submit(task) for task in tasks]
        for future in futures:
            yield future.result()
    finally:
        pool.shutdown(wait=False, cancel_futures=True)


def train_rung(prep: Prepared, family: str, size: int, folds: int = 5, seed: int = 0,
               cancel: CancelFn | None = None, exhaustive: bool = False, workers: int = 1) -> Rung:
    """Fit one rung on the training part, cross-validate it there, measure it on the held-out part.

    ``workers`` fits (the CV folds' and the final one) run at once on threads; the results do
    not depend on it."""
    steps = _rung_steps(prep, family, size, folds, seed, cancel, exhaustive, workers=workers)
    while True:
        try:
            next(steps)
        except StopIteration as stop:
            return stop.value


def _rung_steps(prep: Prepared, family: str, size: int, folds: int, seed: int,
                cancel: CancelFn | None, exhaustive: bool = False,
                cluster: bool = False, workers: int = 1) -> Generator[str, None, Rung]:
    """:func:`train_rung` as a generator: yields a message after each fit, returns the rung.

    A :class:`_Notice` among the messages is no step: for a lut rung, the search's estimate.
    """
    fam = FAMILIES[family]
    t0 = time.perf_counter()
    notes: list[str] = []
    X_all, y_all = prep.X_train, prep.y_train
    X, y, groups = X_all, y_all, prep.train_groups
    rows = training_sample(y_all, seed)  # a large set: every family's CV folds on these rows
    sub = _family_rows(family, y_all, seed, rows)  # the slow families: CV folds and final fit on these
    if sub is not None:  # everything fitted below sees the subsample; the held-out part stays whole
        X, y = X_all[sub], y_all[sub]
        groups = None if groups is None else groups[sub]
        notes.append(subsample_note(len(sub), len(y_all)))
    # The patches the CV folds split: the subsample on a large set, whatever the final fit uses.
    Xc, yc, gc = X, y, groups
    if rows is not None and sub is None:
        Xc, yc = X_all[rows], y_all[rows]
        gc = None if groups is None else groups[rows]
    template = fam.make(size, prep.n_pixels, seed)
    plan = None
    if isinstance(template, LutRule):
        # One decision per rung, on the whole training part, so that every fold searches alike.
        template.set_params(exhaustive=exhaustive, n_jobs=None if cluster else template.n_jobs)
        try:
            plan = template.plan(X, y, cancel=cancel)
        except SearchCancelled:
            raise LadderCancelled from None
        template.set_params(exact_size=plan.largest_exact_size)
        notice = _search_notice(family, size, plan, folds)
        if notice:
            yield notice
    cv = None
    oof = np.full(len(yc), np.nan)

    def stop() -> None:
        if cancel is not None and cancel():
            raise LadderCancelled

    def fold_fit(tr: np.ndarray, va: np.ndarray):
        stop()
        est = _fit(clone(template), Xc[tr], yc[tr], cancel, notes)
        return est.predict(Xc[va]), _score(est, Xc[va])

    def final_fit():
        stop()
        return _fit(clone(template), X, y, cancel, notes)

    tasks: list[Callable[[], object]] = []
    folds_va: list[np.ndarray] = []
    if folds:
        if rows is not None and sub is None:
            notes.append(cv_sample_note(len(rows), len(y_all)))
        if gc is None:
            splits = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed).split(Xc, yc)
        else:  # identical grey patches stay in one fold, so no fold validates on its own training copy
            splits = StratifiedGroupKFold(n_splits=folds, shuffle=True, random_state=seed).split(Xc, yc, gc)
        for tr, va in splits:
            tasks.append(functools.partial(fold_fit, tr, va))
            folds_va.append(va)
    tasks.append(final_fit)  # independent of the folds: with several workers it runs beside them
    results = in_threads(tasks, workers)
    try:
        if folds:
            f1s, errs = [], []
            for i, va in enumerate(folds_va):
                pred, s = next(results)
                fold = detection_metrics(yc[va], pred)
                f1s.append(fold["f1"] or 0.0)
                errs.append(1.0 - fold["accuracy"])
                if s is not None:
                    oof[va] = s
                yield f"{family}-{size}: fold {i + 1} of {folds}"
            cv = {"folds": folds, "f1_mean": float(np.mean(f1s)), "f1_std": float(np.std(f1s, ddof=1)),
                  "f1_folds": [float(v) for v in f1s], "error_mean": float(np.mean(errs)),
                  "error_std": float(np.std(errs, ddof=1)),
                  "subsample": None if len(yc) == len(y_all) else {"n": len(yc), "of": len(y_all)}}
        est = next(results)  # final_fit looked at the cancel flag as it started
    finally:
        results.close()
    yield f"{family}-{size}: final fit"
    train_pred = np.asarray(est.predict(X), bool)
    test_pred = np.asarray(est.predict(prep.X_test), bool)
    train = detection_metrics(y, train_pred)
    test = detection_metrics(prep.y_test, test_pred)
    figures = fam.size_figures(est, size, prep.n_pixels)
    bound = generalization_bound(family, figures, error_rate(y, train_pred), len(y), prep.n_pixels)
    # The rung as its rule file will hold it: what it reads, and the integer predictor that ships.
    model = fam.decode(fam.model_section(est, size, prep.shape), prep.shape)
    used = model.pixels_used()
    # Permutation importance repeats a prediction per pixel read: on a large held-out part, on a
    # stratified subsample of it.
    imp = held_out_sample(prep.y_test, seed)
    X_imp, y_imp = (prep.X_test, prep.y_test) if imp is None else (prep.X_test[imp], prep.y_test[imp])
    importance = {
        "native": fam.native_importance(est, X, y, prep.shape),
        "permutation": permutation_map(est, X_imp, y_imp, prep.shape, pixels=used, seed=seed),
    }
    # Every family gives a score (the constant's is its training rate); see pixelfit.evaluate._spec
    # for the one decision rule, score > threshold.
    test_scores = _score(est, prep.X_test)
    choice_y = yc
    if sub is not None and test_scores is not None:
        # The training patches outside the subsample were never fitted: the final model's scores on
        # them are out of sample too, so every training patch keeps an out-of-sample score.
        whole = np.full(len(y_all), np.nan)
        whole[sub] = oof
        rest = np.ones(len(y_all), bool)
        rest[sub] = False
        whole[rest] = _scores_of(est, X_all[rest])
        oof, choice_y = whole, y_all
    operating = choice = chosen_on = None
    if test_scores is not None:
        chosen_on = "cv" if folds and not np.isnan(oof).any() else "train"
        if chosen_on == "train":
            choice, choice_y = _scores_of(est, X_all), y_all
        else:
            choice = oof
        operating = {"test_points": operating_points(prep.y_test, test_scores, TEST_POINTS)}
    search = fam.search_facts(est)
    if plan is not None:
        search = {**plan.as_dict(), **(search or {})}
    oof_ok = folds and not np.isnan(oof).any()
    if oof_ok and len(oof) != len(y_all):  # CV on a large set's subsample: no score outside it
        assert rows is not None
        whole = np.full(len(y_all), np.nan)
        whole[rows] = oof
        oof = whole
    rung = Rung(family, size, est, train, test, cv, figures, bound, used, importance, test_pred, test_scores,
                operating, search, oof if oof_ok else None, notes=notes,
                seconds=time.perf_counter() - t0, choice_scores=choice, chosen_on=chosen_on, model=model,
                subsample=None if sub is None else {"n": len(sub), "of": len(y_all)},
                choice_labels=None if choice is None else choice_y)
    measure_integer(rung, prep.X_test, prep.y_test)
    return rung


def measure_integer(rung: Rung, X_test: np.ndarray, y_test: np.ndarray) -> None:
    """Cost and held-out agreement of the integer-only predictor that ships, at the rung's operating
    threshold (call again when a spec has chosen another threshold)."""
    t = rung.operating_point["threshold"]
    if rung.model is None:
        return
    integer = rung.model.integer(t)
    float_pred = rung.test_pred if rung.test_scores is None else np.asarray(rung.test_scores > t)
    rung.cost = integer.cost()
    rung.quantized = {"threshold": t, "exact": not integer.facts, "fixed_point": integer.facts or None,
                      "on": "held-out", **quantization_check(float_pred, integer.predict(X_test), y_test)}


def _search_notice(family: str, size: int, plan, folds: int) -> _Notice | None:
    """What a user should see before a long or inexact search starts; None for a quick exact one."""
    fits = f"{folds + 1} fits" if folds else "1 fit"
    if plan.method == "exhaustive":
        if plan.estimated_seconds < NOTICE_SECONDS:
            return None
        return _Notice(f"{family}-{size}: exhaustive search of {plan.sets:,} pixel sets, estimated "
                       f"{plan.estimated_seconds:,.0f} s per fit ({fits})")
    return _Notice(f"{family}-{size}: scoring all {plan.sets:,} pixel sets would take an estimated "
                   f"{plan.estimated_seconds:,.0f} s per fit; beam search from the best sets of size "
                   f"{plan.largest_exact_size} instead (--exhaustive scores them all)")


#: Held-out operating points kept per rung (``operating.test_points``): every distinct score up to
#: this many, else this many at evenly spaced ranks (a large held-out part has a score per patch).
TEST_POINTS = 1_000

#: An exhaustive search estimated at least this long is announced before it starts.
NOTICE_SECONDS = 2.0


@contextlib.contextmanager
def cluster_engine(address: str | None):
    """Run the exhaustive searches' work units on a Dask cluster while the context is open.

    ``address`` is a scheduler's (``tcp://host:8786``); None: nothing changes. Needs the optional
    ``cluster`` extra (``dask[distributed]``), imported only here. The client is closed on exit.
    """
    if not address:
        yield
        return
    try:
        import joblib
        from dask.distributed import Client
    except ImportError:
        raise PixelfitError("--scheduler needs Dask: pip install 'pixelfit[cluster]'") from None
    try:
        client = Client(address, timeout=CLUSTER_CONNECT_SECONDS, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise PixelfitError(f"--scheduler {address}: cannot reach the Dask scheduler ({exc})") from None
    try:
        with joblib.parallel_config(backend="dask", client=client):
            yield
    finally:
        client.close()


#: Seconds to wait for a Dask scheduler to answer.
CLUSTER_CONNECT_SECONDS = 10


def run_ladder(prep: Prepared, rungs: list[tuple[str, int]], folds: int = 5, seed: int = 0,
               cancel: CancelFn | None = None, exhaustive: bool = False,
               scheduler: str | None = None, workers: int = 1) -> Iterator[Progress]:
    """Train every rung in order, yielding a :class:`Progress` per step.

    Raises :class:`LadderCancelled` between steps when ``cancel()`` returns True. Call
    :func:`conclude` on the finished rungs to mark the recommended one and the comparisons.
    ``exhaustive`` makes every lut search exhaustive whatever its estimated time; ``scheduler``
    (a Dask scheduler's address) runs the lut searches' work units on that cluster. ``workers``
    fits of a rung (its CV folds and final fit) run at once on threads (one with a scheduler,
    whose engine is set for the calling thread); the results do not depend on it. ``cancel`` may
    then be called from those threads too.
    """
    # Ladder matrices are small: threads in BLAS only add overhead (and stall badly on a busy
    # machine), so numeric libraries run single-threaded while the ladder trains.
    workers = 1 if scheduler else check_workers(workers)
    with threadpool_limits(limits=1), cluster_engine(scheduler):
        yield from _run(prep, rungs, folds, seed, cancel, exhaustive, bool(scheduler), workers)


def check_workers(workers: int) -> int:
    """``workers`` as a count of threads, refused unless at least 1."""
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise TrainingError(f"the number of fits at once must be a whole number of at least 1, not {workers!r}",
                            field="threads")
    return workers


def available_cpus() -> int:
    """CPUs this process may run on (its affinity where the system says, else the machine's)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on every system
        return max(1, os.cpu_count() or 1)


def _run(prep, rungs, folds, seed, cancel, exhaustive=False, cluster=False, workers=1) -> Iterator[Progress]:
    seed = check_seed(seed)
    folds, fold_note = effective_folds(prep.y_train, folds, prep.train_groups)
    notes = [n for n in (fold_note, identical_note(prep.X_train)) if n]
    per_rung = folds + 1
    total = per_rung * len(rungs)
    done = 0
    for note in notes:
        yield Progress(done, total, note)
    for family, size in rungs:
        steps = _rung_steps(prep, family, size, folds, seed, cancel, exhaustive, cluster, workers)
        while True:
            try:
                message = next(steps)
            except StopIteration as stop:
                rung = stop.value
                break
            if isinstance(message, _Notice):
                yield Progress(done, total, str(message), notice=True)
                continue
            done += 1
            if done % per_rung:  # the last step of a rung is reported with the rung itself
                yield Progress(done, total, message)
        rung.notes.extend(notes)
        yield Progress(done, total, f"{rung.key} done", rung)


#: Out-of-fold probability of the other class from which a rung "calls the other class with a high
#: score": a choice of ours (a confident 90/10 call), not a fact of the data.
SUSPECT_SCORE = 0.9


def suspect_labels(prep: Prepared, rungs: list[Rung], high: float = SUSPECT_SCORE) -> list[dict] | None:
    """Training patches whose label the strongest rungs all dispute with a high score.

    The strongest rungs are the three (or fewer, when fewer have them) with out-of-fold scores and
    the best CV F1. A patch is a suspect when every one of them gives the other class an
    out-of-fold probability of at least ``high``; ``score`` is the least of those probabilities.
    The list is for a person to look at: nothing is relabelled. Sorted by score, highest first;
    None when no rung has out-of-fold scores (cross-validation off, or no scored family).
    """
    ranked = sorted(((r.cv["f1_mean"], r.oof_scores) for r in rungs if r.oof_scores is not None and r.cv),
                    key=lambda t: -t[0])[:3]
    if not ranked:
        return None
    p = np.vstack([scores for _, scores in ranked])
    other = np.where(prep.y_train, 1.0 - p, p).min(axis=0)  # each rung's probability of the other class
    rows = np.flatnonzero(~prep.test_mask)
    ds = prep.dataset
    out = [{"path": ds.names[rows[i]], "label": str(ds.labels[rows[i]]), "score": round(float(other[i]), 6)}
           for i in np.flatnonzero(other >= high)]
    return sorted(out, key=lambda d: -d["score"])


def leak_free_test(prep: Prepared, rung: Rung) -> dict | None:
    """Held-out F1 of a rung without the held-out patches whose binarized copy is in training.

    None when no held-out patch has one. ``f1_change`` is the F1 without them minus the F1 with
    them (None when either is undefined).
    """
    if prep.check is None or not prep.check.figures["leaked_test_binary"]:
        return None
    leaked = np.zeros(len(prep.test_mask), bool)
    for i, finding, _ in prep.check.findings:
        if finding == "leaked-binary":
            leaked[i] = True
    keep = ~leaked[prep.test_mask]
    m = detection_metrics(prep.y_test[keep], np.asarray(rung.test_pred, bool)[keep])
    before = rung.test["f1"]
    change = None if m["f1"] is None or before is None else float(m["f1"] - before)
    return {"n": int(keep.sum()), "left_out": int((~keep).sum()), "f1": m["f1"], "f1_change": change}


def conclude(rungs: list[Rung], y_test: np.ndarray) -> Rung | None:
    """Mark the recommended rung (one-standard-error rule on CV F1) and compare neighbours.

    "Smallest" is by flash bytes when every rung's firmware cost is known, else by parameters
    (:func:`pixelfit.evaluate._spec.cost_order`). Each rung is compared with the next smaller rung
    of its family on the held-out patches with McNemar's test. Returns the recommended rung, or None without cross-validation.
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
    _, order = cost_order(rungs)
    rank = {i: pos for pos, i in enumerate(order)}
    pick = one_standard_error_choice([r.cv["f1_mean"] if r.cv else None for r in rungs],
                                     [r.cv["f1_std"] if r.cv else None for r in rungs], folds,
                                     [rank[i] for i in range(len(rungs))])
    if pick is None:
        return None
    rungs[pick].recommended = True
    return rungs[pick]

