"""The ``pixelfit`` command line: the same core calls as the desktop application.

Exit codes: 0 success; 1 the job ran but could not finish (cancelled, or an output could not be
written); 2 bad input or usage. Both 1 and 2 come with one line on stderr saying why.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from pixelfit import __version__
from pixelfit.data import Binarizer, Dataset, choose_positive, load_dataset, resolve_dataset_path
from pixelfit.errors import PixelfitError
from pixelfit.text import ladder_table, metrics_line, pixel_grid

EXIT_OK, EXIT_INCOMPLETE, EXIT_BAD_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line on stderr, exit 2
        self.exit(EXIT_BAD_INPUT, f"pixelfit: {message} (see --help)\n")


def scan_report(ds: Dataset) -> dict:
    pos, neg = choose_positive(ds.counts)
    return {"source": ds.source, "layout": ds.layout, "shape": list(ds.shape), "patches": len(ds),
            "counts": ds.counts, "default_positive": pos, "negative": neg,
            "split": None if ds.subset is None else {part: int((ds.subset == part).sum()) for part in ("train", "test")},
            "skipped": [{"path": s.path, "reason": s.reason} for s in ds.skipped]}


def cmd_scan(args) -> int:
    ds = load_dataset(resolve_dataset_path(args.path))
    rep = scan_report(ds)
    if args.json:
        print(json.dumps(rep, indent=2, ensure_ascii=False))
        return EXIT_OK
    h, w = rep["shape"]
    print(f"{rep['source']}: {rep['patches']} patches of {h}x{w} ({rep['layout']})")
    for cls, n in rep["counts"].items():
        mark = "  <- positive by default" if cls == rep["default_positive"] else ""
        print(f"  {cls:<20} {n:>7}{mark}")
    if rep["split"]:
        print(f"  pre-split: {rep['split']['train']} train, {rep['split']['test']} test")
    if rep["skipped"]:
        print(f"skipped {len(rep['skipped'])} file(s):")
        for s in rep["skipped"]:
            print(f"  {s['path']}: {s['reason']}")
    else:
        print("skipped nothing")
    return EXIT_OK


class _ProgressBar:
    """A one-line progress bar on stderr (a line per rung when stderr is not a terminal)."""

    def __init__(self, stream=None, width: int = 30):
        self.stream = stream or sys.stderr
        self.width = width
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def update(self, done: int, total: int, message: str, rung_done: bool) -> None:
        if not self.tty and not rung_done:
            return
        filled = int(self.width * done / max(1, total))
        line = f"[{'#' * filled}{'.' * (self.width - filled)}] {done}/{total} {message}"
        if self.tty:
            self.stream.write("\r" + line[:100].ljust(100))
        else:
            self.stream.write(line + "\n")
        self.stream.flush()

    def close(self) -> None:
        if self.tty:
            self.stream.write("\r" + " " * 100 + "\r")
            self.stream.flush()


def cmd_fit(args) -> int:
    from pixelfit.ladder import LadderCancelled, conclude, prepare, run_ladder
    from pixelfit.models import parse_families, parse_size_overrides, plan_rungs
    from pixelfit.outputs import write_fit_outputs
    from pixelfit.robustness import CheckSettings, augment

    check_settings = CheckSettings(bias_variance=args.bias_variance, seed=args.seed)
    ds = load_dataset(resolve_dataset_path(args.path))
    binarizer = Binarizer.parse(args.binarize, invert=args.invert)
    prep = augment(prepare(ds, binarizer, args.positive, args.test_fraction, args.seed), args.augment)
    families = parse_families(args.families)
    rungs_plan = plan_rungs(families, prep.n_pixels, args.max_size, parse_size_overrides(args.sizes))
    if not rungs_plan:
        raise PixelfitError("no rung to train: --max-size and --sizes leave every family empty")
    try:  # before training, so an unusable --out is said at once rather than after the ladder
        Path(args.out).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise PixelfitError(f"--out {args.out}: cannot create the folder ({exc.strerror or exc})") from None
    settings = {"families": families, "max_size": args.max_size, "sizes": args.sizes, "folds": args.folds,
                "seed": args.seed, "target_precision": args.target_precision, "target_recall": args.target_recall,
                "augment": args.augment, "bias_variance": args.bias_variance}
    h, w = prep.shape
    print(f"{ds.source}: {len(ds)} patches of {h}x{w}; detecting {prep.positive!r} against {prep.negative!r}; "
          f"{len(prep.y_train)} train / {len(prep.y_test)} held-out"
          f"{' (pre-split)' if prep.presplit else ''}; binarize {prep.binarizer.describe()}")
    if ds.skipped:
        print(f"skipped {len(ds.skipped)} file(s) on import (see summary.json or `pixelfit scan`)")
    bar = _ProgressBar()
    done_rungs = []
    cancelled = False
    try:
        for pr in run_ladder(prep, rungs_plan, args.folds, args.seed, target_precision=args.target_precision,
                             target_recall=args.target_recall):
            if pr.rung is not None:
                done_rungs.append(pr.rung)
            bar.update(pr.done, pr.total, pr.message, pr.rung is not None)
    except (KeyboardInterrupt, LadderCancelled):
        cancelled = True
    finally:
        bar.close()
    recommended = conclude(done_rungs, prep.y_test) if done_rungs else None
    checks = None
    if done_rungs and not cancelled:
        checks, cancelled = _run_checks(prep, done_rungs, recommended, check_settings)
    if args.rules and done_rungs:
        _write_rules(args.out, prep, done_rungs, checks)
    summary = write_fit_outputs(args.out, prep, done_rungs, recommended, settings, cancelled, checks)
    print(ladder_table(summary))
    if recommended is not None:
        print(f"recommended: {recommended.key} (smallest rung within one standard error of the best CV F1)")
    else:
        print("no recommendation: it needs cross-validation (--folds of at least 2)")
    pictures = "".join(f", {p}" for p in ("bias_variance.png", "learning_curve.png", "stress.png")
                       if (Path(args.out) / p).exists())
    print(f"wrote {args.out}/summary.json, summary.csv, split.csv, ladder.png{pictures}, heatmaps/"
          f"{', rules/' if args.rules and done_rungs else ''}")
    if cancelled:
        print(f"interrupted: {len(done_rungs)} of {len(rungs_plan)} rungs finished and were written", file=sys.stderr)
        return EXIT_INCOMPLETE
    return EXIT_OK


def _run_checks(prep, rungs, recommended, check_settings):
    """The post-pass (bias and variance, learning curve, stress tests) with a progress bar.

    Returns the checks finished (None when none did) and whether the user interrupted it.
    """
    from pixelfit.ladder import LadderCancelled
    from pixelfit.robustness import run_checks

    bar = _ProgressBar()
    checks = None
    try:
        for pr in run_checks(prep, rungs, prep.dataset.images[prep.test_mask], recommended, check_settings):
            if pr.checks is not None:
                checks = pr.checks
            bar.update(pr.done, pr.total, pr.message, pr.checks is not None)
    except (KeyboardInterrupt, LadderCancelled):
        return checks, True
    finally:
        bar.close()
    return checks, False


def _write_rules(out, prep, rungs, checks=None) -> None:
    from pixelfit.rulefile import save_rung

    for r in rungs:
        r.rule_file = f"rules/{r.key}.json"
        save_rung(Path(out) / r.rule_file, prep, r, None if checks is None else checks.rung_entry(r.key))


def cmd_show(args) -> int:
    import numpy as np

    from pixelfit.rulefile import load_rule

    rule = load_rule(args.rule)
    d = rule.doc
    ev = d.get("evaluation") or {}
    h, w = rule.shape
    print(f"{args.rule}: {rule.family}-{rule.size} rule over {h}x{w} patches "
          f"(pixelfit {d['pixelfit_version']}, schema {d['schema_version']}, created {d['created']})")
    print(f"detects {rule.positive!r} against {rule.negative!r}; binarize {rule.binarizer.describe()}")
    used = rule.pixels_used()
    signs = None
    if rule.family == "logistic":
        coef = np.asarray(d["model"]["weights"]).ravel()
        signs = {i: "+" if coef[i] > 0 else "-" for i in used or []}
    n_used = "all" if used is None else str(len(used))
    print(f"pixels read: {n_used} of {h * w}" + ("  ('+'/'-': sign of the weight)" if signs else ""))
    print(pixel_grid(rule.shape, used, signs))
    if rule.family == "lut":
        px = d["model"]["pixels"]
        print("truth table (pixels " + ", ".join(f"({r},{c})" for r, c in px) + "; bit j = j-th pixel):")
        ones = [i for i, v in enumerate(d["model"]["table"]) if v]
        print(f"  positive for pattern codes: {', '.join(map(str, ones)) or 'none'}")
    print("metrics:")
    print(metrics_line("train", ev.get("train")))
    cv = ev.get("cv")
    print(f"  {'CV':<9} " + ("-" if not cv else f"F1 {cv['f1_mean']:.3f} ± {cv['f1_std']:.3f} over {cv['folds']} folds"))
    print(metrics_line("held-out", ev.get("test")))
    log2h = ev.get("log2_class_size")
    size = [f"parameters {ev.get('parameters')}"]
    if log2h is not None:
        size.append(f"log2 class size {log2h:.4g}")
    if ev.get("vc_dim") is not None:
        size.append(f"VC dimension {ev['vc_dim']}")
    print("size: " + ", ".join(size))
    b = ev.get("bound")
    print("bound: " + ("no bound applies to this family" if not b else
                       f"true error <= {b['error_upper']:.3f} with probability {1 - b['delta']:.2f} ({b['method']})"))
    td = d["training_data"]
    print(f"training data fingerprint: {td['fingerprint']}")
    print(f"caution: {d['caution']}")
    return EXIT_OK


def cmd_apply(args) -> int:
    import csv
    import io

    import numpy as np

    from pixelfit._atomic import write_text
    from pixelfit.data import load_for_apply
    from pixelfit.evaluate import detection_metrics
    from pixelfit.rulefile import load_rule

    rule = load_rule(args.rule)
    ds = load_for_apply(resolve_dataset_path(args.path), rule.shape)
    keep = np.ones(len(ds), bool)
    if args.split:
        keep = _subset_from_split(args.split, args.subset, ds.names)
    X = rule.binarize(ds.images[keep])
    scores = rule.scores(X)
    pred = rule.predict(X, args.threshold)
    names = [n for n, k in zip(ds.names, keep) if k]
    labels = ds.labels[keep]
    labeled = bool(len(labels)) and all(lab != "" for lab in labels)
    buf = io.StringIO()
    wr = csv.writer(buf, lineterminator="\n")
    wr.writerow(["path", "score", "prediction"] + (["label"] if labeled else []))
    for i, name in enumerate(names):
        row = [name, f"{scores[i]:.6g}", rule.positive if pred[i] else rule.negative]
        wr.writerow(row + ([labels[i]] if labeled else []))
    if args.csv:
        write_text(args.csv, buf.getvalue())
    else:
        sys.stdout.write(buf.getvalue())
    info = sys.stderr if not args.csv else sys.stdout
    print(f"applied {rule.family}-{rule.size} to {len(names)} patches: {int(pred.sum())} called {rule.positive!r}"
          + (f" (threshold {args.threshold:g})" if args.threshold is not None else ""), file=info)
    for s in ds.skipped:
        print(f"  skipped {s.path}: {s.reason}", file=info)
    if labeled:
        known = set(labels.tolist())
        if rule.positive not in known:
            print(f"no patch is labeled {rule.positive!r}; recall is undefined", file=info)
        m = detection_metrics(labels == rule.positive, pred)
        print(metrics_line("labels", m).strip(), file=info)
    if args.csv:
        print(f"wrote {args.csv}", file=info)
    return EXIT_OK


def _subset_from_split(split_path: str, subset: str, names: list[str]):
    import csv

    import numpy as np

    try:
        with open(split_path, newline="", encoding="utf-8") as fh:
            rows = {r["path"]: r["subset"] for r in csv.DictReader(fh)}
    except (OSError, KeyError) as exc:
        raise PixelfitError(f"{split_path}: cannot read a split.csv with path and subset columns ({exc})") from None
    missing = [n for n in names if n not in rows]
    if missing:
        raise PixelfitError(f"{split_path}: {len(missing)} patch(es) are not in the split, first {missing[0]}")
    return np.array([rows[n] == subset for n in names], bool)


def cmd_export(args) -> int:
    from pixelfit.firmware import export_c
    from pixelfit.rulefile import load_rule

    rule = load_rule(args.rule)
    vectors = None
    if args.vectors_from:
        from pixelfit.data import load_for_apply

        ds = load_for_apply(resolve_dataset_path(args.vectors_from), rule.shape)
        vectors = rule.binarize(ds.images[: args.max_vectors])
    h, v = export_c(rule, args.c, vectors)
    print(f"wrote {h} and {v}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from pixelfit.demo import write_demo_set

    written = write_demo_set(args.name, args.out)
    print(f"wrote {len(written)} patches of the synthetic {args.name} set to {args.out}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from pixelfit.conventions import AUGMENTS, DEFAULT_REPLICATES

    p = _Parser(prog="pixelfit", description="How few pixels does a detector need? Train a ladder of rules "
                "of increasing size over small binary patches and measure each one.")
    p.add_argument("--version", action="version", version=f"pixelfit {__version__}")
    sub = p.add_subparsers(dest="command", parser_class=_Parser, metavar="COMMAND")

    s = sub.add_parser("scan", help="report what would be imported from a folder or .npz",
                       description="Report what would be imported: classes and counts, patch shape, skipped files.")
    s.add_argument("path", help="folder of patches, .npz file, or a demo set name")
    s.add_argument("--json", action="store_true", help="print the report as JSON")
    s.set_defaults(func=cmd_scan)

    f = sub.add_parser("fit", help="train the ladder and write the results",
                       description="Train the ladder of models by size on the binarized patches; write "
                       "summary.json, summary.csv, split.csv, ladder.png, heatmaps/ and the pictures of the checks "
                       "(bias_variance.png, learning_curve.png, stress.png) into --out.")
    f.add_argument("path", help="folder of patches, .npz file, or a demo set name (e.g. bottle-caps)")
    f.add_argument("--out", required=True, help="output folder (created if missing)")
    f.add_argument("--binarize", default="otsu", metavar="METHOD",
                   help="fixed:T (pixel >= T), otsu (one threshold over the training set), otsu-patch, "
                        "mean-patch; default otsu")
    f.add_argument("--invert", action="store_true", help="flip the bits after thresholding (dark objects)")
    f.add_argument("--positive", metavar="CLASS", help="class to detect (default: the less frequent class)")
    f.add_argument("--test-fraction", type=float, default=0.25, help="held-out share when not pre-split (0.25)")
    f.add_argument("--seed", type=int, default=0, help="seed of the split, folds and models (0)")
    f.add_argument("--families", metavar="LIST", help="comma-separated: constant,lut,nb,logistic,tree,mlp,memorize "
                   "(default all)")
    f.add_argument("--max-size", type=int, metavar="K", help="largest size on every family's axis")
    f.add_argument("--sizes", action="append", metavar="FAMILY=LIST", help="one family's sizes, e.g. lut=1,2,3,5")
    f.add_argument("--folds", type=int, default=5, help="cross-validation folds on the training part; 0 turns it off")
    f.add_argument("--target-precision", type=float, metavar="P", help="find the threshold meeting this precision")
    f.add_argument("--target-recall", type=float, metavar="R", help="find the threshold meeting this recall")
    f.add_argument("--no-rules", dest="rules", action="store_false", help="do not write rules/<family>-<size>.json")
    f.add_argument("--bias-variance", type=int, default=DEFAULT_REPLICATES, metavar="B",
                   help=f"bootstrap replicates per rung for the bias-variance decomposition; 0 turns it off "
                        f"({DEFAULT_REPLICATES})")
    f.add_argument("--augment", choices=AUGMENTS, default="none",
                   help="shift1: train on the training patches plus their eight one-pixel shifts (none)")
    f.set_defaults(func=cmd_fit)

    sh = sub.add_parser("show", help="print a readable summary of a rule file",
                        description="Family and size, pixels read (as a grid), metrics with intervals, bound, "
                        "fingerprint, caution.")
    sh.add_argument("rule", help="a rule file (rules/<family>-<size>.json)")
    sh.set_defaults(func=cmd_show)

    a = sub.add_parser("apply", help="apply a rule file to patches",
                       description="Apply a rule (with its own binarization) to every patch under PATH and write "
                       "path,score,prediction rows (plus label when known); with labels, print the metrics.")
    a.add_argument("rule")
    a.add_argument("path", help="folder (any layout, labels optional), image file or .npz")
    a.add_argument("--csv", metavar="OUT", help="write the rows here instead of standard output")
    a.add_argument("--threshold", type=float, metavar="T", help="call positive when score >= T "
                   "(default: the rule's own decision)")
    a.add_argument("--split", metavar="SPLIT_CSV", help="a split.csv from `pixelfit fit`; with --subset, apply to "
                   "that part only")
    a.add_argument("--subset", choices=("train", "test"), default="test", help="part of --split to use (test)")
    a.set_defaults(func=cmd_apply)

    e = sub.add_parser("export", help="export a rule file as C99 for firmware",
                       description="Write a self-contained C99 header with a predict function over a row-major "
                       "patch of 0/1 bytes, and OUT_vectors.h with test vectors.")
    e.add_argument("rule")
    e.add_argument("--c", required=True, metavar="OUT.h", help="header to write")
    e.add_argument("--vectors-from", metavar="PATH", help="take test vectors from these patches (default: "
                   "generated patches)")
    e.add_argument("--max-vectors", type=int, default=256, help="most test vectors taken from --vectors-from (256)")
    e.set_defaults(func=cmd_export)
    g = sub.add_parser("gui", help="open the desktop application",
                       description="Open the desktop application on a folder, .npz file or demo set "
                       "(default: the bundled bottle-caps set when present).")
    g.add_argument("path", nargs="?", help="folder of patches, .npz file, or a demo set name")
    g.set_defaults(func=cmd_gui)

    from pixelfit.demo import GENERATORS

    d = sub.add_parser("demo", help="regenerate a bundled synthetic demo set",
                       description="Write a bundled demo set, generated from its fixed seed, as PNG patches; "
                       "the result is the same byte for byte as the shipped copy.")
    d.add_argument("name", choices=list(GENERATORS), help="which set")
    d.add_argument("--out", required=True, help="folder of the set (new, empty, or an earlier copy of it)")
    d.set_defaults(func=cmd_demo)
    return p


def cmd_gui(args) -> int:
    import importlib.util

    missing = [m for m in ("PySide6", "pyqtgraph") if importlib.util.find_spec(m) is None]
    if missing:
        raise PixelfitError(f"the desktop application needs {' and '.join(missing)}; install pixelfit with its dependencies")
    from pixelfit.app import launch  # Qt is imported only from here on

    return launch(args.path)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:  # plain `pixelfit` opens the desktop application on the demo set
        args = parser.parse_args(["gui"])
    try:
        return int(args.func(args))
    except PixelfitError as exc:
        # One line, whatever a message quoted from a file or a library held.
        print(f"pixelfit: {' '.join(str(exc).splitlines())}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:
        return EXIT_OK
    except OSError as exc:  # a write that failed (disk full, folder gone): what was written before stays
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"pixelfit: could not finish: {where}{' '.join(str(exc.strerror or exc).splitlines())}", file=sys.stderr)
        return EXIT_INCOMPLETE
