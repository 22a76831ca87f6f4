"""A precision/recall spec: parse it, choose each rung's threshold for it, judge it, and answer it.

The one decision rule everywhere (ladder, rule files, ``apply``, the window and the C export): a
patch is called positive when its score is **strictly above** the threshold T. At the default
T = 0.5 this is each family's own decision (the rule's label, ``z > 0`` of a linear score, the
majority of a truth-table cell or a tree leaf with ties to the negative class), which is what the
firmware runs.

Threshold choice (:func:`choose_threshold`), on the training part only (out-of-fold CV scores,
or the training scores when CV is off): the candidate thresholds are the distinct scores (and 0
when every score is above it); a candidate that calls no patch positive is dropped (its
precision is undefined).

- Among the candidates meeting every given target, take the one with the **largest smallest
  margin** (margin = measure - target, over the targets given). With a single target the margin
  alone would drive the threshold to an extreme, so there the point with the most of the other
  measure is taken (most recall for a precision target, most precision for a recall target).
- If none meets them, take the one with the **smallest largest shortfall** (target - measure).
- Ties go to the point with the larger precision + recall, then to the higher threshold.

Held-out evaluation (:func:`evaluate_spec`): the counts at that threshold, precision and recall
and their one-sided Clopper-Pearson lower bounds at the spec's confidence (the lower bound of x
successes in n is the alpha quantile of Beta(x, n - x + 1), alpha = 1 - confidence; 0 for x = 0).

Verdict (:func:`verdict`): ``over-budget`` when a budget is given and the rung's flash bytes are
known and exceed it; else ``meets`` when every given target is at most its lower bound;
``plausible`` when the point estimates meet the targets but a lower bound does not; ``fails``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
from scipy.stats import beta

from pixelfit.errors import PixelfitError

VERDICTS = ("meets", "plausible", "fails", "over-budget")
#: Held-out patch counts beyond this are not searched for (the answer says "more than" it).
MAX_PATCHES = 10**9

_TERM = re.compile(r"^\s*(precision|recall)\s*>=\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*$")


@dataclass(frozen=True)
class Spec:
    """What a detector must reach on patches it has not seen, and what it may cost.

    ``precision`` / ``recall``: targets in (0, 1] or None (not asked); ``confidence`` of the lower
    bounds in (0, 1); ``budget_bytes``: the most flash the rule may take, or None.
    """

    precision: float | None = None
    recall: float | None = None
    confidence: float = 0.95
    budget_bytes: int | None = None

    def __post_init__(self):
        for name in ("precision", "recall"):
            v = getattr(self, name)
            if v is not None and not (0.0 < v <= 1.0):
                raise PixelfitError(f"spec: the {name} target must be in (0, 1], not {v:g}")
        if self.precision is None and self.recall is None:
            raise PixelfitError("spec: give at least one target, e.g. \"precision>=0.90,recall>=0.85\"")
        if not (0.0 < self.confidence < 1.0) or math.isnan(self.confidence):
            raise PixelfitError(f"spec: --confidence must be in (0, 1), not {self.confidence:g}")
        if self.budget_bytes is not None and self.budget_bytes < 0:
            raise PixelfitError(f"spec: --budget-bytes must be 0 or more, not {self.budget_bytes}")

    @property
    def targets(self) -> dict[str, float]:
        return {k: v for k, v in (("precision", self.precision), ("recall", self.recall)) if v is not None}

    def to_dict(self) -> dict:
        return {"precision": self.precision, "recall": self.recall, "confidence": self.confidence,
                "budget_bytes": self.budget_bytes}

    def describe(self) -> str:
        terms = [f"{k} >= {v:g}" for k, v in self.targets.items()]
        budget = "" if self.budget_bytes is None else f", at most {self.budget_bytes} flash bytes"
        return f"{', '.join(terms)} at {self.confidence:.0%} confidence{budget}"


def parse_spec(text: str, confidence: float = 0.95, budget_bytes: int | None = None) -> Spec:
    """``"precision>=0.90,recall>=0.85"`` (either term may be left out) -> :class:`Spec`.

    Raises
    ------
    PixelfitError
        On a malformed term, a repeated measure, or a value out of range.
    """
    found: dict[str, float] = {}
    for term in str(text).split(","):
        m = _TERM.match(term)
        if not m:
            raise PixelfitError(f"spec: cannot read {term.strip()!r}; write terms like \"precision>=0.90\" and "
                                "\"recall>=0.85\", separated by a comma")
        if m.group(1) in found:
            raise PixelfitError(f"spec: {m.group(1)} is given twice")
        found[m.group(1)] = float(m.group(2))
    return Spec(found.get("precision"), found.get("recall"), float(confidence),
                None if budget_bytes is None else int(budget_bytes))


def lower_bound(successes: float, n: float, confidence: float) -> float | None:
    """One-sided Clopper-Pearson lower confidence bound of a binomial proportion; None when n = 0.

    The alpha quantile of Beta(x, n - x + 1) with alpha = 1 - confidence, and 0 when x = 0. Real
    (non-integer) counts are accepted: the Beta quantile is defined for them, which is what the
    search for more held-out patches uses.
    """
    if n <= 0:
        return None
    if successes <= 0:
        return 0.0
    return float(beta.ppf(1.0 - confidence, successes, n - successes + 1))


def operating_points(y_true: np.ndarray, scores: np.ndarray, max_points: int | None = None) -> list[dict]:
    """Precision and recall when calling positive for score > threshold, one row per candidate.

    Candidates: every distinct score, and 0 when every score is above 0; rows that call no patch
    positive are left out. Rows carry tp and fp too. Empty when there is no positive patch.
    ``max_points`` keeps at most that many rows, at evenly spaced ranks of the candidates (the
    first and the last included): a curve to draw or keep, not a set to choose a threshold on.
    """
    y = np.asarray(y_true, bool)
    s = np.asarray(scores, float)
    if len(y) == 0 or not y.any():
        return []
    cand = np.unique(s)
    if cand[0] > 0:
        cand = np.concatenate([[0.0], cand])
    order = np.sort(s)
    pos_sorted = np.sort(s[y])
    # patches with score > t: len - searchsorted(right)
    n_above = len(s) - np.searchsorted(order, cand, side="right")
    tp = len(pos_sorted) - np.searchsorted(pos_sorted, cand, side="right")
    keep = n_above > 0
    cand, n_above, tp = cand[keep], n_above[keep], tp[keep]
    if max_points is not None and len(cand) > max_points:
        pick = np.unique(np.round(np.linspace(0, len(cand) - 1, max(2, max_points))).astype(np.intp))
        cand, n_above, tp = cand[pick], n_above[pick], tp[pick]
    n_pos = int(y.sum())
    return [{"threshold": float(t), "precision": float(a / k), "recall": float(a / n_pos), "tp": int(a),
             "fp": int(k - a)} for t, k, a in zip(cand, n_above, tp)]


def _margins(pt: dict, targets: dict[str, float]) -> list[float]:
    return [pt[k] - v for k, v in targets.items()]


def choose_threshold(points: list[dict], targets: dict[str, float]) -> dict | None:
    """The operating point taken for the targets (see the module docstring); None without points."""
    if not points or not targets:
        return None

    def tie(pt):
        return (pt["precision"] + pt["recall"], pt["threshold"])

    ok = [pt for pt in points if min(_margins(pt, targets)) >= 0]
    if ok:
        if len(targets) == 1:
            other = "recall" if "precision" in targets else "precision"
            return max(ok, key=lambda pt: (pt[other], *tie(pt)))
        return max(ok, key=lambda pt: (min(_margins(pt, targets)), *tie(pt)))
    return max(points, key=lambda pt: (min(_margins(pt, targets)), *tie(pt)))


def test_counts(y_true: np.ndarray, scores: np.ndarray, threshold: float) -> dict[str, int]:
    """tp, fp, fn, tn when calling positive for score > threshold."""
    y = np.asarray(y_true, bool)
    pred = np.asarray(scores, float) > threshold
    return {"tp": int(np.sum(pred & y)), "fp": int(np.sum(pred & ~y)), "fn": int(np.sum(~pred & y)),
            "tn": int(np.sum(~pred & ~y))}


def _ratio(a: int, b: int) -> float | None:
    return a / b if b > 0 else None


def held_out_result(counts: dict[str, int], confidence: float) -> dict:
    """Counts, precision, recall and their one-sided lower bounds: the ``test`` entry of a rung's spec."""
    tp, fp, fn = counts["tp"], counts["fp"], counts["fn"]
    return {**counts, "precision": _ratio(tp, tp + fp), "recall": _ratio(tp, tp + fn),
            "precision_lower": lower_bound(tp, tp + fp, confidence),
            "recall_lower": lower_bound(tp, tp + fn, confidence)}


def score_verdict(test: dict, spec: Spec) -> str:
    """``meets``, ``plausible`` or ``fails`` from a held-out result (budget aside)."""
    targets = spec.targets
    lows = [test[f"{k}_lower"] for k in targets]
    points = [test[k] for k in targets]
    if all(lo is not None and lo >= t for lo, t in zip(lows, targets.values())):
        return "meets"
    if all(p is not None and p >= t for p, t in zip(points, targets.values())):
        return "plausible"
    return "fails"


def verdict(test: dict, spec: Spec, cost: dict | None) -> str:
    """:func:`score_verdict`, or ``over-budget`` when the known flash bytes exceed the budget."""
    if spec.budget_bytes is not None and cost is not None and cost.get("flash_bytes") is not None \
            and cost["flash_bytes"] > spec.budget_bytes:
        return "over-budget"
    return score_verdict(test, spec)


def evaluate_spec(choice_scores: np.ndarray, y_choice: np.ndarray, chosen_on: str, test_scores: np.ndarray,
                  y_test: np.ndarray, spec: Spec, cost: dict | None = None) -> dict:
    """A rung's ``spec`` entry: threshold chosen on the training part, judged once on held-out.

    Parameters
    ----------
    choice_scores : ndarray of shape (n_train,), float — out-of-fold CV scores, or training scores
    y_choice : ndarray of shape (n_train,), bool
    chosen_on : "cv" or "train", which of the two ``choice_scores`` are
    test_scores : ndarray of shape (n_test,), float
    y_test : ndarray of shape (n_test,), bool
    """
    pick = choose_threshold(operating_points(y_choice, choice_scores), spec.targets)
    if pick is None:  # no training score calls any patch positive: keep the rule's own decision
        threshold, cv = 0.5, {"precision": None, "recall": None}
    else:
        threshold, cv = pick["threshold"], {"precision": pick["precision"], "recall": pick["recall"]}
    test = held_out_result(test_counts(y_test, test_scores, threshold), spec.confidence)
    return {"threshold": threshold, "chosen_on": chosen_on, "cv": cv, "test": test,
            "verdict": verdict(test, spec, cost)}


def patches_needed(test: dict, spec: Spec) -> int | None:
    """Held-out patches needed, in all, for the lower bounds to clear the targets at the observed rates.

    Method: scale all four counts by s = N' / N (N the held-out patches there, both classes kept at
    their observed ratio), keep them as real numbers, and find the smallest whole N' >= N for which
    every one-sided Clopper-Pearson lower bound at the spec's confidence reaches its target
    (doubling, then bisection; the bound grows with s at a fixed proportion). None when a point
    estimate does not exceed its target (no sample size is enough) or more than
    :data:`MAX_PATCHES` would be needed.
    """
    n = test["tp"] + test["fp"] + test["fn"] + test["tn"]
    pairs = []
    for k, t in spec.targets.items():
        x, m = (test["tp"], test["tp"] + test["fp"]) if k == "precision" else (test["tp"], test["tp"] + test["fn"])
        if m == 0 or x / m <= t:
            return None
        pairs.append((x, m, t))
    if n == 0:
        return None

    def clears(total: int) -> bool:
        s = total / n
        return all((lower_bound(x * s, m * s, spec.confidence) or 0.0) >= t for x, m, t in pairs)

    if clears(n):
        return n
    lo, hi = n, 2 * n
    while not clears(hi):
        lo, hi = hi, hi * 2
        if hi > MAX_PATCHES:
            return None
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if clears(mid):
            hi = mid
        else:
            lo = mid
    return hi


def cost_order(rungs: list) -> tuple[str, list[int]]:
    """(what the order is by, indices from cheapest): flash bytes when every rung's cost is known,
    else parameters. Ties go to the earlier rung."""
    if rungs and all(r.cost is not None and r.cost.get("flash_bytes") is not None for r in rungs):
        return "flash bytes", sorted(range(len(rungs)), key=lambda i: (rungs[i].cost["flash_bytes"], i))
    return "parameters", sorted(range(len(rungs)), key=lambda i: (rungs[i].figures["parameters"], i))


def answer(rungs: list, spec: Spec) -> dict:
    """The answer to the spec over rungs whose ``spec`` entries are filled (see :func:`apply_spec`).

    The cheapest rung that ``meets``; else the ``plausible`` one needing the fewest extra held-out
    patches (:func:`patches_needed`); else nothing, with the target furthest away for the rung
    closest to the spec. Returns ``{rung, verdict, reason, extra_test_patches}``.
    """
    by, order = cost_order(rungs)
    known = by == "flash bytes"
    unknown = "" if known else "; the firmware cost is unknown, so rungs are ordered by parameters"

    def size(r) -> str:
        return f"{r.cost['flash_bytes']} flash bytes" if known else f"{r.figures['parameters']} parameters"

    judged = [rungs[i] for i in order if rungs[i].spec is not None]
    fit = [r for r in judged if r.spec["verdict"] != "over-budget"]
    for r in fit:
        if r.spec["verdict"] == "meets":
            t = r.spec["test"]
            low = ", ".join(f"{k} lower bound {t[k + '_lower']:.3f} >= {v:g}" for k, v in spec.targets.items())
            return {"rung": r.key, "verdict": "meets", "extra_test_patches": 0,
                    "reason": f"{r.key} is the cheapest rung that meets the spec ({size(r)}): at threshold "
                              f"{r.spec['threshold']:.4g}, held-out tp {t['tp']}, fp {t['fp']}, fn {t['fn']}, "
                              f"tn {t['tn']}; {low} at {spec.confidence:.0%} confidence{unknown}"}
    plausible = [r for r in fit if r.spec["verdict"] == "plausible"]
    if plausible:
        need = {r.key: patches_needed(r.spec["test"], spec) for r in plausible}
        best = min(plausible, key=lambda r: (need[r.key] is None, need[r.key] or 0, order.index(rungs.index(r))))
        t = best.spec["test"]
        n = t["tp"] + t["fp"] + t["fn"] + t["tn"]
        total = need[best.key]
        extra = None if total is None else total - n
        more = (f"about {extra} more held-out patches (at the observed rates and class ratio) would let its "
                f"lower bounds clear the targets" if extra is not None else
                "no number of held-out patches would clear the targets at the observed rates")
        return {"rung": best.key, "verdict": "plausible", "extra_test_patches": extra,
                "reason": f"no rung meets the spec with {spec.confidence:.0%} confidence; {best.key} ({size(best)}) "
                          f"meets it on its point estimates (held-out tp {t['tp']}, fp {t['fp']}, fn {t['fn']}, "
                          f"tn {t['tn']}); {more}{unknown}"}
    if not fit:
        why = "no rung was judged" if not judged else f"every rung is over the budget of {spec.budget_bytes} bytes"
        return {"rung": None, "verdict": "over-budget" if judged else None, "extra_test_patches": None,
                "reason": f"nothing meets it: {why}"}

    def shortfalls(r) -> dict[str, float]:
        t = r.spec["test"]
        return {k: v - (t[k] if t[k] is not None else 0.0) for k, v in spec.targets.items()}

    closest = min(fit, key=lambda r: (max(shortfalls(r).values()), order.index(rungs.index(r))))
    sf = shortfalls(closest)
    worst = max(sf, key=lambda k: sf[k])
    t = closest.spec["test"]
    parts = ", ".join(f"{k} {_fmt(t[k])} against {v:g} (short by {max(0.0, sf[k]):.3f})"
                      for k, v in spec.targets.items())
    return {"rung": None, "verdict": "fails", "extra_test_patches": None,
            "reason": f"nothing meets it: even on point estimates no rung reaches the spec; the closest, "
                      f"{closest.key}, has held-out {parts}; {worst} is furthest away, by {sf[worst]:.3f}"
                      f"{unknown}"}


def _fmt(v) -> str:
    return "undefined" if v is None else f"{v:.3f}"


def apply_spec(rungs: list, y_train: np.ndarray, y_test: np.ndarray, spec: Spec | None) -> dict | None:
    """Fill every rung's ``spec`` entry (None without a spec) and return the answer (None without one).

    The threshold of each rung is chosen on its training-part scores (``choice_scores``) alone;
    the held-out labels only judge it. The scores' labels are ``y_train``, or the rung's own
    ``choice_labels`` when it has them (a large set's CV subsample).
    """
    for r in rungs:
        if spec is None or r.choice_scores is None or r.test_scores is None:
            r.spec = None
        else:
            y_choice = y_train if getattr(r, "choice_labels", None) is None else r.choice_labels
            r.spec = evaluate_spec(r.choice_scores, y_choice, r.chosen_on, r.test_scores, y_test, spec, r.cost)
    return None if spec is None else answer(rungs, spec)
