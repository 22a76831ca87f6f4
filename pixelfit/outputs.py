"""The output folder of ``pixelfit fit``: summary.json (the contract), summary.csv, split.csv,
heatmaps/, ladder.png and the pictures of the checks (bias_variance.png, learning_curve.png,
stress.png). Every file is written atomically."""

from __future__ import annotations

import csv
import datetime as _dt
import io
from pathlib import Path

import numpy as np

from pixelfit import __version__
from pixelfit._atomic import write_bytes, write_json, write_text
from pixelfit.conventions import BOUND_CONVENTION, UNDEFINED_CONVENTION
from pixelfit.data import check_csv_rows, raw_fingerprint
from pixelfit.evaluate import Spec
from pixelfit.families import FAMILIES
from pixelfit.ladder import Prepared, Rung, leak_free_test, sampling_facts
from pixelfit.plots import decomposition_png, heatmap_png, ladder_png, learning_curve_png, stress_png
from pixelfit.robustness import Checks
from pixelfit.runfolder import SUMMARY_FORMAT
from pixelfit.text import FIELDS

SUMMARY_VERSION = 1


def dataset_summary(prep: Prepared) -> dict:
    ds = prep.dataset
    return {
        "source": ds.source,
        "layout": ds.layout,
        "shape": list(ds.shape),
        "positive": prep.positive,
        "negative": prep.negative,
        "counts": ds.counts,
        "skipped": [{"path": s.path, "reason": s.reason} for s in ds.skipped],
        "fingerprint": raw_fingerprint(ds.images, ds.labels),
        "train_fingerprint": prep.train_fingerprint,
        "check": None if prep.check is None else prep.check.counts(),
    }


def split_summary(prep: Prepared) -> dict:
    return {"method": prep.split_method, "test_fraction": prep.test_fraction, "seed": prep.seed,
            "presplit": prep.presplit,
            "n_train": int(len(prep.y_train)), "n_test": int(len(prep.y_test)), "file": "split.csv",
            "augment": prep.augment or "none"}


SPEC_CONVENTION = ("each rung's threshold is chosen on its out-of-fold CV scores (training scores when CV is off): "
                   "among thresholds meeting every target there, the largest smallest margin (one target: the "
                   "most of the other measure); else the smallest largest shortfall. A patch is positive when "
                   "its score is above the threshold. Held-out lower bounds are one-sided Clopper-Pearson at the "
                   "spec's confidence; extra_test_patches scales the held-out counts at their observed rates")


def build_summary(prep: Prepared, rungs: list[Rung], recommended: Rung | None, settings: dict,
                  cancelled: bool = False, spec: Spec | None = None, answer: dict | None = None,
                  checks: Checks | None = None) -> dict:
    checks = checks or Checks()
    return {
        "format": SUMMARY_FORMAT,
        "version": SUMMARY_VERSION,
        "pixelfit_version": __version__,
        "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "dataset": dataset_summary(prep),
        "binarize": prep.binarizer.to_dict(),
        "split": split_summary(prep),
        "settings": settings,
        "conventions": {"bound": BOUND_CONVENTION, "undefined": UNDEFINED_CONVENTION,
                        "recommendation": "smallest rung (fewest flash bytes, or fewest parameters while the firmware "
                                          "cost is unknown) within one standard error of the best "
                                          "cross-validated F1; the held-out set is never used",
                        "spec": SPEC_CONVENTION},
        "spec": None if spec is None else spec.to_dict(),
        "answer": answer,
        "cancelled": cancelled,
        "rungs": [{**r.summary(prep.shape), "held_out_without_leaked": leak_free_test(prep, r), **checks.rung_entry(r.key)}
                  for r in rungs],
        "recommended": None if recommended is None else {"family": recommended.family, "size": recommended.size},
        "learning_curve": checks.learning_curve,
        "sampling": sampling_facts(len(prep.y_train), len(prep.y_test)),
    }


CSV_COLUMNS = [f.name for f in FIELDS]


def _csv_value(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def summary_csv(summary: dict) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    for r in summary["rungs"]:
        w.writerow([_csv_value(f.value(r)) for f in FIELDS])
    return buf.getvalue()


def split_csv(prep: Prepared) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["path", "label", "subset", "group"])
    ds = prep.dataset
    # group: the id of the patch's group of identical grey patches, empty for a patch with no copy
    dup = None if prep.check is None else prep.check.grey
    for i, (name, label, test) in enumerate(zip(ds.names, ds.labels, prep.test_mask)):
        group = "" if dup is None or dup.sizes[dup.ids[i]] < 2 else f"grey-{dup.ids[i]}"
        w.writerow([name, label, "test" if test else "train", group])
    return buf.getvalue()


def check_csv(prep: Prepared) -> str:
    """check.csv: one row per flagged patch and finding (``path,label,finding,group``)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["path", "label", "finding", "group"])
    if prep.check is not None:
        w.writerows(check_csv_rows(prep.check, prep.dataset.names, prep.dataset.labels))
    return buf.getvalue()


def check_summary(prep: Prepared) -> dict:
    """check.json: the data check's counts with the split and binarization they were found under."""
    ds = prep.dataset
    return {
        "format": "pixelfit-data-check",
        "version": 1,
        "pixelfit_version": __version__,
        "source": ds.source,
        "patches": len(ds),
        "positive": prep.positive,
        "negative": prep.negative,
        "binarize": prep.binarizer.to_dict(),
        "split": {k: v for k, v in split_summary(prep).items() if k != "file"},  # check writes no split.csv
        "check": None if prep.check is None else prep.check.counts(),
        "file": "check.csv",
    }


def write_check_outputs(out: str | Path, prep: Prepared) -> dict:
    """Write check.json and check.csv into ``out``; returns what check.json holds."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    doc = check_summary(prep)
    write_json(out / "check.json", doc)
    write_text(out / "check.csv", check_csv(prep))
    return doc


def error_curves(rungs: list[Rung]) -> dict[str, dict[str, list[tuple[float, float | None]]]]:
    """Per family: train, CV, held-out error rates and the bound against size."""
    curves: dict[str, dict[str, list]] = {}
    for r in rungs:
        c = curves.setdefault(r.family, {"train": [], "cv": [], "test": [], "bound": []})
        c["train"].append((r.size, 1 - r.train["accuracy"]))
        c["test"].append((r.size, 1 - r.test["accuracy"]))
        c["cv"].append((r.size, None if r.cv is None else r.cv["error_mean"]))
        c["bound"].append((r.size, None if r.bound is None else r.bound["error_upper"]))
    return curves


def write_fit_outputs(out: str | Path, prep: Prepared, rungs: list[Rung], recommended: Rung | None,
                      settings: dict, cancelled: bool = False, spec: Spec | None = None,
                      answer: dict | None = None, checks: Checks | None = None) -> dict:
    """Write every output of a ladder run into ``out``; returns the summary written."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    heat = out / "heatmaps"
    for r in rungs:
        for kind, values in r.importance.items():
            if values is None:
                continue
            # <key>.npy is the family's own map, or the permutation map where it has none.
            own = kind == "native" or r.importance.get("native") is None
            stem = r.key if own else f"{r.key}-{kind}"
            buf = io.BytesIO()
            np.save(buf, values.astype(np.float64), allow_pickle=False)
            write_bytes(heat / f"{stem}.npy", buf.getvalue())
            write_bytes(heat / f"{stem}.png", heatmap_png(values))
    for name, values in prep.data_maps().items():
        buf = io.BytesIO()
        np.save(buf, values.astype(np.float64), allow_pickle=False)
        write_bytes(heat / f"data-{name}.npy", buf.getvalue())
        write_bytes(heat / f"data-{name}.png", heatmap_png(values))
    summary = build_summary(prep, rungs, recommended, settings, cancelled, spec, answer, checks)
    write_json(out / "summary.json", summary)
    write_text(out / "summary.csv", summary_csv(summary))
    write_text(out / "split.csv", split_csv(prep))
    write_text(out / "check.csv", check_csv(prep))
    rec = None if recommended is None else (recommended.family, recommended.size)
    write_bytes(out / "ladder.png", ladder_png(error_curves(rungs), {f: FAMILIES[f].size_name for f in FAMILIES}, rec))
    write_check_pictures(out, summary)
    return summary


def write_check_pictures(out: Path, summary: dict) -> list[str]:
    """bias_variance.png, learning_curve.png and stress.png, each where its check ran; the names written.

    A picture of a check that did not run is removed, so that no earlier run's picture stays beside
    this run's summary.
    """
    written = []
    rungs = summary["rungs"]
    if any(r.get("bias_variance") for r in rungs):
        curves: dict[str, list] = {}
        for r in rungs:
            curves.setdefault(r["family"], []).append((r["size"], r.get("bias_variance")))
        write_bytes(out / "bias_variance.png", decomposition_png(curves, {f: FAMILIES[f].size_name for f in FAMILIES}))
        written.append("bias_variance.png")
    if summary.get("learning_curve"):
        write_bytes(out / "learning_curve.png", learning_curve_png(summary["learning_curve"]))
        written.append("learning_curve.png")
    stress = {f"{r['family']}-{r['size']}": r["stress"] for r in rungs if r.get("stress")}
    if stress:
        write_bytes(out / "stress.png", stress_png(stress))
        written.append("stress.png")
    for name in {"bias_variance.png", "learning_curve.png", "stress.png"} - set(written):
        (out / name).unlink(missing_ok=True)
    return written
