"""Will a rung hold up? Bias and variance, learning curves and deployment stress tests.

:func:`run_checks` runs after the ladder's main pass, on its finished rungs, as a generator of the
same :class:`~pixelfit.ladder.Progress` records (a :class:`CheckProgress` carries the results so
far); it checks a cancel callback between fits. The CLI and the window's trainer process both call
it, so both give the same figures.

- Bias and variance: every rung is refitted on ``B`` bootstrap replicates of the training part
  (drawn within each class, so every replicate keeps the class counts; the same draws for every
  rung) and the replicates' held-out predictions are decomposed after Domingos (2000),
  :func:`pixelfit.evaluate.bias_variance_01`.
- Learning curve: the recommended rung and its two neighbours in its family, trained on 10, 20,
  40, 70 and 100 % of each training fold of a stratified 3-fold split of the training part, scored
  on the fold left out (CV error) and on the held-out part (held-out error).
- Stress tests: the grey held-out patches perturbed (shifts, gain, offset, noise, a stuck pixel,
  the threshold moved), then binarized by the rung's own binarizer and predicted.

On a large set (see :data:`pixelfit.conventions.SUBSAMPLE_PATCHES` and ``HELD_OUT_SAMPLE``) the
refits of the first two run on the stratified training subsample the ladder's CV folds used, and
the stress tests on a stratified subsample of the held-out part.
"""

from __future__ import annotations

import dataclasses
import functools
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
from sklearn.base import clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import StratifiedKFold
from threadpoolctl import threadpool_limits

from pixelfit.conventions import AUGMENTS, DEFAULT_REPLICATES

__all__ = ["AUGMENTS", "DEFAULT_REPLICATES", "CheckProgress", "CheckSettings", "Checks", "augment", "run_checks",
           "stress_rung", "stress_inputs", "most_important_pixel", "bootstrap_indices", "stratified_order",
           "curve_rungs", "curve_splits", "curve_sizes", "FRACTIONS", "CURVE_FOLDS", "THRESHOLD_MOVES"]
from pixelfit.data import Binarizer, grey_perturbations, stuck_pixel, with_shifts
from pixelfit.errors import PixelfitError
from pixelfit.evaluate import bias_variance_01, detection_metrics, last_segment_slope
from pixelfit.families import FAMILIES
from pixelfit.ladder import (
    CancelFn,
    LadderCancelled,
    Prepared,
    Progress,
    Rung,
    held_out_sample,
    in_threads,
    stratified_subsample,
    training_sample,
)
from pixelfit.models import LutRule, SearchCancelled

#: Training fractions of the learning curve.
FRACTIONS = (0.1, 0.2, 0.4, 0.7, 1.0)
#: Folds (repeats) of the learning curve.
CURVE_FOLDS = 3
#: Threshold moves of the stress tests for binarizers with one global threshold.
THRESHOLD_MOVES = (-5, 5)


@dataclass
class CheckSettings:
    """What the post-pass runs: ``bias_variance`` replicates (0: off), learning curve, stress tests."""

    bias_variance: int = DEFAULT_REPLICATES
    learning_curve: bool = True
    stress: bool = True
    seed: int = 0
    #: refits run at once on threads (the results do not depend on it)
    workers: int = 1

    def __post_init__(self) -> None:
        if self.bias_variance < 0 or self.bias_variance == 1:
            raise PixelfitError(f"--bias-variance must be 0 (off) or at least 2 replicates, not {self.bias_variance}")


@dataclass
class Checks:
    """Results of the post-pass: per rung key, and the learning curve over a few rungs."""

    bias_variance: dict[str, dict | None] = field(default_factory=dict)
    stress: dict[str, dict] = field(default_factory=dict)
    learning_curve: dict | None = None

    def rung_entry(self, key: str) -> dict:
        """The keys a rung's entry in summary.json (and its rule file) gains: None when not run."""
        return {"bias_variance": self.bias_variance.get(key), "stress": self.stress.get(key)}


@dataclass
class CheckProgress(Progress):
    """A step of the post-pass; ``checks`` holds everything finished so far when a piece finished."""

    checks: Checks | None = None


def augment(prep: Prepared, mode: str | None) -> Prepared:
    """``prep`` with its training rows extended; the held-out part is untouched.

    ``shift1``: every grey training patch plus its eight one-pixel shifts (edges replicated),
    binarized by the binarizer already fitted on the training patches. ``none``/None: as is.
    """
    if mode in (None, "none"):
        return prep
    if mode != "shift1":
        raise PixelfitError(f"unknown --augment {mode!r}; use one of: {', '.join(AUGMENTS)}")
    grey = prep.dataset.images[~prep.test_mask]
    if len(grey) != len(prep.y_train):
        raise PixelfitError("--augment needs the grey training patches")
    X = prep.binarizer.transform(with_shifts(grey)).reshape(len(grey) * 9, -1)
    return dataclasses.replace(prep, X_train=X, y_train=np.tile(prep.y_train, 9), augment=mode)


def _fit(est, X, y, cancel: CancelFn | None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # the main pass already notes it per rung
        try:
            if isinstance(est, LutRule):
                return est.fit(X, y, cancel=cancel)
            return est.fit(X, y)
        except SearchCancelled:
            raise LadderCancelled from None


def _predict(est, X) -> np.ndarray:
    return np.asarray(est.predict(X), dtype=bool)


# --------------------------------------------------------------------------------------------
# stress tests


def most_important_pixel(rung: Rung) -> int:
    """Flat index of the rung's most important pixel: its own map, else its permutation map.

    The largest absolute value wins, the lowest index among equals; a rung whose maps are all zero
    (the constant) gets pixel 0, which it ignores like every other.
    """
    for kind in ("native", "permutation"):
        m = rung.importance.get(kind)
        if m is not None and np.any(np.nan_to_num(np.abs(m)) > 0):
            return int(np.argmax(np.nan_to_num(np.abs(np.asarray(m, np.float64))).ravel()))
    return 0


def stress_inputs(binarizer: Binarizer, grey: np.ndarray, seed: int = 0) -> dict[str, np.ndarray]:
    """Binarized held-out matrices (n, n_pixels) under every perturbation that is the same for all rungs."""
    n = len(grey)
    out = {name: binarizer.transform(img).reshape(n, -1) for name, img in grey_perturbations(grey, seed)}
    if binarizer.method in ("fixed", "otsu") and binarizer.threshold is not None:
        for move in THRESHOLD_MOVES:
            moved = Binarizer(binarizer.method, float(binarizer.threshold) + move, binarizer.invert)
            out[f"threshold:{move:+d}"] = moved.transform(grey).reshape(n, -1)
    return out


def stress_rung(rung: Rung, binarizer: Binarizer, grey: np.ndarray, y: np.ndarray,
                shared: dict[str, np.ndarray]) -> dict:
    """Held-out precision, recall and F1 of one rung under each perturbation, and the worst F1 drop.

    The drop is measured from the rung's F1 on the unperturbed held-out patches (kept in
    ``worst.f1_unperturbed``); a perturbation under which F1 is undefined takes no part in the
    worst drop, and ``worst`` names the first of equal drops in the order the names are listed.
    """
    n = len(grey)
    base = detection_metrics(y, _predict(rung.estimator, binarizer.transform(grey).reshape(n, -1)))["f1"]
    inputs = dict(shared)
    pixel = most_important_pixel(rung)
    for level in (0, 255):
        inputs[f"stuck:{level}"] = binarizer.transform(stuck_pixel(grey, pixel, level)).reshape(n, -1)
    w = grey.shape[2]
    result: dict = {}
    worst: dict = {"name": None, "f1_drop": None, "f1_unperturbed": base}
    for name, X in inputs.items():
        m = detection_metrics(y, _predict(rung.estimator, X))
        entry = {"precision": m["precision"], "recall": m["recall"], "f1": m["f1"]}
        if name.startswith("stuck:"):
            entry["pixel"] = [pixel // w, pixel % w]
        result[name] = entry
        if base is not None and m["f1"] is not None:
            drop = float(base - m["f1"])
            if worst["f1_drop"] is None or drop > worst["f1_drop"]:
                worst = {"name": name, "f1_drop": drop, "f1_unperturbed": base}
    result["worst"] = worst
    return result


# --------------------------------------------------------------------------------------------
# bias and variance


def bootstrap_indices(y: np.ndarray, replicates: int, seed: int) -> list[np.ndarray]:
    """Bootstrap draws of the training rows, within each class (the class counts stay as they are)."""
    rng = np.random.default_rng([seed, 2000])
    pos, neg = np.flatnonzero(y), np.flatnonzero(~y)
    return [np.concatenate([rng.choice(pos, len(pos)), rng.choice(neg, len(neg))]) for _ in range(replicates)]


# --------------------------------------------------------------------------------------------
# learning curves


def stratified_order(y: np.ndarray, seed: int) -> np.ndarray:
    """A seeded order of ``y``'s rows in which every prefix holds each class in about its share."""
    rng = np.random.default_rng(seed)
    key = np.empty(len(y))
    for cls in (False, True):
        idx = np.flatnonzero(y == cls)
        idx = idx[rng.permutation(len(idx))]
        key[idx] = (np.arange(len(idx)) + 0.5) / max(1, len(idx))
    return np.argsort(key, kind="stable")


def curve_rungs(rungs: list[Rung], center: Rung) -> list[Rung]:
    """The center rung and its neighbours in its family: one smaller and one larger where they exist."""
    fam = sorted((r for r in rungs if r.family == center.family), key=lambda r: r.size)
    i = next(j for j, r in enumerate(fam) if r.size == center.size)
    lo = max(0, min(i - 1, len(fam) - 3))
    return fam[lo:lo + 3]


def curve_splits(prep: Prepared, seed: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """The learning curve's folds: (training rows in stratified order, validation rows)."""
    y = prep.y_train
    folds = min(CURVE_FOLDS, int(min(y.sum(), (~y).sum())))
    if folds < 2:
        return []
    splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    return [(tr[stratified_order(y[tr], seed + i)], va) for i, (tr, va) in enumerate(splitter.split(prep.X_train, y))]


def curve_sizes(n: int) -> list[int]:
    """Training rows at each fraction of ``n``: at least 2."""
    return [max(2, int(round(f * n))) for f in FRACTIONS]


# --------------------------------------------------------------------------------------------
# the post-pass


def run_checks(prep: Prepared, rungs: list[Rung], grey_test: np.ndarray | None, recommended: Rung | None = None,
               settings: CheckSettings | None = None, cancel: CancelFn | None = None) -> Iterator[CheckProgress]:
    """Run the checks on finished rungs, yielding a :class:`CheckProgress` per step.

    ``grey_test`` holds the grey held-out patches (n_test, height, width) in the order of
    ``prep.y_test``; without them (None) the stress tests are skipped. ``recommended`` is the
    center of the learning curve (none without it). Raises
    :class:`~pixelfit.ladder.LadderCancelled` between fits when ``cancel()`` returns True; the
    pieces finished before it were yielded already.
    """
    settings = settings or CheckSettings()
    with threadpool_limits(limits=1):
        yield from _checks(prep, rungs, grey_test, recommended, settings, cancel)


def _checks(prep: Prepared, rungs: list[Rung], grey_test, recommended, settings: CheckSettings,
            cancel: CancelFn | None) -> Iterator[CheckProgress]:
    out = Checks(bias_variance={r.key: None for r in rungs})
    seed = settings.seed
    # A large set: the refits run on the same stratified subsample of the training part as the
    # ladder's CV folds, and the stress tests on a stratified subsample of the held-out part.
    rows = training_sample(prep.y_train, seed)
    if rows is not None:
        prep = dataclasses.replace(prep, X_train=prep.X_train[rows], y_train=prep.y_train[rows])
    do_stress = settings.stress and grey_test is not None and len(grey_test) == len(prep.y_test)
    lc_rungs = curve_rungs(rungs, recommended) if settings.learning_curve and recommended is not None else []
    splits = curve_splits(prep, seed) if lc_rungs else []
    B = settings.bias_variance
    total = (len(rungs) if do_stress else 0) + len(lc_rungs) * len(splits) * len(FRACTIONS) + B * len(rungs)
    done = 0

    def stop() -> None:
        if cancel is not None and cancel():
            raise LadderCancelled

    if do_stress:
        assert grey_test is not None
        grey, y_stress = np.asarray(grey_test, np.uint8), prep.y_test
        few = held_out_sample(y_stress, seed)
        if few is not None:
            grey, y_stress = grey[few], y_stress[few]
        shared = stress_inputs(prep.binarizer, grey, seed)
        for r in rungs:
            stop()
            out.stress[r.key] = stress_rung(r, prep.binarizer, grey, y_stress, shared)
            done += 1
            yield CheckProgress(done, total, f"{r.key}: stress tests", checks=out)
    if splits:
        yield from _learning_curve(prep, lc_rungs, splits, out, seed, done, total, stop, cancel, settings.workers)
        done += len(lc_rungs) * len(splits) * len(FRACTIONS)
    if B:
        draws = bootstrap_indices(prep.y_train, B, seed)
        X, y = prep.X_train, prep.y_train
        for r in rungs:
            template = _template(r, prep, seed)
            preds = np.empty((B, len(prep.y_test)), bool)

            def replicate(b: int, idx: np.ndarray, r: Rung = r, template=template) -> np.ndarray:
                stop()
                if r.subsample is not None:  # the rung's own procedure: a stratified subsample of the draw
                    idx = idx[stratified_subsample(y[idx], r.subsample["n"], seed + b)]
                return _predict(_fit(clone(template), X[idx], y[idx], cancel), prep.X_test)

            results = in_threads([functools.partial(replicate, b, idx) for b, idx in enumerate(draws)],
                                 settings.workers)
            try:
                for b in range(B):
                    preds[b] = next(results)
                    done += 1
                    if b + 1 < B:
                        yield CheckProgress(done, total, f"{r.key}: replicate {b + 1} of {B}")
            finally:
                results.close()
            out.bias_variance[r.key] = bias_variance_01(preds, prep.y_test)
            yield CheckProgress(done, total, f"{r.key}: bias and variance", checks=out)
    yield CheckProgress(done, total, "checks done", checks=out)


def _template(r, prep, seed):
    """An unfitted estimator of the rung; a truth table searches as the ladder decided for the rung
    (exhaustive up to the same size), without timing its search again on every refit."""
    template = FAMILIES[r.family].make(r.size, prep.n_pixels, seed)
    exact = (r.search or {}).get("largest_exact_size")
    if isinstance(template, LutRule) and exact is not None:
        template.set_params(exact_size=int(exact))
    return template


def _learning_curve(prep, lc_rungs, splits, out: Checks, seed, done, total, stop, cancel,
                    workers: int = 1) -> Iterator[CheckProgress]:
    X, y = prep.X_train, prep.y_train
    points, slope, verdict = [], {}, {}
    for r in lc_rungs:
        template = _template(r, prep, seed)
        cv = np.full((len(splits), len(FRACTIONS)), np.nan)
        test = np.full_like(cv, np.nan)

        def point(rows: np.ndarray, va: np.ndarray, template=template) -> tuple[float, float]:
            stop()
            try:
                est = _fit(clone(template), X[rows], y[rows], cancel)
            except ValueError:  # a family that refuses a sample (one class): the point stays empty
                return np.nan, np.nan
            return (float(np.mean(_predict(est, X[va]) != y[va])),
                    float(np.mean(_predict(est, prep.X_test) != prep.y_test)))

        tasks, where = [], []
        for i, (tr, va) in enumerate(splits):
            # A subsampled rung's curve spans the sizes it is trained at: fractions of its subsample.
            cap = len(tr) if r.subsample is None else min(len(tr), r.subsample["n"])
            for j, n in enumerate(curve_sizes(cap)):
                tasks.append(functools.partial(point, tr[:n], va))
                where.append((i, j))
        results = in_threads(tasks, workers)
        try:
            for i, j in where:
                cv[i, j], test[i, j] = next(results)
                done += 1
                yield CheckProgress(done, total, f"{r.key}: learning curve {FRACTIONS[j]:.0%} of fold {i + 1}")
        finally:
            results.close()
        for j, f in enumerate(FRACTIONS):
            points.append({"rung": r.key, "fraction": f, "cv_error": _mean(cv[:, j]), "cv_error_std": _std(cv[:, j]),
                           "test_error": _mean(test[:, j]), "test_error_std": _std(test[:, j])})
        s = last_segment_slope(list(FRACTIONS), cv)
        verdict[r.key] = s.pop("verdict")
        slope[r.key] = s
    out.learning_curve = {"rungs": [r.key for r in lc_rungs], "fractions": list(FRACTIONS), "repeats": len(splits),
                          "points": points, "slope": slope, "verdict": verdict,
                          "basis": "fractions of each training fold of a stratified split of the training part; "
                                   "cv_error on the fold left out, test_error on the held-out part; slope and "
                                   "verdict from the CV error over the last segment"}
    yield CheckProgress(done, total, "learning curve done", checks=out)


def _mean(v: np.ndarray) -> float | None:
    v = v[np.isfinite(v)]
    return float(v.mean()) if len(v) else None


def _std(v: np.ndarray) -> float | None:
    v = v[np.isfinite(v)]
    return float(v.std(ddof=1)) if len(v) > 1 else None
