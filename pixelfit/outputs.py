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
from pixelfit.data import raw_fingerprint
from pixelfit.ladder import Prepared, Rung
from pixelfit.models import FAMILIES
from pixelfit.plots import decomposition_png, heatmap_png, ladder_png, learning_curve_png, stress_png
from pixelfit.robustness import Checks

SUMMARY_FORMAT = "pixelfit-ladder-summary"
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
    }


def split_summary(prep: Prepared) -> dict:
    return {"test_fraction": prep.test_fraction, "seed": prep.seed, "presplit": prep.presplit,
            "n_train": int(len(prep.y_train)), "n_test": int(len(prep.y_test)), "file": "split.csv",
            "augment": prep.augment or "none"}


def build_summary(prep: Prepared, rungs: list[Rung], recommended: Rung | None, settings: dict,
                  cancelled: bool = False, checks: Checks | None = None) -> dict:
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
                        "recommendation": "smallest rung (fewest parameters) within one standard error "
                                          "of the best cross-validated F1; the held-out set is never used"},
        "cancelled": cancelled,
        "rungs": [{**r.summary(prep.shape), **checks.rung_entry(r.key)} for r in rungs],
        "recommended": None if recommended is None else {"family": recommended.family, "size": recommended.size},
        "learning_curve": checks.learning_curve,
    }


CSV_COLUMNS = ["family", "size", "search", "parameters", "log2_class_size", "vc_dim", "train_f1", "cv_f1_mean",
               "cv_f1_std", "test_precision", "test_precision_lo", "test_precision_hi", "test_recall",
               "test_recall_lo", "test_recall_hi", "test_f1", "test_mcc", "bound", "recommended"]


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
        t = r["test"]
        pci = t["precision_ci"] or [None, None]
        rci = t["recall_ci"] or [None, None]
        row = [r["family"], r["size"], (r["search"] or {}).get("method"), r["parameters"], r["log2_class_size"],
               r["vc_dim"], r["train"]["f1"], (r["cv"] or {}).get("f1_mean"), (r["cv"] or {}).get("f1_std"),
               t["precision"], pci[0], pci[1], t["recall"], rci[0], rci[1], t["f1"], t["mcc"],
               (r["bound"] or {}).get("error_upper"), r["recommended"]]
        w.writerow([_csv_value(v) for v in row])
    return buf.getvalue()


def split_csv(prep: Prepared) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["path", "label", "subset"])
    ds = prep.dataset
    for name, label, test in zip(ds.names, ds.labels, prep.test_mask):
        w.writerow([name, label, "test" if test else "train"])
    return buf.getvalue()


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
                      settings: dict, cancelled: bool = False, checks: Checks | None = None) -> dict:
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
    summary = build_summary(prep, rungs, recommended, settings, cancelled, checks)
    write_json(out / "summary.json", summary)
    write_text(out / "summary.csv", summary_csv(summary))
    write_text(out / "split.csv", split_csv(prep))
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
