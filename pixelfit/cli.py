"""The ``pixelfit`` command line: the same core calls as the desktop application.

Exit codes: 0 success; 1 the job ran but could not finish (e.g. cancelled); 2 bad input or
usage, with one line on stderr saying why.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from pixelfit import __version__
from pixelfit.data import Binarizer, Dataset, choose_positive, load_dataset
from pixelfit.errors import PixelfitError

EXIT_OK, EXIT_INCOMPLETE, EXIT_BAD_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line on stderr, exit 2
        self.exit(EXIT_BAD_INPUT, f"pixelfit: {message} (see --help)\n")


def _fmt(v, digits: int = 3) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def _ci(ci) -> str:
    return "" if not ci else f" [{ci[0]:.2f},{ci[1]:.2f}]"


def resolve_dataset_path(path: str) -> Path:
    """The path as given, or a bundled demo set by name (``bottle-caps``) when no such path exists."""
    p = Path(path)
    if p.exists():
        return p
    here = Path(__file__).resolve().parent
    for base in (Path.cwd() / "demo_sets", here.parent / "demo_sets", here / "demo_sets"):
        if (base / path).is_dir():
            return base / path
    return p


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


def ladder_table(summary: dict) -> str:
    head = (f"{'rung':<14} {'log2|H|':>8} {'params':>7} {'train F1':>8} {'CV F1':>13} "
            f"{'held-out P [95% CI]':>21} {'held-out R [95% CI]':>21} {'F1':>6} {'bound':>6}")
    lines = [head, "-" * len(head)]
    for r in summary["rungs"]:
        key = f"{r['family']}-{r['size']}"
        cv = "-" if not r["cv"] else f"{r['cv']['f1_mean']:.3f}±{r['cv']['f1_std']:.3f}"
        t = r["test"]
        p = f"{_fmt(t['precision'])}{_ci(t['precision_ci'])}"
        rc = f"{_fmt(t['recall'])}{_ci(t['recall_ci'])}"
        log2h = r["log2_class_size"]
        log2h_s = "-" if log2h is None else (f"{log2h:.1f}" if log2h < 1e6 else f"{log2h:.2g}")
        bound = "-" if r["bound"] is None else f"{r['bound']['error_upper']:.3f}"
        mark = "  <- recommended" if r["recommended"] else ""
        sig = ""
        vs = r.get("versus_smaller")
        if vs and vs["significant"]:
            sig = " *"
        lines.append(f"{key:<14} {log2h_s:>8} {r['parameters']:>7} {_fmt(r['train']['f1']):>8} {cv:>13} "
                     f"{p:>21} {rc:>21} {_fmt(t['f1']):>6} {bound:>6}{sig}{mark}")
    lines.append("* significantly better than the next smaller rung of its family on held-out patches "
                 "(McNemar, p < 0.05)")
    return "\n".join(lines)


def cmd_fit(args) -> int:
    from pixelfit.ladder import LadderCancelled, conclude, prepare, run_ladder
    from pixelfit.models import parse_families, parse_size_overrides, plan_rungs
    from pixelfit.report import write_fit_outputs

    ds = load_dataset(resolve_dataset_path(args.path))
    binarizer = Binarizer.parse(args.binarize, invert=args.invert)
    prep = prepare(ds, binarizer, args.positive, args.test_fraction, args.seed)
    families = parse_families(args.families)
    rungs_plan = plan_rungs(families, prep.n_pixels, args.max_size, parse_size_overrides(args.sizes))
    if not rungs_plan:
        raise PixelfitError("no rung to train: --max-size and --sizes leave every family empty")
    settings = {"families": families, "max_size": args.max_size, "sizes": args.sizes, "folds": args.folds,
                "seed": args.seed, "target_precision": args.target_precision, "target_recall": args.target_recall}
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
    if args.rules and done_rungs:
        _write_rules(args.out, prep, done_rungs)
    summary = write_fit_outputs(args.out, prep, done_rungs, recommended, settings, cancelled)
    print(ladder_table(summary))
    if recommended is not None:
        print(f"recommended: {recommended.key} (smallest rung within one standard error of the best CV F1)")
    else:
        print("no recommendation: it needs cross-validation (--folds of at least 2)")
    print(f"wrote {args.out}/summary.json, summary.csv, split.csv, ladder.png, heatmaps/"
          f"{', rules/' if args.rules and done_rungs else ''}")
    if cancelled:
        print(f"interrupted: {len(done_rungs)} of {len(rungs_plan)} rungs finished and were written", file=sys.stderr)
        return EXIT_INCOMPLETE
    return EXIT_OK


def _write_rules(out, prep, rungs) -> None:
    """Rule files, when the rule-file module is present."""
    try:
        from pixelfit.rulefile import save_rung
    except ImportError:
        return
    for r in rungs:
        r.rule_file = f"rules/{r.key}.json"
        save_rung(Path(out) / r.rule_file, prep, r)


def cmd_demo(args) -> int:
    from pixelfit.demo import write_demo_set

    written = write_demo_set(args.name, args.out)
    print(f"wrote {len(written)} patches of the synthetic {args.name} set to {args.out}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
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
                       "summary.json, summary.csv, split.csv, ladder.png and heatmaps/ into --out.")
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
    f.set_defaults(func=cmd_fit)

    from pixelfit.demo import GENERATORS

    d = sub.add_parser("demo", help="regenerate a bundled synthetic demo set",
                       description="Write a bundled demo set, generated from its fixed seed, as PNG patches; "
                       "the result is the same byte for byte as the shipped copy.")
    d.add_argument("name", choices=list(GENERATORS), help="which set")
    d.add_argument("--out", required=True, help="folder of the set (new, empty, or an earlier copy of it)")
    d.set_defaults(func=cmd_demo)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_OK
    try:
        return int(args.func(args))
    except PixelfitError as exc:
        print(f"pixelfit: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:
        return EXIT_OK
