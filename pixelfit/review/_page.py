"""The review page of a fit folder: one self-contained HTML file for the person who signs a rule off.

Everything on the page comes from the run folder (summary.json, rules/, heatmaps/, the pictures,
split.csv) and, for the histogram and the misses, from the data set the run recorded. Pictures
are PNG data URIs, the split file and the rule file are data links, styles are in the page; the
page holds no script and asks for nothing over the network (its Content-Security-Policy forbids
it). The template is rendered by Jinja2 with autoescaping, so names from the user's files come out
as text.
"""

from __future__ import annotations

import base64
import csv
import hashlib
import importlib.metadata
import io
import json
import os
import platform
import re
import shlex
from importlib import resources
from pathlib import Path

import numpy as np
from PIL import Image

from pixelfit import __version__
from pixelfit._atomic import write_text
from pixelfit.data import Dataset, grey_histogram, load_dataset, raw_fingerprint
from pixelfit.errors import PixelfitError
from pixelfit.rulefile import CAUTION, Rule, load_rule

REPORT_NAME = "report.html"
#: The libraries whose versions decide a run's numbers, as their distributions are named.
LIBRARIES = ("pixelfit", "numpy", "scikit-learn", "scipy", "Pillow", "Jinja2")
#: Most false positives (and false negatives) drawn as thumbnails.
MAX_THUMBNAILS = 48
#: Most skipped files and suspects listed by name.
MAX_LISTED = 50
#: A picture larger than this is left out of the page (the demo sets' largest is some 20 kB).
MAX_PICTURE_BYTES = 2_000_000
#: A rung key as pixelfit writes it; anything else is not used to build a file name.
_KEY = re.compile(r"^[a-z]+-[0-9]+$")
NOT_COMPUTED = "not computed in this run"


def library_versions() -> dict[str, str | None]:
    """Versions of pixelfit, the libraries that shape its numbers, and Python (None: not installed)."""
    out: dict[str, str | None] = {}
    for name in LIBRARIES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = __version__ if name == "pixelfit" else None
    out["Python"] = platform.python_version()
    return out


# ---------------------------------------------------------------------------------------------
# reading the run folder


def read_summary(run_dir: Path) -> dict:
    path = run_dir / "summary.json"
    try:
        summary = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise PixelfitError(f"{run_dir}: no summary.json here; give the output folder of `pixelfit fit`") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise PixelfitError(f"{path}: cannot read it as JSON ({exc})") from None
    if not isinstance(summary, dict) or summary.get("format") != "pixelfit-ladder-summary":
        raise PixelfitError(f"{path}: not a pixelfit ladder summary")
    for key in ("dataset", "binarize", "split", "rungs"):
        if key not in summary:
            raise PixelfitError(f"{path}: the summary has no {key!r}; it was not written by `pixelfit fit`")
    return summary


def _inside(run_dir: Path, rel: str) -> Path | None:
    """``run_dir / rel`` when it stays inside the run folder, else None."""
    path = (run_dir / rel).resolve()
    try:
        path.relative_to(run_dir.resolve())
    except ValueError:
        return None
    return path


def picture(run_dir: Path, rel: str) -> dict | None:
    """A PNG of the run folder as a data URI with its size; None when absent or unreadable."""
    path = _inside(run_dir, rel)
    if path is None or not path.is_file() or path.stat().st_size > MAX_PICTURE_BYTES:
        return None
    data = path.read_bytes()
    try:
        with Image.open(io.BytesIO(data)) as im:
            if im.format != "PNG":
                return None
            im.load()
            w, h = im.size
    except Exception:  # a damaged picture is left out rather than shown broken
        return None
    return {"uri": "data:image/png;base64," + base64.b64encode(data).decode("ascii"), "width": w, "height": h}


def _png_uri(rgb_or_grey: np.ndarray) -> str:
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(rgb_or_grey)).save(buf, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _data_link(data: bytes, mime: str) -> str:
    return f"data:{mime};base64," + base64.b64encode(data).decode("ascii")


def read_split(run_dir: Path, summary: dict) -> tuple[dict[str, str] | None, bytes | None, str | None]:
    """split.csv as {path: subset}, its bytes, and why it could not be read (or None)."""
    name = (summary.get("split") or {}).get("file") or "split.csv"
    path = _inside(run_dir, str(name))
    if path is None or not path.is_file():
        return None, None, f"the split file {name} is not in the run folder"
    data = path.read_bytes()
    try:
        rows = {r["path"]: r["subset"] for r in csv.DictReader(io.StringIO(data.decode("utf-8")))}
    except (UnicodeDecodeError, KeyError, csv.Error) as exc:
        return None, data, f"the split file {name} cannot be read ({exc})"
    return rows, data, None


def load_run_data(summary: dict, split: dict[str, str] | None,
                  dataset: Dataset | None = None) -> tuple[Dataset | None, np.ndarray | None, str | None]:
    """The patches of the run and the held-out mask, or why they are not available.

    The data are used only when their fingerprint is the one the run recorded, so the page never
    shows patches the rule was not measured on.
    """
    source = (summary.get("dataset") or {}).get("source")
    if not source:
        return None, None, "the summary records no data source"
    if split is None:
        return None, None, "the split file is missing, so the held-out patches cannot be picked"
    try:
        ds = dataset if dataset is not None else load_dataset(source)
    except (PixelfitError, OSError) as exc:
        return None, None, f"the data set {source} cannot be read here ({' '.join(str(exc).splitlines())})"
    if raw_fingerprint(ds.images, ds.labels) != summary["dataset"].get("fingerprint"):
        return None, None, (f"the data set at {source} is not the one this run was fitted on "
                            "(its fingerprint differs)")
    missing = [n for n in ds.names if n not in split]
    if missing:
        return None, None, f"{len(missing)} patch(es) of {source} are not in the split file, first {missing[0]}"
    return ds, np.array([split[n] == "test" for n in ds.names], bool), None


# ---------------------------------------------------------------------------------------------
# sections


def _key(r: dict) -> str:
    return f"{r.get('family')}-{r.get('size')}"


def chosen_key(summary: dict) -> tuple[str | None, str]:
    """The rung the page is about: the answer to the spec, else the recommended rung."""
    answer = summary.get("answer") or {}
    if answer.get("rung"):
        return str(answer["rung"]), "answer"
    rec = summary.get("recommended")
    if rec:
        return f"{rec['family']}-{rec['size']}", "recommended"
    return None, "none"


def histogram_svg(counts: np.ndarray, thresholds: np.ndarray | None, method: str) -> dict:
    """Bars of the grey-level histogram for the template: plain numbers, drawn as SVG there."""
    counts = np.asarray(counts, np.float64)
    top = counts.max() if counts.size and counts.max() > 0 else 1.0
    height = 100.0
    bars = [{"x": i * 2, "h": round(height * c / top, 2)} for i, c in enumerate(counts) if c > 0]
    marks: list[dict] = []
    band = None
    if thresholds is not None and len(thresholds):
        if method in ("fixed", "otsu"):
            marks.append({"x": round(float(thresholds[0]) * 2, 1), "label": f"threshold {float(thresholds[0]):g}"})
        else:
            lo, med, hi = np.percentile(thresholds, [5, 50, 95])
            band = {"x": round(lo * 2, 1), "w": round(max(1.0, (hi - lo) * 2), 1),
                    "label": f"per-patch thresholds: median {med:.0f}, 90 % between {lo:.0f} and {hi:.0f}"}
            marks.append({"x": round(float(med) * 2, 1), "label": band["label"]})
    return {"bars": bars, "height": height, "marks": marks, "band": band, "peak": int(top)}


def _thumbnail(grey: np.ndarray, bits: np.ndarray) -> str:
    """The grey patch and, beside it, the bits the rule reads (white = 1), one PNG."""
    h, w = grey.shape
    canvas = np.full((h, 2 * w + 1), 255, np.uint8)
    canvas[:, :w] = grey
    canvas[:, w + 1:] = np.where(bits.reshape(h, w), 255, 0).astype(np.uint8)
    canvas[:, w] = 160
    return _png_uri(canvas)


def _tree(nodes: list[dict], shape: tuple[int, int]) -> dict:
    """The tree of a rule file as nested records for a recursive template loop."""

    def build(i: int, depth: int) -> dict:
        n = nodes[i]
        if n["pixel"] is None or depth > 64:
            return {"leaf": True, "label": bool(n["label"]), "score": n["score"], "children": []}
        r, c = n["pixel"]
        return {"leaf": False, "pixel": f"({r},{c})", "score": n["score"],
                "children": [dict(build(n["left"], depth + 1), branch="0"),
                             dict(build(n["right"], depth + 1), branch="1")]}

    return build(0, 0)


def model_view(rule: Rule, shape: tuple[int, int]) -> dict:
    """What the rule computes, for the page: pixel grid, and the table, weights, tree or layers."""
    h, w = shape
    m = rule.doc["model"]
    used = rule.pixels_used()
    signs: dict[int, str] = {}
    if rule.family == "logistic":
        coef = np.asarray(m["weights"], np.float64).ravel()
        signs = {i: "+" if coef[i] > 0 else "-" for i in used or []}
    grid = [[{"on": used is None or (r * w + c) in used, "sign": signs.get(r * w + c, "")}
             for c in range(w)] for r in range(h)]
    view: dict = {"family": rule.family, "grid": grid, "n_used": None if used is None else len(used),
                  "n_pixels": h * w, "signed": bool(signs),
                  **dict.fromkeys(("constant", "lut", "weights", "tree", "n_nodes", "mlp", "memorize"))}
    if rule.family == "constant":
        view["constant"] = {"label": rule.positive if m["label"] else rule.negative, "score": m["score"]}
    elif rule.family == "lut":
        px = [f"({r},{c})" for r, c in m["pixels"]]
        k = len(px)
        view["lut"] = {"pixels": px, "positive_codes": [i for i, v in enumerate(m["table"]) if v],
                       "rows": None if k > 6 else [
                           {"code": i, "bits": [(i >> j) & 1 for j in range(k)], "score": m["scores"][i],
                            "positive": bool(m["table"][i])} for i in range(2**k)]}
    elif rule.family in ("logistic", "nb"):
        W = np.asarray(m["weights"], np.float64)
        flat = W.ravel()
        order = [int(i) for i in np.argsort(-np.abs(flat), kind="stable") if flat[i] != 0][:12]
        view["weights"] = {"bias": m["bias"], "top": [{"pixel": f"({i // w},{i % w})", "weight": float(flat[i])}
                                                     for i in order],
                           "nonzero": int(np.count_nonzero(flat))}
    elif rule.family == "tree":
        view["tree"] = _tree(m["nodes"], shape)
        view["n_nodes"] = len(m["nodes"])
    elif rule.family == "mlp":
        sizes = [len(m["layers"][0]["weights"])] + [len(layer["bias"]) for layer in m["layers"]]
        view["mlp"] = {"activation": m["activation"], "sizes": sizes}
    elif rule.family == "memorize":
        view["memorize"] = {"patterns": len(m["patterns"]),
                            "default": rule.positive if m["default_label"] else rule.negative}
    return view


def misses_view(rule: Rule, ds: Dataset, test_mask: np.ndarray, positive: str, threshold: float | None) -> dict:
    """Confusion matrix on the held-out patches at ``threshold`` and the misses as thumbnails."""
    rows = np.flatnonzero(test_mask)
    grey = ds.images[rows]
    bits = rule.binarize(grey)
    pred = rule.predict(bits, threshold)
    y = ds.labels[rows] == positive
    fp, fn = np.flatnonzero(pred & ~y), np.flatnonzero(~pred & y)

    def thumbs(idx: np.ndarray) -> list[dict]:
        return [{"uri": _thumbnail(grey[i], bits[i]), "name": ds.names[rows[i]]} for i in idx[:MAX_THUMBNAILS]]

    return {"tp": int((pred & y).sum()), "fp": len(fp), "fn": len(fn), "tn": int((~pred & ~y).sum()),
            "false_positives": thumbs(fp), "false_negatives": thumbs(fn),
            "thumb_w": 2 * ds.shape[1] + 1, "thumb_h": ds.shape[0]}


def _rule_of(run_dir: Path, rung: dict) -> tuple[Rule | None, bytes | None, str | None]:
    rel = rung.get("rule_file")
    if not rel:
        return None, None, "no rule file was written in this run (fit --no-rules)"
    path = _inside(run_dir, str(rel))
    if path is None:
        return None, None, f"the rule file {rel} lies outside the run folder and was not read"
    try:
        rule = load_rule(path)
    except PixelfitError as exc:
        return None, None, str(exc)
    return rule, path.read_bytes(), None


# Keys other parts of pixelfit add to summary.json when they computed them; the page takes exactly
# these (a missing member is None), so a run without them, or with more, still renders.
SPEC_KEYS = ("precision", "recall", "confidence", "budget_bytes")
ANSWER_KEYS = ("rung", "verdict", "reason", "extra_test_patches")
CHECK_KEYS = ("duplicate_groups", "duplicate_patches", "cross_class_duplicate_groups", "conflict_groups",
              "conflict_patches", "error_floor", "leaked_test_grey", "leaked_test_binary", "near_duplicate_test")
COST_KEYS = ("flash_bytes", "ram_bytes", "ops")
RUNG_SPEC_TEST_KEYS = ("tp", "fp", "fn", "tn", "precision", "recall", "precision_lower", "recall_lower")
BIAS_VARIANCE_KEYS = ("replicates", "loss", "bias", "variance", "unbiased_variance", "biased_variance")
STRESS_KEYS = ("precision", "recall", "f1")
POINT_KEYS = ("rung", "fraction", "cv_error", "cv_error_std", "test_error")


def _pick(d, keys) -> dict | None:
    """``d`` reduced to ``keys`` (missing ones None); None when ``d`` is not a non-empty dict."""
    if not isinstance(d, dict) or not d:
        return None
    return {k: d.get(k) for k in keys}


def _check(d) -> dict | None:
    c = _pick(d, CHECK_KEYS)
    if c is not None:
        c["suspects"] = [_pick(s, ("path", "label", "score")) for s in (d.get("suspects") or []) if isinstance(s, dict)]
    return c


def _rung_spec(d) -> dict | None:
    s = _pick(d, ("threshold", "chosen_on", "verdict"))
    if s is not None:
        s["cv"] = _pick(d.get("cv"), ("precision", "recall")) or {"precision": None, "recall": None}
        s["test"] = _pick(d.get("test"), RUNG_SPEC_TEST_KEYS) or dict.fromkeys(RUNG_SPEC_TEST_KEYS)
    return s


def _stress(d) -> dict | None:
    if not isinstance(d, dict) or not d:
        return None
    out: dict = {name: _pick(v, STRESS_KEYS) for name, v in d.items() if name != "worst" and isinstance(v, dict)}
    out["worst"] = _pick(d.get("worst"), ("name", "f1_drop"))
    return out


def _rung_entry(r: dict) -> dict:
    r = dict(r)
    r["cost"] = _pick(r.get("cost"), COST_KEYS)
    r["spec"] = _rung_spec(r.get("spec"))
    r["stress"] = _stress(r.get("stress"))
    r["bias_variance"] = _pick(r.get("bias_variance"), BIAS_VARIANCE_KEYS)
    r.setdefault("notes", [])
    return r


def _learning_curve(lc) -> dict | None:
    if not isinstance(lc, dict) or not lc:
        return None
    return {"points": [_pick(p, POINT_KEYS) for p in lc.get("points") or [] if isinstance(p, dict)],
            "verdict": lc.get("verdict") if isinstance(lc.get("verdict"), dict) else {}}


def report_context(run_dir: str | os.PathLike, dataset: Dataset | None = None) -> dict:
    """Everything the template shows, read from the run folder (and the data it records).

    ``dataset``: the patches, when the caller has them loaded already (they are still checked
    against the run's fingerprint); otherwise they are read from the recorded source.
    """
    run_dir = Path(run_dir)
    summary = read_summary(run_dir)
    ds_info = summary["dataset"]
    rungs = [_rung_entry(r) for r in summary["rungs"] if isinstance(r, dict)]
    key, chosen_as = chosen_key(summary)
    chosen = next((r for r in rungs if _key(r) == key), None)
    settings = summary.get("settings") or {}
    split_rows, split_bytes, split_problem = read_split(run_dir, summary)
    ds, test_mask, data_problem = load_run_data(summary, split_rows, dataset)
    b = summary["binarize"]

    hist = None
    if ds is not None and test_mask is not None:
        train = ds.images[~test_mask]
        method = b.get("method")
        if method in ("fixed", "otsu"):
            thr = None if b.get("threshold") is None else np.array([float(b["threshold"])])
        else:
            from pixelfit.data import Binarizer

            thr = Binarizer.from_dict(b).patch_thresholds(train)
        hist = histogram_svg(grey_histogram(train), thr, str(method))

    rung_view = None
    if chosen is not None:
        rule, rule_bytes, rule_problem = _rule_of(run_dir, chosen)
        operating = _pick(rule.doc.get("operating"), ("threshold", "chosen_on")) if rule is not None else None
        threshold = None if not operating or operating.get("threshold") is None else float(operating["threshold"])
        misses = None
        misses_problem = data_problem
        if rule is None:
            misses_problem = rule_problem
        elif ds is not None and test_mask is not None:
            try:
                misses = misses_view(rule, ds, test_mask, str(ds_info.get("positive")), threshold)
            except PixelfitError as exc:
                misses_problem = str(exc)
        recorded = chosen.get("test") or {}
        safe = _KEY.match(key or "") is not None
        pics = {}
        if safe:
            pics = {"native": picture(run_dir, f"heatmaps/{key}.png"),
                    "permutation": picture(run_dir, f"heatmaps/{key}-permutation.png")}
        rung_view = {
            "key": key, "as": chosen_as, "summary": chosen, "rule_problem": rule_problem,
            "model": None if rule is None else model_view(rule, tuple(ds_info["shape"])),
            "rule_name": None if rule is None else Path(str(chosen.get("rule_file"))).name,
            "rule_link": None if rule_bytes is None else _data_link(rule_bytes, "application/json"),
            "operating": operating, "threshold": threshold, "misses": misses, "misses_problem": misses_problem,
            "recorded": {k: recorded.get(k) for k in ("tp", "fp", "fn", "tn")},
            "matches_record": (misses is not None and threshold is None
                               and all(misses[k] == recorded.get(k) for k in ("tp", "fp", "fn", "tn"))),
            "heatmaps": pics, "cost": chosen.get("cost"), "spec": chosen.get("spec"),
            "stress": chosen.get("stress"), "bias_variance": chosen.get("bias_variance"),
        }

    command = settings.get("command")
    return {
        "summary": summary,
        "run_name": run_dir.resolve().name,
        "caution": CAUTION,
        "not_computed": NOT_COMPUTED,
        "spec": _pick(summary.get("spec"), SPEC_KEYS),
        "answer": _pick(summary.get("answer"), ANSWER_KEYS),
        "chosen_key": key, "chosen_as": chosen_as,
        "recommended_key": None if not summary.get("recommended") else
        f"{summary['recommended']['family']}-{summary['recommended']['size']}",
        "dataset": ds_info,
        "check": _check(ds_info.get("check")),
        "skipped": (ds_info.get("skipped") or [])[:MAX_LISTED],
        "n_skipped": len(ds_info.get("skipped") or []),
        "max_listed": MAX_LISTED,
        "split": summary["split"],
        "binarize": b,
        "histogram": hist,
        "data_problem": data_problem,
        "data_maps": {name: picture(run_dir, f"heatmaps/data-{name}.png")
                      for name in ("mean_difference", "mutual_information")},
        "ladder_png": picture(run_dir, "ladder.png"),
        "learning_curve_png": picture(run_dir, "learning_curve.png"),
        "bias_variance_png": picture(run_dir, "bias_variance.png"),
        "stress_png": picture(run_dir, "stress.png"),
        "learning_curve": _learning_curve(summary.get("learning_curve")),
        "rungs": rungs,
        "key": _key,
        "has_cost": any(r.get("cost") for r in rungs),
        "has_spec": any(r.get("spec") for r in rungs),
        "rung": rung_view,
        "command": None if not command else shlex.join(str(a) for a in command),
        "fit_versions": settings.get("versions"),
        "versions": library_versions(),
        "split_problem": split_problem,
        "split_link": None if split_bytes is None else _data_link(split_bytes, "text/csv"),
        "split_sha256": None if split_bytes is None else hashlib.sha256(split_bytes).hexdigest(),
        "settings": {k: v for k, v in settings.items() if k not in ("command", "versions")},
    }


# ---------------------------------------------------------------------------------------------
# rendering


def _template():
    import jinja2

    text = resources.files("pixelfit.review").joinpath("report.html.j2").read_text(encoding="utf-8")
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters["num"] = _num
    env.filters["pct"] = _pct
    return env.from_string(text)


def _num(v, digits: int = 3) -> str:
    if v is None:
        return "–"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        if v != 0 and (abs(v) >= 1e6 or abs(v) < 10 ** -digits):
            return f"{v:.2e}"
        return f"{v:.{digits}f}"
    return str(v)


def _pct(v) -> str:
    return "–" if v is None else f"{100 * float(v):.1f} %"


def render_report(run_dir: str | os.PathLike, dataset: Dataset | None = None) -> str:
    """The review page of a ``pixelfit fit`` output folder, as HTML text (see :func:`report_context`)."""
    return _template().render(**report_context(run_dir, dataset))


def write_report(run_dir: str | os.PathLike, out: str | os.PathLike | None = None,
                 dataset: Dataset | None = None) -> Path:
    """Write the review page of ``run_dir`` atomically to ``out`` (default ``run_dir/report.html``)."""
    html = render_report(run_dir, dataset)
    return write_text(Path(run_dir) / REPORT_NAME if out is None else Path(out), html)
