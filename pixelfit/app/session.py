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
``target``      the target precision changed
``checks``      results of the checks after the ladder arrived (bias and variance, learning curve,
                stress tests), or were cleared
``message``     a line for the status area: ``(text, is_error)``
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pixelfit.data import Binarizer, Dataset, grey_histogram, load_dataset
from pixelfit.errors import PixelfitError
from pixelfit.evaluate import detection_metrics, threshold_for_target
from pixelfit.firmware import export_c
from pixelfit.ladder import Prepared, Rung, conclude, prepare
from pixelfit.models import FAMILIES, FAMILY_ORDER, plan_rungs
from pixelfit.outputs import error_curves
from pixelfit.robustness import DEFAULT_REPLICATES, Checks, CheckSettings
from pixelfit.rulefile import load_rule, save_rung

EVENTS = ("dataset", "prep", "gallery", "settings", "run", "progress", "rungs", "selection", "threshold",
          "map", "target", "checks", "message")

#: Per-pixel maps the inspector can show: rung maps first, then maps of the training data.
MAP_KINDS = {"native": "model's own weights", "permutation": "permutation (held-out)",
             "mean_difference": "data: lit-rate difference", "mutual_information": "data: mutual information"}

#: A small ladder that trains in seconds on a laptop; the user widens it.
DEFAULT_FAMILIES = ("constant", "lut", "nb", "logistic", "tree")


@dataclass(frozen=True)
class RunSpec:
    """Everything a worker needs to train a ladder; plain data, handed to the worker thread."""

    prep: Prepared
    plan: list[tuple[str, int]]
    folds: int
    seed: int
    checks: CheckSettings | None = None  # the post-pass after the ladder, None for none
    grey_test: np.ndarray | None = None  # grey held-out patches, for the stress tests


class Session:
    """Observable state of the application. See the module docstring for the events."""

    def __init__(self) -> None:
        self._listeners: dict[str, list[Callable]] = {e: [] for e in EVENTS}
        self.dataset: Dataset | None = None
        self.binarizer = Binarizer("otsu")
        self.positive: str | None = None
        self.test_fraction = 0.25
        self.seed = 0
        self.prep: Prepared | None = None
        self.gallery_class: str | None = None
        self.families: list[str] = list(DEFAULT_FAMILIES)
        self.max_size: int | None = 8
        self.folds = 5
        self.replicates = DEFAULT_REPLICATES  # bootstrap replicates per rung; 0: no bias-variance check
        self.checks: Checks | None = None
        self.running = False
        self.progress_state: tuple[int, int, str] = (0, 0, "")
        self.run_prep: Prepared | None = None  # the prepared data the current rungs were trained on
        self.planned = 0
        self.rungs: list[Rung] = []
        self.recommended: Rung | None = None
        self.selected: Rung | None = None
        self._user_selected = False
        self.threshold = 0.5
        self.map_kind = "native"
        self.target_precision: float | None = 0.95
        self.saved_paths: list[Path] = []
        self._data_maps: tuple[Prepared, dict[str, np.ndarray]] | None = None  # maps of one prepared set
        self._at_threshold: tuple | None = None  # (rung, threshold, prepared set, metrics) last computed

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

    # ---- data ---------------------------------------------------------------------------------

    def open(self, path: str | os.PathLike) -> bool:
        """Import ``path``; on bad input the error becomes a message and the old state stays."""
        if self.running:
            self.say("a ladder is running; halt it before opening other patches", True)
            return False
        try:
            ds = load_dataset(path)
        except PixelfitError as exc:
            self.say(str(exc), True)
            return False
        except OSError as exc:  # a folder vanishing mid-import, a dead network share
            self.say(f"{path}: cannot read ({exc.strerror or exc})", True)
            return False
        self.dataset = ds
        self.positive = None
        self.gallery_class = None
        self._clear_rungs()
        self._emit("dataset")
        self._rebuild_prep()
        note = f"; skipped {len(ds.skipped)} file(s)" if ds.skipped else ""
        self.say(f"opened {ds.source}: {len(ds)} patches of {ds.shape[0]}x{ds.shape[1]}{note}")
        return True

    def set_binarizer(self, method: str, threshold: float | None = None, invert: bool = False) -> bool:
        """Change the binarization; the gallery and histogram follow. Bad settings -> message."""
        try:
            b = Binarizer(method, None if method != "fixed" else threshold, invert)
        except PixelfitError as exc:
            self.say(str(exc), True)
            return False
        if b == self.binarizer:
            return True
        self.binarizer = b
        self._rebuild_prep()
        return True

    def set_positive(self, name: str | None) -> None:
        if name == self.positive:
            return
        self.positive = name
        self._rebuild_prep()

    def _rebuild_prep(self) -> None:
        if self.dataset is None:
            self.prep = None
            self._emit("prep")
            return
        try:
            self.prep = prepare(self.dataset, self.binarizer, self.positive, self.test_fraction, self.seed)
        except PixelfitError as exc:
            self.prep = None
            self.say(str(exc), True)
        else:
            self.positive = self.prep.positive
        self._emit("prep")

    def binarized(self, indices: np.ndarray) -> np.ndarray:
        """Binarized patches of shape (len(indices), h, w), bool, with the current settings."""
        if self.prep is None:
            raise PixelfitError("no binarized patches: open a dataset first")
        return self.prep.binarizer.transform(self.dataset.images[np.asarray(indices, dtype=np.intp)])

    def histogram(self) -> tuple[np.ndarray, np.ndarray | None]:
        """Grey-level counts of the training pixels, shape (256,), and the thresholds in use.

        The thresholds are one value for the global methods and one per training patch for the
        per-patch methods; None before a dataset is prepared.
        """
        if self.prep is None:
            return np.zeros(256, np.int64), None
        train = self.dataset.images[~self.prep.test_mask]
        counts = grey_histogram(train).astype(np.int64)
        b = self.prep.binarizer
        if b.method in ("fixed", "otsu"):
            return counts, np.array([b.threshold], np.float64)
        return counts, b.patch_thresholds(train)

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
                   folds: int | None = None) -> None:
        """Ladder settings; ``max_size=None`` means no cap."""
        if families is not None:
            self.families = [f for f in FAMILY_ORDER if f in families]
        if max_size != "keep":
            self.max_size = None if max_size is None else int(max_size)
        if folds is not None:
            self.folds = int(folds)
        self._emit("settings")

    def plan(self) -> list[tuple[str, int]]:
        """The rungs a run would train with the current settings (raises PixelfitError)."""
        if self.prep is None:
            raise PixelfitError("open a dataset (and choose a binarization that splits it) first")
        if not self.families:
            raise PixelfitError("choose at least one family")
        rungs = plan_rungs(self.families, self.prep.n_pixels, self.max_size)
        if not rungs:
            raise PixelfitError("no rung to train: the largest size leaves every family empty")
        return rungs

    def start_run(self) -> RunSpec | None:
        """Begin a run: the previous rungs are replaced. Returns what the worker needs, or None."""
        if self.running:
            self.say("a ladder is already running", True)
            return None
        try:
            plan = self.plan()
        except PixelfitError as exc:
            self.say(str(exc), True)
            return None
        self._clear_rungs()
        self.run_prep = self.prep
        self.planned = len(plan)
        self.running = True
        self.progress_state = (0, 0, "starting")
        self._emit("run")
        self.say(f"climbing {len(plan)} rungs on {self.prep.binarizer.describe()} patches")
        return RunSpec(self.prep, plan, self.folds, self.seed, CheckSettings(self.replicates, seed=self.seed),
                       self.dataset.images[self.prep.test_mask])

    def report_progress(self, done: int, total: int, message: str) -> None:
        self.progress_state = (done, total, message)
        self._emit("progress")

    def add_rung(self, rung: Rung) -> None:
        """A finished rung from the worker; the recommendation is renewed with every rung.

        Nothing is selected for the user while the ladder climbs (the first rung is the constant
        rule, rarely worth a look, and showing it costs the window a cascade of paints as the
        climb starts); the user may pick any finished rung, and the recommended one is selected
        when the climb ends unless the user has chosen.
        """
        self.rungs.append(rung)
        self.recommended = conclude(self.rungs, self.run_prep.y_test)
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
        n = len(self.rungs)
        if outcome == "finished":
            rec = f"; recommended {self.recommended.key}" if self.recommended else ""
            self.say(f"ladder finished: {n} rungs{rec}")
        elif outcome == "cancelled":
            self.say(f"ladder halted: {n} of {self.planned} rungs finished and kept")
        else:
            self.say(f"ladder failed after {n} rungs: {detail}", True)
        if self.recommended is not None and not self._user_selected:
            self.select(self.recommended.key, by_user=False)

    def _clear_rungs(self) -> None:
        had = bool(self.rungs)
        self.rungs = []
        self.recommended = None
        self.saved_paths = []
        self.run_prep = None
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
        self.threshold = 0.5
        target = (rung.operating or {}).get("target") if rung is not None else None
        if target and target.get("threshold") is not None:  # the threshold the ladder chose for a target
            self.threshold = float(target["threshold"])
        self._emit("selection")

    def set_threshold(self, value: float) -> None:
        value = float(min(1.0, max(0.0, value)))
        if value == self.threshold:
            return
        self.threshold = value
        self._emit("threshold")

    def set_map_kind(self, kind: str) -> None:
        if kind not in MAP_KINDS:
            raise KeyError(kind)
        if kind != self.map_kind:
            self.map_kind = kind
            self._emit("map")

    def set_target_precision(self, value: float | None) -> None:
        if value != self.target_precision:
            self.target_precision = value
            self._emit("target")

    def held_out_predictions(self) -> np.ndarray | None:
        """Held-out predictions of the selected rung: at the threshold when it has scores."""
        r = self.selected
        if r is None:
            return None
        if r.scored:
            return r.test_scores >= self.threshold
        return np.asarray(r.test_pred, bool)

    def threshold_metrics(self) -> dict | None:
        """Held-out metrics of the selected rung at the current threshold (core metrics).

        Kept for the last (rung, threshold): the inspector asks more than once per change, and
        each computation is some milliseconds of Python on the GUI thread.
        """
        pred = self.held_out_predictions()
        if pred is None:
            return None
        last = self._at_threshold
        if last is None or last[0] is not self.selected or last[1] != self.threshold or last[2] is not self.run_prep:
            last = self._at_threshold = (self.selected, self.threshold, self.run_prep,
                                         detection_metrics(self.run_prep.y_test, pred))
        return dict(last[3])

    def target_point(self) -> dict | None:
        """The held-out operating point meeting the target precision with the most recall."""
        r = self.selected
        if r is None or not r.scored or self.target_precision is None or not r.operating:
            return None
        return threshold_for_target(r.operating["test_points"], self.target_precision, None)

    def misses(self) -> tuple[np.ndarray, np.ndarray]:
        """Dataset rows of held-out false positives and false negatives of the selected rung."""
        pred = self.held_out_predictions()
        if pred is None:
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
                self._data_maps = (prep, prep.data_maps())
            return self._data_maps[1][self.map_kind], MAP_KINDS[self.map_kind]
        r = self.selected
        if r is None:
            return None, "no rung selected"
        values = r.importance.get(self.map_kind)
        if values is None:
            return None, f"{r.key} has no {MAP_KINDS[self.map_kind]} map"
        return values, f"{r.key}: {MAP_KINDS[self.map_kind]}"

    # ---- saving -------------------------------------------------------------------------------

    def save_selected(self, path: str | os.PathLike) -> Path | None:
        """Write the selected rung as a rule file; returns where it went, or None (message)."""
        r = self.selected
        if r is None:
            self.say("select a rung to save first", True)
            return None
        written = self._write(path, lambda: save_rung(path, self.run_prep, r,
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
            self.say(str(exc), True)
        except OSError as exc:
            self.say(f"{path}: cannot write ({exc.strerror or exc})", True)
        return None

    def export_selected_c(self, header_path: str | os.PathLike) -> tuple[Path, Path] | None:
        """Save the selected rung beside ``header_path`` (same stem, .json) and export C from it."""
        header_path = Path(header_path)
        saved = self.save_selected(header_path.with_suffix(".json"))
        if saved is None:
            return None
        written = self._write(header_path, lambda: export_c(load_rule(saved), header_path))
        if written is None:
            return None
        header, vectors = written
        self.say(f"exported {self.selected.key} as C to {header} (test vectors {vectors})")
        return Path(header), Path(vectors)


def family_names() -> list[tuple[str, str]]:
    """(name, description) of every family in ladder order."""
    return [(f, FAMILIES[f].description) for f in FAMILY_ORDER]
