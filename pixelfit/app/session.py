"""The state of one desktop session, in plain Python: no Qt here.

:class:`Session` holds what the window shows (the imported patches, the binarization, the ladder
settings, the trained rungs, the selected rung, the threshold) and announces every change as a
plain callback event. Widgets subscribe to events and write back only through the setters, so
the whole flow can be driven and checked without a window, and nothing here can be touched from
a worker thread by accident: workers hand their data to the GUI thread, which calls the setters.

Events (name: when)

``dataset``     a dataset was opened (or closed)
``prep``        binarization or positive class changed; the binarized patches were rebuilt
``gallery``     the class shown in the patch gallery changed
``settings``    the ladder settings changed
``run``         a ladder run started or ended (see :attr:`Session.running`)
``progress``    a step of the running ladder finished
``rungs``       the list of trained rungs (or their marks) changed
``selection``   another rung was selected
``threshold``   the score threshold of the selected rung moved
``map``         the kind of per-pixel map shown changed
``check``       the data check's suspect labels changed (after a climb)
``axis``        the x axis of the ladder plot changed
``spec``        the spec changed; every rung's spec entry and the answer were renewed
``checks``      results of the checks after the ladder arrived (bias and variance, learning curve,
                stress tests), or were cleared
``explain``     a patch's call by the selected rung was explained (see :attr:`Session.explanation`)
``compare``     two rungs were picked for comparison, or the pair was cleared (:attr:`Session.compared`)
``message``     a line for the status area: ``(text, is_error)``
``busy``        patches started or stopped being read or prepared (see :attr:`Session.preparing`)

Reading a file, preparing its patches and finding suspects take seconds on a large set; the
session hands each such job to :attr:`Session.runner`, which runs it here and now by default.
The window's runner runs the job on a worker thread and keeps its event loop turning meanwhile,
so the session's code reads as plain calls while the window stays responsive. Each job is
computed from values captured before it starts and changes nothing until it returns; what the
panels need per patch set (class counts, the histogram, the rows of each data-check finding) is
computed in the job too (:class:`PrepSummary`), so no panel walks a million patches on the GUI thread.

The data check itself comes with every prepared set (:attr:`Prepared.check`, the same core call
as ``pixelfit check``), so ``prep`` announces its new findings too.
"""

from __future__ import annotations

import dataclasses
import math
import os
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

from pixelfit.conventions import DEFAULT_FOLDS, DEFAULT_MAX_SIZE
from pixelfit.data import FINDINGS, Binarizer, DataCheck, Dataset, grey_histogram, load_dataset
from pixelfit.errors import PixelfitError
from pixelfit.evaluate import Spec, apply_spec, compare_calls, detection_metrics, operating_points
from pixelfit.explain import explain_call
from pixelfit.families import FAMILIES, FAMILY_ORDER, plan_rungs
from pixelfit.firmware import export_c
from pixelfit.ladder import Prepared, Rung, conclude, effective_folds, measure_integer, prepare, suspect_labels
from pixelfit.outputs import error_curves, write_fit_outputs
from pixelfit.review import library_versions, write_report
from pixelfit.robustness import DEFAULT_REPLICATES, Checks, CheckSettings
from pixelfit.rulefile import Rule, load_rule, parse_rule, rule_document, save_rung

EVENTS = ("dataset", "prep", "gallery", "settings", "run", "progress", "rungs", "selection", "threshold",
          "map", "spec", "check", "axis", "checks", "explain", "compare", "message", "busy")

#: runner(job) -> job(), raising what it raises; see the module docstring.
Runner = Callable[[Callable[[], Any]], Any]
T = TypeVar("T")


def run_here(job: Callable[[], T]) -> T:
    """The default :data:`Runner`: the job on the calling thread."""
    return job()


class PrepSummary:
    """What the panels show of one prepared set, computed once with it (off the GUI thread in the window).

    ``counts``: patches per class (sorted by name); ``histogram``: grey-level counts of the
    training pixels and the thresholds in use (see :meth:`Session.histogram`); per data-check
    finding, the flagged rows in import order and each one's group name (``rows``, ``groups``).
    """

    def __init__(self, dataset: Dataset, prep: Prepared | None):
        self.dataset = dataset
        self.prep = prep
        labels, n = np.unique(dataset.labels, return_counts=True)
        self.counts = {str(c): int(k) for c, k in zip(labels, n)}
        self.histogram: tuple[np.ndarray, np.ndarray | None] = (np.zeros(256, np.int64), None)
        self.rows: dict[str, np.ndarray] = {f: np.zeros(0, np.intp) for f in FINDINGS}
        self.groups: dict[str, np.ndarray] = {f: np.zeros(0, object) for f in FINDINGS}
        if prep is None:
            return
        train = prep.dataset.images[~prep.test_mask]
        counts = grey_histogram(train).astype(np.int64)
        b = prep.binarizer
        thresholds = np.array([b.threshold], np.float64) if b.method in ("fixed", "otsu") else b.patch_thresholds(train)
        self.histogram = (counts, thresholds)
        if prep.check is not None:
            found: dict[str, tuple[list[int], list[str]]] = {f: ([], []) for f in FINDINGS}
            for i, f, g in prep.check.findings:
                found[f][0].append(i)
                found[f][1].append(g)
            for f, (rows, groups) in found.items():
                r = np.asarray(rows, np.intp)
                order = np.argsort(r, kind="stable")
                self.rows[f] = r[order]
                self.groups[f] = np.asarray(groups, object)[order]


def suspect_rows(dataset: Dataset, suspects: list[dict] | None) -> np.ndarray:
    """Dataset rows of the suspects (highest score first), found by their names."""
    if not suspects:
        return np.zeros(0, np.intp)
    where = {n: i for i, n in enumerate(dataset.names)}
    return np.array([where[s["path"]] for s in suspects if s["path"] in where], np.intp)

#: Per-pixel maps the inspector can show: rung maps first, then maps of the training data.
MAP_KINDS = {"native": "the rung's own map", "permutation": "permutation (held-out)",
             "mean_difference": "data: lit-rate difference", "mutual_information": "data: mutual information"}

#: The x axes the ladder plot offers: name -> (label, the rung's number on that axis given the
#: patch's pixel count; None leaves the rung out of the plot). Another axis is one more entry
#: reading another number of the rung (a cost figure such as flash bytes, when rungs carry one).
LADDER_AXES: dict[str, tuple[str, Callable[[Rung, int], float | None]]] = {
    "pixels": ("pixels read", lambda r, p: float(p if r.pixels is None else len(r.pixels))),
    "parameters": ("parameters", lambda r, p: float(r.figures["parameters"])),
    "flash": ("flash bytes of the integer-only C export",
              lambda r, p: None if not r.cost else float(r.cost["flash_bytes"])),
}
#: Horizontal distance between rungs of different families that fall on one x value, in units of
#: the plot's log2 spacing: enough to click each on its own.
COINCIDENT_OFFSET = 0.12


def axis_position(value: float) -> float:
    """Horizontal position of a value on the ladder plot: log2 spacing, 0 one step left of 1."""
    return math.log2(value) if value >= 1 else -1.0


def ladder_positions(rungs: list[Rung], axis: str, n_pixels: int) -> dict[str, tuple[float, float]]:
    """Per rung key: (its value on ``axis``, its horizontal position in the plot).

    Rungs of different families with the same value are spread side by side, in family order,
    COINCIDENT_OFFSET apart and centred on the value, so each can be told apart and clicked.
    """
    value_of = LADDER_AXES[axis][1]
    values = {r.key: value_of(r, n_pixels) for r in rungs}
    groups: dict[float, list[Rung]] = {}
    for r in rungs:
        v = values[r.key]
        if v is not None:
            groups.setdefault(v, []).append(r)
    out: dict[str, tuple[float, float]] = {}
    for v, members in groups.items():
        members = sorted(members, key=lambda r: (FAMILY_ORDER.index(r.family), r.size))
        for i, r in enumerate(members):
            out[r.key] = (v, axis_position(v) + (i - (len(members) - 1) / 2) * COINCIDENT_OFFSET)
    return out


def nearest_point(points: list[tuple[str, float, float]], x: float, y: float) -> str | None:
    """Key of the point (key, x, y) nearest to (x, y), in the caller's (screen) units."""
    if not points:
        return None
    return min(points, key=lambda p: (p[1] - x) ** 2 + (p[2] - y) ** 2)[0]

#: The window's name for each setting a core refusal names in its ``field`` (the labels of the controls).
CONTROL_LABELS = {"positive": "class to find", "binarize": "binarization", "folds": "folds", "max_size": "largest size",
                  "seed": "seed", "test_fraction": "held-out share", "out": "output folder"}

#: A small ladder that trains in seconds on a laptop; the user widens it.
DEFAULT_FAMILIES = ("constant", "lut", "nb", "logistic", "tree")


def duration_text(seconds: float) -> str:
    """A rough duration in words: '40 s', '3 min', '1 h 10 min'."""
    s = max(0, int(round(seconds)))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{round(s / 60)} min"
    return f"{s // 3600} h {round(s % 3600 / 60)} min"


def map_name(rung: Rung | None, kind: str) -> str:
    """What a map of ``kind`` shows for ``rung``: the family's own map has a name per family."""
    if kind == "native" and rung is not None:
        return FAMILIES[rung.family].map_name or "no map of its own"
    return MAP_KINDS[kind]


@dataclass(frozen=True)
class RunSpec:
    """Everything a worker needs to train a ladder; plain data, handed to the worker thread."""

    prep: Prepared
    plan: list[tuple[str, int]]
    folds: int
    seed: int
    scheduler: str | None = None  # a Dask scheduler's address: the lut searches run on that cluster
    checks: CheckSettings | None = None  # the post-pass after the ladder, None for none
    grey_test: np.ndarray | None = None  # grey held-out patches, for the stress tests (None: taken from prep)

    def held_out_grey(self) -> np.ndarray:
        """The grey held-out patches: ``grey_test``, else a copy of the prepared set's (a large copy
        on a large set: the worker makes it, on its own thread)."""
        if self.grey_test is not None:
            return self.grey_test
        return self.prep.dataset.images[self.prep.test_mask]


class Session:
    """Observable state of the application. See the module docstring for the events."""

    def __init__(self) -> None:
        self._listeners: dict[str, list[Callable]] = {e: [] for e in EVENTS}
        self.dataset: Dataset | None = None
        self.binarizer = Binarizer("otsu")
        self.positive: str | None = None
        self.test_fraction = 0.25
        self.seed = 0
        self.split = "group-duplicates"
        self.prep: Prepared | None = None
        self.gallery_class: str | None = None
        self.families: list[str] = list(DEFAULT_FAMILIES)
        self.max_size: int | None = DEFAULT_MAX_SIZE  # the command line's defaults (pixelfit.conventions)
        self.folds = DEFAULT_FOLDS
        self.scheduler: str | None = None
        self.replicates = DEFAULT_REPLICATES  # bootstrap replicates per rung; 0: no bias-variance check
        self.checks: Checks | None = None
        self.running = False
        self.progress_state: tuple[int, int, str] = (0, 0, "")
        self._run_started: float | None = None  # time.monotonic() when the current run started
        self.run_prep: Prepared | None = None  # the prepared data the current rungs were trained on
        self.run_settings: dict | None = None  # the settings of that run, as `pixelfit fit` records them
        self.planned = 0
        self.rungs: list[Rung] = []
        self.recommended: Rung | None = None
        self.selected: Rung | None = None
        self._user_selected = False
        self.threshold = 0.5
        #: Where the selected rung's threshold was chosen: default, cv, train or held-out.
        self.threshold_chosen_on = "default"
        self._thresholds: dict[str, tuple[float, str]] = {}  # per rung key: the threshold the user set
        self.map_kind = "native"
        self.ladder_axis = "pixels"
        #: The spec the rungs are judged against (None: no spec), and its answer.
        self.spec: Spec | None = None
        self.answer: dict | None = None
        self.saved_paths: list[Path] = []
        self._data_maps: tuple[Prepared, dict[str, np.ndarray]] | None = None  # maps of one prepared set
        self._at_threshold: tuple | None = None  # (rung, threshold, prepared set, metrics) last computed
        self._reach: tuple | None = None  # (rung, spec, spec_reach()) last computed
        #: The last explained call: the facts of :func:`pixelfit.explain.explain_call` with the
        #: patch's ``row``, ``name``, ``label`` and ``subset``; None when there is none.
        self.explanation: dict | None = None
        #: The two rungs picked for comparison (keys), or None.
        self.compared: tuple[str, str] | None = None
        self._rule_cache: tuple[tuple, Rule] | None = None
        #: Runs the long jobs (reading, preparing, finding suspects); see the module docstring.
        self.runner: Runner = run_here
        #: True while a job runs: the controls that would start another wait.
        self.preparing = False
        self._summary: PrepSummary | None = None
        self._suspect_rows: tuple[object, np.ndarray] | None = None  # (suspects list, their rows)

    # ---- events -------------------------------------------------------------------------------

    def subscribe(self, event: str, fn: Callable) -> Callable[[], None]:
        """Call ``fn(*args)`` on ``event``; returns a function that unsubscribes it."""
        if event not in self._listeners:
            raise KeyError(f"unknown event {event!r}")
        self._listeners[event].append(fn)
        return lambda: self._listeners[event].remove(fn)

    def _emit(self, event: str, *args) -> None:
        for fn in list(self._listeners[event]):
            fn(*args)

    def say(self, text: str, error: bool = False) -> None:
        self._emit("message", text, error)

    def refuse(self, exc: PixelfitError) -> None:
        """A core refusal as an error message, led by the label of the control it concerns."""
        label = CONTROL_LABELS.get(exc.field or "")
        self.say(f"{label}: {exc}" if label else str(exc), True)

    # ---- data ---------------------------------------------------------------------------------

    def _off_thread(self, job: Callable[[], T]) -> T:
        """``job()`` through :attr:`runner`, with :attr:`preparing` set (and ``busy`` told) meanwhile."""
        self.preparing = True
        self._emit("busy")
        try:
            return self.runner(job)
        finally:
            self.preparing = False
            self._emit("busy")

    def _refuse_while_preparing(self) -> bool:
        if self.preparing:
            self.say("the patches are still being prepared; wait a moment", True)
        return self.preparing

    def _prepare_job(self, dataset: Dataset, positive: str | None
                     ) -> Callable[[], tuple[Prepared | PixelfitError, PrepSummary]]:
        """A job that prepares ``dataset`` with the current settings (captured now) and summarizes
        it: returns (prepared set or the PixelfitError that refused it, summary)."""
        binarizer, fraction, seed, split = self.binarizer, self.test_fraction, self.seed, self.split

        def job() -> tuple[Prepared | PixelfitError, PrepSummary]:
            try:
                prep: Prepared | PixelfitError = prepare(dataset, binarizer, positive, fraction, seed, split)
            except PixelfitError as exc:
                prep = exc
            if isinstance(prep, Prepared):
                prep.train_fingerprint  # noqa: B018 - a cached hash of the training set, made here, not when a rule is saved
            return prep, PrepSummary(dataset, prep if isinstance(prep, Prepared) else None)

        return job

    def open(self, path: str | os.PathLike) -> bool:
        """Import ``path``; on bad input the error becomes a message and the old state stays."""
        if self.running:
            self.say("a ladder is running; stop it before opening other patches", True)
            return False
        if self._refuse_while_preparing():
            return False
        dataset: list[Dataset] = []

        def job() -> tuple[Prepared | PixelfitError, PrepSummary]:
            dataset.append(load_dataset(path))
            return self._prepare_job(dataset[0], None)()

        try:
            prep, summary = self._off_thread(job)
        except PixelfitError as exc:
            self.refuse(exc)
            return False
        except OSError as exc:  # a folder vanishing mid-import, a dead network share
            self.say(f"{path}: cannot read ({exc.strerror or exc})", True)
            return False
        ds = dataset[0]
        self.dataset = ds
        self.prep = None  # the old patches' binarized set must not meet the new patches
        self.positive = None
        self.gallery_class = None
        self._clear_rungs()
        self.progress_state = (0, 0, "")  # nothing climbed on these patches yet
        self.planned = 0
        self._summary = summary
        self._emit("dataset")
        self._take_prep(prep, summary)
        self._emit("progress")
        note = f"; skipped {len(ds.skipped)} file(s)" if ds.skipped else ""
        self.say(f"opened {Path(ds.source).name or ds.source}: {len(ds)} patches of {ds.shape[0]}x{ds.shape[1]}{note}")
        return True

    def set_binarizer(self, method: str, threshold: float | None = None, invert: bool = False) -> bool:
        """Change the binarization; the gallery and histogram follow. Bad settings -> message."""
        if self._refuse_while_preparing():
            return False
        try:
            b = Binarizer(method, None if method != "fixed" else threshold, invert)
        except PixelfitError as exc:
            self.refuse(exc)
            return False
        if b == self.binarizer:
            return True
        self.binarizer = b
        self._rebuild_prep()
        return True

    def set_positive(self, name: str | None) -> None:
        if name == self.positive or self._refuse_while_preparing():
            return
        self.positive = name
        self._rebuild_prep()

    def _rebuild_prep(self) -> None:
        if self.dataset is None:
            self.prep = None
            self._emit("prep")
            return
        prep, summary = self._off_thread(self._prepare_job(self.dataset, self.positive))
        self._take_prep(prep, summary)

    def _take_prep(self, prep: Prepared | PixelfitError, summary: PrepSummary) -> None:
        if isinstance(prep, PixelfitError):
            self.prep = None
            self.refuse(prep)
        else:
            self.prep = prep
            self.positive = prep.positive
        self._summary = summary
        self._emit("prep")

    def summary(self) -> PrepSummary | None:
        """The summary of the current prepared set (of the dataset alone when it could not be
        prepared); None with nothing open. Made here, on the calling thread, when missing."""
        if self.dataset is None:
            return None
        s = self._summary
        # A summary made with the dataset serves while its prepared set is being taken in (prep None).
        if s is None or s.dataset is not self.dataset or (s.prep is not self.prep and self.prep is not None):
            s = self._summary = PrepSummary(self.dataset, self.prep)
        return s

    def class_counts(self) -> dict[str, int]:
        """Patches per class of the open dataset, sorted by class name (empty with nothing open)."""
        s = self.summary()
        return {} if s is None else dict(s.counts)

    def binarized(self, indices: np.ndarray) -> np.ndarray:
        """Binarized patches of shape (len(indices), h, w), bool, with the current settings."""
        prep = self._require_prep()
        return prep.binarizer.transform(prep.dataset.images[np.asarray(indices, dtype=np.intp)])

    def histogram(self) -> tuple[np.ndarray, np.ndarray | None]:
        """Grey-level counts of the training pixels, shape (256,), and the thresholds in use.

        The thresholds are one value for the global methods and one per training patch for the
        per-patch methods; None before a dataset is prepared.
        """
        s = self.summary()
        if self.prep is None or s is None:
            return np.zeros(256, np.int64), None
        return s.histogram

    # ---- data check ---------------------------------------------------------------------------

    @property
    def check(self) -> DataCheck | None:
        """The data check of the prepared set (None before one is prepared)."""
        return None if self.prep is None else self.prep.check

    def check_counts(self) -> dict[str, int]:
        """Flagged patches per finding, in :data:`FINDINGS` order (zero counts included)."""
        return {f: len(self.check_rows(f)) for f in FINDINGS}

    def check_rows(self, finding: str) -> np.ndarray:
        """Dataset rows flagged with ``finding``, in import order (suspects: highest score first)."""
        c = self.check
        s = self.summary()
        if c is None or s is None or self.dataset is None:
            return np.zeros(0, np.intp)
        if finding == "suspect":
            if self._suspect_rows is None or self._suspect_rows[0] is not c.suspects:
                self._suspect_rows = (c.suspects, suspect_rows(self.dataset, c.suspects))
            return self._suspect_rows[1]
        return s.rows[finding]

    def check_group(self, row: int, finding: str) -> np.ndarray:
        """The group a flagged patch belongs to under ``finding``: the patch first, then the others."""
        c = self.check
        s = self.summary()
        if c is None or s is None:
            return np.zeros(0, np.intp)
        rows = s.rows.get(finding, np.zeros(0, np.intp))
        at = int(np.searchsorted(rows, row))
        group = str(s.groups[finding][at]) if at < len(rows) and rows[at] == row else ""
        members = c.members(group)
        return np.concatenate([[row], members[members != row]]).astype(np.intp)

    def _find_suspects(self) -> None:
        if self.run_prep is None or self.run_prep.check is None:
            return
        prep, rungs = self.run_prep, list(self.rungs)
        check = self.run_prep.check

        def job() -> tuple[list[dict] | None, np.ndarray]:
            suspects = suspect_labels(prep, rungs)
            return suspects, suspect_rows(prep.dataset, suspects)

        suspects, rows = self._off_thread(job)
        check.suspects = suspects
        self._suspect_rows = (suspects, rows)
        self._emit("check")

    def set_gallery_class(self, name: str | None) -> None:
        if name == self.gallery_class:
            return
        self.gallery_class = name
        self._emit("gallery")

    def gallery_indices(self) -> np.ndarray:
        """Dataset rows shown in the gallery, in import order."""
        if self.dataset is None:
            return np.zeros(0, np.intp)
        if self.gallery_class is None:
            return np.arange(len(self.dataset))
        return np.flatnonzero(self.dataset.labels == self.gallery_class)

    # ---- ladder -------------------------------------------------------------------------------

    def set_ladder(self, families: list[str] | None = None, max_size: int | None | str = "keep",
                   folds: int | None = None, scheduler: str | None = "keep") -> None:
        """Ladder settings; ``max_size=None`` means no cap; ``scheduler`` '' or None: this machine."""
        if families is not None:
            self.families = [f for f in FAMILY_ORDER if f in families]
        if max_size != "keep":
            self.max_size = None if max_size is None else int(max_size)
        if folds is not None:
            self.folds = int(folds)
        if scheduler != "keep":
            self.scheduler = (scheduler or "").strip() or None
        self._emit("settings")

    def _require_prep(self) -> Prepared:
        if self.prep is None:
            raise PixelfitError("open a dataset (and choose a binarization that splits it) first")
        return self.prep

    def plan(self) -> list[tuple[str, int]]:
        """The rungs a run would train with the current settings (raises PixelfitError)."""
        return self._plan(self._require_prep())

    def _plan(self, prep: Prepared) -> list[tuple[str, int]]:
        if not self.families:
            raise PixelfitError("choose at least one family")
        rungs = plan_rungs(self.families, prep.n_pixels, self.max_size)
        if not rungs:
            raise PixelfitError("no rung to train: the largest size leaves every family empty")
        return rungs

    def plan_text(self) -> str:
        """The plan in words, per family with what its size counts: 'lut 1, 2, 3 pixels; tree depth 1, 2'."""
        by_family: dict[str, list[int]] = {}
        for fam, size in self.plan():
            by_family.setdefault(fam, []).append(size)
        parts = []
        for fam, sizes in by_family.items():
            f = FAMILIES[fam]
            if f.fixed_size:
                parts.append(fam)
                continue
            parts.append(f"{fam} {f.sizes_text(sizes)}")
        n = sum(len(v) for v in by_family.values())
        return f"{n} rung{'s' if n != 1 else ''} to train: " + "; ".join(parts)

    def start_run(self) -> RunSpec | None:
        """Begin a run: the previous rungs are replaced. Returns what the worker needs, or None."""
        if self.running:
            self.say("a ladder is already running", True)
            return None
        if self._refuse_while_preparing():
            return None
        try:
            prep = self._require_prep()
            plan = self._plan(prep)
            effective_folds(prep.y_train, self.folds)  # a bad count is refused here, not in the trainer
        except PixelfitError as exc:
            self.refuse(exc)
            return None
        self._clear_rungs()
        self.run_prep = prep
        if prep.check is not None and prep.check.suspects is not None:
            prep.check.suspects = None  # the suspects of an earlier climb
            self._emit("check")
        self.run_settings = self._fit_settings(prep)
        self.planned = len(plan)
        self.running = True
        self.progress_state = (0, 0, "starting")
        self._run_started = time.monotonic()
        self._emit("run")
        self.say(f"climbing {len(plan)} rungs on {prep.binarizer.describe()} patches")
        # The grey held-out patches are copied by the worker (held_out_grey), not here on the GUI thread.
        return RunSpec(prep, plan, self.folds, self.seed, self.scheduler, CheckSettings(self.replicates, seed=self.seed))

    def report_progress(self, done: int, total: int, message: str) -> None:
        self.progress_state = (done, total, message)
        self._emit("progress")

    def time_left(self, now: float | None = None) -> float | None:
        """Seconds the running ladder still needs, estimated from the time its finished steps
        took (their mean pace times the steps left); None before the first step or after the run."""
        done, total, _ = self.progress_state
        if not self.running or self._run_started is None or done <= 0 or total <= done:
            return None
        elapsed = (time.monotonic() if now is None else now) - self._run_started
        return elapsed / done * (total - done)

    def add_rung(self, rung: Rung) -> None:
        """A finished rung from the worker; the recommendation is renewed with every rung.

        Nothing is selected for the user while the ladder climbs (the first rung is the constant
        rule, rarely worth a look, and showing it costs the window a cascade of paints as the
        climb starts); the user may pick any finished rung, and the recommended one is selected
        when the climb ends unless the user has chosen.
        """
        if self.run_prep is None:
            raise RuntimeError("a rung arrived outside a run (start_run was not called)")
        self.rungs.append(rung)
        self.recommended = conclude(self.rungs, self.run_prep.y_test)
        self.answer = apply_spec(self.rungs, self.run_prep.y_train, self.run_prep.y_test, self.spec)
        for r in self.rungs:
            # Measured by the worker at the rung's own threshold; again here only where the spec moved it.
            if r.quantized is None or r.quantized["threshold"] != r.operating_point["threshold"]:
                measure_integer(r, self.run_prep.X_test, self.run_prep.y_test)
        self._emit("rungs")

    def set_checks(self, checks: Checks) -> None:
        """Results of the checks from the worker (everything finished so far)."""
        self.checks = checks
        self._emit("checks")

    def rung_checks(self, key: str) -> dict:
        """``bias_variance`` and ``stress`` of one rung (None each until measured)."""
        return (self.checks or Checks()).rung_entry(key)

    def decomposition_curves(self) -> dict[str, list[tuple[int, dict]]]:
        """Per family, (size, bias-variance decomposition) of the rungs measured so far."""
        out: dict[str, list[tuple[int, dict]]] = {}
        for r in self.rungs:
            bv = self.rung_checks(r.key)["bias_variance"]
            if bv is not None and bv["loss"] is not None:
                out.setdefault(r.family, []).append((r.size, bv))
        return out

    @property
    def learning_curve(self) -> dict | None:
        return None if self.checks is None else self.checks.learning_curve

    def end_run(self, outcome: str, detail: str = "") -> None:
        """``outcome`` is 'finished', 'cancelled' or 'failed' (``detail`` says why)."""
        self.running = False
        self._emit("run")
        self._find_suspects()
        n = len(self.rungs)
        if outcome == "finished":
            rec = f"; recommended {self.recommended.key}" if self.recommended else ""
            self.say(f"ladder finished: {n} rungs{rec}")
        elif outcome == "cancelled":
            self.say(f"ladder stopped: {n} of {self.planned} rungs finished and kept")
        else:
            self.say(f"ladder failed after {n} rungs: {detail}", True)
        if self.recommended is not None and not self._user_selected:
            self.select(self.recommended.key, by_user=False)

    def _clear_rungs(self) -> None:
        had = bool(self.rungs)
        self._rule_cache = None
        if self.explanation is not None:
            self.explanation = None
            self._emit("explain")
        if self.compared is not None:
            self.compared = None
            self._emit("compare")
        self.rungs = []
        self.recommended = None
        self.answer = None
        self._thresholds = {}
        self.saved_paths = []
        self.run_prep = None
        self.run_settings = None
        self._at_threshold = None
        if self.checks is not None:
            self.checks = None
            self._emit("checks")
        if had:
            self._emit("rungs")
        if self.selected is not None:
            self.selected = None
            self._user_selected = False
            self._emit("selection")

    @property
    def unsaved(self) -> bool:
        """Trained rungs exist and not one of them was saved as a rule file."""
        return bool(self.rungs) and not self.saved_paths

    def rung(self, key: str) -> Rung | None:
        return next((r for r in self.rungs if r.key == key), None)

    def set_ladder_axis(self, axis: str) -> None:
        if axis not in LADDER_AXES:
            raise KeyError(axis)
        if axis != self.ladder_axis:
            self.ladder_axis = axis
            self._emit("axis")

    def ladder_positions(self) -> dict[str, tuple[float, float]]:
        """Per rung key: (value on the chosen x axis, horizontal position); see :func:`ladder_positions`."""
        if not self.rungs or self.run_prep is None:
            return {}
        return ladder_positions(self.rungs, self.ladder_axis, self.run_prep.n_pixels)

    def error_curves(self) -> dict:
        """Train, CV and held-out error and the bound against size, per family (see report)."""
        return error_curves(self.rungs)

    # ---- the selected rung --------------------------------------------------------------------

    def select(self, key: str | None, by_user: bool = True) -> None:
        rung = None if key is None else self.rung(key)
        if key is not None and rung is None:
            return
        self._user_selected = by_user and rung is not None
        if rung is self.selected:
            return
        self.selected = rung
        self.threshold, self.threshold_chosen_on = self._threshold_of(rung)
        self._emit("selection")

    def _threshold_of(self, rung: Rung | None) -> tuple[float, str]:
        """The threshold the user kept for the rung, else its own (the spec's, chosen on CV, or 0.5)."""
        if rung is None:
            return 0.5, "default"
        if rung.key in self._thresholds:
            return self._thresholds[rung.key]
        op = rung.operating_point
        return float(op["threshold"]), op["chosen_on"]

    def set_threshold(self, value: float, chosen_on: str = "held-out") -> None:
        """Move the selected rung's threshold; it is kept for the rung and saved with it.

        ``chosen_on`` says honestly where it was chosen: a threshold moved by hand while the window
        shows held-out figures was chosen on the held-out patches.
        """
        value = float(min(1.0, max(0.0, value)))
        if value == self.threshold and chosen_on == self.threshold_chosen_on:
            return
        self.threshold, self.threshold_chosen_on = value, chosen_on
        if self.selected is not None:
            self._thresholds[self.selected.key] = (value, chosen_on)
        self._emit("threshold")

    def set_map_kind(self, kind: str) -> None:
        if kind not in MAP_KINDS:
            raise KeyError(kind)
        if kind != self.map_kind:
            self.map_kind = kind
            self._emit("map")

    def set_spec(self, precision: float | None, recall: float | None, confidence: float = 0.95,
                 budget_bytes: int | None = None) -> bool:
        """Judge the rungs against a spec (both targets None: no spec); a bad spec -> message, False.

        The same core call as ``pixelfit fit --spec``: thresholds are chosen on each rung's CV (or
        training) scores, and the held-out patches only judge them.
        """
        try:
            spec = None if precision is None and recall is None else Spec(precision, recall, confidence, budget_bytes)
        except PixelfitError as exc:
            self.say(str(exc), True)
            return False
        if spec == self.spec:
            return True
        self.spec = spec
        if self.run_prep is not None:
            self.answer = apply_spec(self.rungs, self.run_prep.y_train, self.run_prep.y_test, spec)
            for r in self.rungs:
                measure_integer(r, self.run_prep.X_test, self.run_prep.y_test)
        if self.selected is not None and self.selected.key not in self._thresholds:
            self.threshold, self.threshold_chosen_on = self._threshold_of(self.selected)
            self._emit("threshold")
        self._emit("spec")
        self._emit("rungs")
        return True

    @property
    def answer_rung(self) -> Rung | None:
        """The rung the spec's answer names, or None."""
        key = (self.answer or {}).get("rung")
        return None if key is None else self.rung(key)

    def held_out_predictions(self) -> np.ndarray | None:
        """Held-out predictions of the selected rung: at the threshold when it has scores."""
        r = self.selected
        if r is None:
            return None
        if r.test_scores is not None:
            return np.asarray(r.test_scores > self.threshold)  # one decision rule everywhere: score above it
        return np.asarray(r.test_pred, bool)

    def threshold_metrics(self) -> dict | None:
        """Held-out metrics of the selected rung at the current threshold (core metrics).

        Kept for the last (rung, threshold): the inspector asks more than once per change, and
        each computation is some milliseconds of Python on the GUI thread.
        """
        pred = self.held_out_predictions()
        if pred is None or self.run_prep is None:
            return None
        last = self._at_threshold
        if last is None or last[0] is not self.selected or last[1] != self.threshold or last[2] is not self.run_prep:
            last = self._at_threshold = (self.selected, self.threshold, self.run_prep,
                                         detection_metrics(self.run_prep.y_test, pred))
        return dict(last[3])

    def target_point(self) -> dict | None:
        """The selected rung's spec entry (threshold chosen on CV or training scores), or None."""
        r = self.selected
        return None if r is None or r.spec is None else r.spec

    def spec_reach(self) -> dict | None:
        """Whether the selected rung reaches the spec's targets at some threshold on the scores
        its threshold is chosen on (CV, else training); None without a spec or scores.

        ``{"reached", "best_precision", "recall_at_best"}``: the best precision any threshold
        gives there, and the highest recall at that precision (None each when no threshold calls
        a patch positive).
        """
        r = self.selected
        if r is None or r.spec is None or self.spec is None or r.choice_scores is None or self.run_prep is None:
            return None
        if self._reach is not None and self._reach[0] is r and self._reach[1] == self.spec:
            return dict(self._reach[2])  # asked on every move of the threshold
        labels = self.run_prep.y_train if r.choice_labels is None else r.choice_labels
        points = operating_points(labels, r.choice_scores)
        targets = self.spec.targets
        reached = any(all(pt[k] >= v for k, v in targets.items()) for pt in points)
        best = max(points, key=lambda pt: (pt["precision"], pt["recall"]), default=None)
        out = {"reached": reached, "best_precision": None if best is None else best["precision"],
               "recall_at_best": None if best is None else best["recall"]}
        self._reach = (r, self.spec, out)
        return dict(out)

    def move_to_spec(self) -> None:
        """Set the selected rung's threshold to the one chosen for the spec (on CV, not held-out);
        nothing when no threshold reaches the targets there."""
        pt = self.target_point()
        reach = self.spec_reach()
        if pt is not None and (reach is None or reach["reached"]):
            self.set_threshold(pt["threshold"], pt["chosen_on"])

    def misses(self) -> tuple[np.ndarray, np.ndarray]:
        """Dataset rows of held-out false positives and false negatives of the selected rung."""
        pred = self.held_out_predictions()
        if pred is None or self.run_prep is None:
            return np.zeros(0, np.intp), np.zeros(0, np.intp)
        rows = np.flatnonzero(self.run_prep.test_mask)
        y = self.run_prep.y_test
        return rows[pred & ~y], rows[~pred & y]

    def heatmap(self) -> tuple[np.ndarray | None, str]:
        """The per-pixel map of the current kind, shape (h, w), and a caption."""
        prep = self.run_prep or self.prep
        if self.map_kind in ("mean_difference", "mutual_information"):
            if prep is None:
                return None, "no data"
            if self._data_maps is None or self._data_maps[0] is not prep:
                if self.preparing:  # asked again while they are computed (seconds on a large set)
                    return None, f"{MAP_KINDS[self.map_kind]}: computing…"
                maps = self._off_thread(prep.data_maps)
                self._data_maps = (prep, maps)
            return self._data_maps[1][self.map_kind], MAP_KINDS[self.map_kind]
        r = self.selected
        if r is None:
            return None, "no rung selected"
        values = r.importance.get(self.map_kind)
        if values is None:
            if self.map_kind == "native":
                return None, f"{r.key}: a {r.family} rung has no per-pixel map of its own; try permutation"
            return None, f"{r.key}: no {MAP_KINDS[self.map_kind]} map"
        return values, f"{r.key}: {map_name(r, self.map_kind)}"

    # ---- saving -------------------------------------------------------------------------------

    def save_selected(self, path: str | os.PathLike) -> Path | None:
        """Write the selected rung as a rule file; returns where it went, or None (message)."""
        r = self.selected
        if r is None:
            self.say("select a rung to save first", True)
            return None
        operating = {"threshold": self.threshold, "chosen_on": self.threshold_chosen_on}
        written = self._write(path, lambda: save_rung(path, self.run_prep, r, operating,
                                                      self.rung_checks(r.key) if self.checks else None))
        if written is None:
            return None
        out = Path(written)
        r.rule_file = str(out)
        self.saved_paths.append(out)
        self.say(f"saved {r.key} to {out}")
        return out

    def _write(self, path, write: Callable[[], object]):
        """Run a file-writing call; a refusal or an OS error becomes a message and None."""
        try:
            return write()
        except PixelfitError as exc:
            self.refuse(exc)
        except OSError as exc:
            self.say(f"{path}: cannot write ({exc.strerror or exc})", True)
        return None

    def export_selected_c(self, header_path: str | os.PathLike) -> tuple[Path, Path] | None:
        """Save the selected rung beside ``header_path`` as ``KEY.json`` (the name *Save rule…*
        offers) and export C from it."""
        header_path = Path(header_path)
        r = self.selected
        if r is None:
            self.say("select a rung to export first", True)
            return None
        saved = self.save_selected(header_path.parent / rule_file_name(r))
        if saved is None:
            return None
        written = self._write(header_path, lambda: export_c(load_rule(saved), header_path))
        if written is None:
            return None
        header, vectors = written
        self.say(f"exported {r.key} as C to {header} (test vectors {vectors})")
        return Path(header), Path(vectors)


    # ---- the review page ----------------------------------------------------------------------

    def _fit_settings(self, prep: Prepared) -> dict:
        """The current ladder settings as ``pixelfit fit`` records them, with the equivalent command."""
        b = prep.binarizer
        cmd = ["pixelfit", "fit", prep.dataset.source, "--out", "RUN_DIR",
               "--binarize", f"fixed:{b.threshold:g}" if b.method == "fixed" else b.method]
        if b.invert:
            cmd.append("--invert")
        cmd += ["--positive", prep.positive]
        if not prep.presplit:
            cmd += ["--test-fraction", f"{self.test_fraction:g}"]
        cmd += ["--seed", str(self.seed), "--families", ",".join(self.families)]
        if self.max_size is not None:
            cmd += ["--max-size", str(self.max_size)]
        cmd += ["--folds", str(self.folds), "--split", prep.split_method if not prep.presplit else "group-duplicates"]
        spec_text = None
        if self.spec is not None:
            spec_text = ",".join(f"{k}>={v:g}" for k, v in self.spec.targets.items())
            cmd += ["--spec", spec_text, "--confidence", f"{self.spec.confidence:g}"]
            if self.spec.budget_bytes is not None:
                cmd += ["--budget-bytes", str(self.spec.budget_bytes)]
        if self.scheduler:
            cmd += ["--scheduler", self.scheduler]
        return {"families": list(self.families), "max_size": self.max_size, "sizes": None, "folds": self.folds,
                "split": prep.split_method, "seed": self.seed, "spec": spec_text, "exhaustive": False,
                "scheduler": self.scheduler, "command": cmd, "versions": library_versions()}

    def export_report(self, path: str | os.PathLike) -> Path | None:
        """Write the review page of the current run to ``path``; returns it, or None (message).

        The run is written as a fit folder (summary, split, pictures, rule files) into a temporary
        folder and the page is made from it by the same call as ``pixelfit report``.
        """
        if self.running:
            self.say("the ladder is still climbing; export the review page when it has finished", True)
            return None
        if not self.rungs or self.run_prep is None:
            self.say("climb the ladder first: the review page is made from a finished run", True)
            return None
        prep = self.run_prep

        def write() -> Path:
            with tempfile.TemporaryDirectory(prefix="pixelfit-review-") as tmp:
                rungs = [dataclasses.replace(r, rule_file=f"rules/{r.key}.json") for r in self.rungs]
                for r in rungs:
                    save_rung(Path(tmp) / f"rules/{r.key}.json", prep, r,
                              checks=self.rung_checks(r.key) if self.checks else None)
                rec = next((r for r in rungs if self.recommended is not None and r.key == self.recommended.key), None)
                write_fit_outputs(tmp, prep, rungs, rec, dict(self.run_settings or self._fit_settings(prep)), False,
                                  self.spec, self.answer, self.checks)
                return write_report(tmp, path, dataset=prep.dataset)

        written = self._write(path, write)
        if written is not None:
            self.say(f"wrote the review page to {written}")
        return written


    # ---- explaining a call, comparing two rungs ---------------------------------------------

    def _threshold_for(self, rung: Rung) -> tuple[float, str]:
        if self.selected is rung:
            return self.threshold, self.threshold_chosen_on
        return self._threshold_of(rung)

    def rule_of(self, rung: Rung) -> Rule:
        """The rung as its rule file would load (at the threshold the window uses for it)."""
        if self.run_prep is None:
            raise PixelfitError("climb the ladder first")
        threshold, chosen_on = self._threshold_for(rung)
        key = (rung.key, id(rung), threshold, chosen_on)
        if self._rule_cache is None or self._rule_cache[0] != key:
            doc = rule_document(self.run_prep, rung, {"threshold": threshold, "chosen_on": chosen_on})
            self._rule_cache = (key, parse_rule(doc))
        return self._rule_cache[1]

    def explain(self, row: int) -> dict | None:
        """Explain the selected rung's call on dataset row ``row`` (the same core call as
        ``pixelfit explain``); the facts go to :attr:`explanation` and the ``explain`` event."""
        r = self.selected
        prep = self.run_prep
        if r is None or prep is None:
            self.say("select a rung in the ladder to explain its call on a patch", True)
            return None
        ds = prep.dataset
        if not 0 <= int(row) < len(ds):
            return None
        row = int(row)
        facts = explain_call(self.rule_of(r), ds.images[row])
        facts.update({"row": row, "name": ds.names[row], "label": str(ds.labels[row]),
                      "subset": "held-out" if prep.test_mask[row] else "train"})
        self.explanation = facts
        self._emit("explain")
        return facts

    def compare_with(self, key: str) -> None:
        """Pick rung ``key`` as the second of a comparison with the selected rung (Ctrl+click).
        With no rung selected yet, ``key`` is selected instead."""
        if self.rung(key) is None:
            return
        if self.selected is None:
            self.select(key)
            return
        if key == self.selected.key:
            return
        self.compared = (self.selected.key, key)
        self._emit("compare")

    def clear_comparison(self) -> None:
        if self.compared is not None:
            self.compared = None
            self._emit("compare")

    def _held_out_calls(self, rung: Rung) -> np.ndarray:
        if rung.test_scores is not None:
            return np.asarray(rung.test_scores > self._threshold_for(rung)[0])
        return np.asarray(rung.test_pred, bool)

    def comparison(self) -> dict | None:
        """The two compared rungs on the held-out patches, each at its threshold: the core's
        :func:`pixelfit.evaluate.compare_calls` (as ``pixelfit compare``), with ``rung_a``,
        ``rung_b``, their thresholds, and dataset rows ``rows_only_a_right`` / ``rows_only_b_right``."""
        if self.compared is None or self.run_prep is None:
            return None
        ra, rb = self.rung(self.compared[0]), self.rung(self.compared[1])
        if ra is None or rb is None:
            return None
        prep = self.run_prep
        out = compare_calls(prep.y_test, self._held_out_calls(ra), self._held_out_calls(rb))
        rows = np.flatnonzero(prep.test_mask)
        out.update({"rung_a": ra.key, "rung_b": rb.key, "positive": prep.positive,
                    "threshold_a": self._threshold_for(ra)[0], "threshold_b": self._threshold_for(rb)[0],
                    "rows_only_a_right": [int(rows[i]) for i in out["only_a_right"]],
                    "rows_only_b_right": [int(rows[i]) for i in out["only_b_right"]]})
        return out


def rule_file_name(rung: Rung, suffix: str = ".json") -> str:
    """The one file name of a rung's files: ``tree-4.json``, ``tree-4.h``."""
    return f"{rung.key}{suffix}"


def family_names() -> list[tuple[str, str]]:
    """(name, description) of every family in ladder order."""
    return [(f, FAMILIES[f].description) for f in FAMILY_ORDER]
