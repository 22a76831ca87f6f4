"""Explaining one call of a rule, and comparing two rungs of a run: the facts, as JSON-ready data.

:func:`explain_call` says why a rule scores one patch as it does (the family's own account from
:meth:`pixelfit.families.Model.explain`, plus the score, the operating threshold and the call);
:func:`compare_run` compares two rungs of a ``pixelfit fit`` folder on its held-out patches with
:func:`pixelfit.evaluate.compare_calls`, the same call the window makes on its own rungs. The
command line (``pixelfit explain``, ``pixelfit compare``) and the window print and draw these
dicts; nothing here imports Qt.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from pixelfit.data import read_patch
from pixelfit.errors import PixelfitError
from pixelfit.evaluate import compare_calls
from pixelfit.families import FAMILIES
from pixelfit.review import load_run_data, read_split, read_summary
from pixelfit.rulefile import Rule, load_rule

#: Disagreeing patches listed per side by :func:`compare_run` (the counts are always complete).
MAX_LISTED = 200


def explain_call(rule: Rule, grey: np.ndarray | None = None, bits: np.ndarray | None = None) -> dict:
    """The facts of one call: why ``rule`` gives this patch its score, and the call at its threshold.

    Parameters
    ----------
    rule : pixelfit.rulefile.Rule
    grey : ndarray of shape (h, w), uint8, optional
        The grey patch; binarized with the rule's own binarization when ``bits`` is not given.
    bits : ndarray of shape (h, w) or (h * w,), bool, optional

    Returns
    -------
    dict
        ``rung``, ``family``, ``size``, ``score``, ``threshold`` (positive when score > threshold),
        ``chosen_on``, ``call`` (a class name), ``positive`` (bool), ``pixels_read`` (``[row,
        column]`` pairs; None when the rule reads the whole patch), ``bits`` (the 0/1 patch, row
        by row) and ``why`` (the family's account; see :meth:`pixelfit.families.Model.explain`).
    """
    if bits is None:
        if grey is None:
            raise PixelfitError("give the patch: its grey values or its bits")
        grey = np.asarray(grey)
        if grey.shape != rule.shape:
            raise PixelfitError(f"the patch is {grey.shape[1] if grey.ndim == 2 else '?'}x"
                                f"{grey.shape[0] if grey.ndim else '?'} pixels; the rule reads "
                                f"{rule.shape[1]}x{rule.shape[0]}")
        bits = rule.binarize(grey[None])[0]
    x = np.asarray(bits).reshape(-1).astype(bool)
    if x.size != rule.n_pixels:
        raise PixelfitError(f"the patch has {x.size} pixels; the rule reads {rule.shape[1]}x{rule.shape[0]}")
    score = float(rule.model.decide(x[None, :])[0][0])
    threshold = rule.operating_threshold
    positive = score > threshold
    used = rule.pixels_used()
    h, w = rule.shape
    return {"rung": f"{rule.family}-{rule.size}", "family": rule.family, "size": rule.size,
            "description": FAMILIES[rule.family].description, "score": score, "threshold": threshold,
            "chosen_on": rule.operating_chosen_on, "positive": bool(positive),
            "call": rule.positive if positive else rule.negative,
            "pixels_read": None if used is None else [[int(i) // w, int(i) % w] for i in used],
            "bits": x.reshape(h, w).astype(int).tolist(),
            "why": rule.model.explain(x, rule.shape, threshold)}


def read_patch_file(path: str | os.PathLike, shape: tuple[int, int]) -> np.ndarray:
    """One image file as a uint8 (h, w) patch of ``shape``, read as the data import reads patches."""
    try:
        grey = read_patch(path)
    except ValueError as exc:
        raise PixelfitError(f"{path}: {exc}") from None
    if grey.shape != shape:
        raise PixelfitError(f"{path}: the patch is {grey.shape[1]}x{grey.shape[0]} pixels; the rule reads "
                            f"{shape[1]}x{shape[0]}")
    return grey


def _rung_entry(summary: dict, key: str) -> dict:
    keys = [f"{r['family']}-{r['size']}" for r in summary["rungs"]]
    if key not in keys:
        raise PixelfitError(f"no rung {key!r} in this run; its rungs: {', '.join(keys)}")
    return summary["rungs"][keys.index(key)]


def compare_run(run_dir: str | os.PathLike, key_a: str, key_b: str) -> dict:
    """Rungs ``key_a`` and ``key_b`` of a fit folder on its held-out patches, each at its rule file's
    operating threshold: :func:`pixelfit.evaluate.compare_calls` with the patch names of the
    disagreements (``only_a_right`` / ``only_b_right`` become lists of names, at most MAX_LISTED).

    The data set is read from the summary's ``dataset.source`` and used only when its fingerprint
    is the run's.
    """
    run = Path(run_dir)
    summary = read_summary(run)
    if key_a == key_b:
        raise PixelfitError("name two different rungs to compare")
    rules = []
    for key in (key_a, key_b):
        rel = _rung_entry(summary, key).get("rule_file")
        if not rel:
            raise PixelfitError(f"{key}: this run wrote no rule file for it (fit --no-rules)")
        rules.append(load_rule(run / str(rel)))
    split, _, why = read_split(run, summary)
    ds, test_mask, why = load_run_data(summary, split) if why is None else (None, None, why)
    if ds is None or test_mask is None:
        raise PixelfitError(f"{run}: cannot compare on the held-out patches: {why}")
    rows = np.flatnonzero(test_mask)
    grey = ds.images[rows]
    preds = [r.predict(r.binarize(grey)) for r in rules]
    y = ds.labels[rows] == rules[0].positive
    out = compare_calls(y, preds[0], preds[1])
    for side in ("only_a_right", "only_b_right"):
        out[side] = [ds.names[rows[i]] for i in out[side][:MAX_LISTED]]
    out.update({"rung_a": key_a, "rung_b": key_b, "positive": rules[0].positive,
                "threshold_a": rules[0].operating_threshold, "threshold_b": rules[1].operating_threshold,
                "source": ds.source})
    return out
