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
from pixelfit.data import Binarizer, Dataset, choose_positive, load_dataset
from pixelfit.demo import resolve_dataset_path as _resolve
from pixelfit.errors import PixelfitError
from pixelfit.text import (
    answer_text,
    bits_grid,
    comparison_lines,
    explanation_lines,
    fmt,
    ladder_table,
    metrics_line,
    pixel_grid,
    spec_table,
)

EXIT_OK, EXIT_INCOMPLETE, EXIT_BAD_INPUT = 0, 1, 2

#: The flag of each setting a core refusal may name in its ``field``.
FLAGS = {"out": "--out", "positive": "--positive", "folds": "--folds", "sizes": "--sizes", "max_size": "--max-size",
         "test_fraction": "--test-fraction", "seed": "--seed", "binarize": "--binarize", "threads": "--threads"}


def resolve_dataset_path(path: str):
    """A folder, file or demo-set name; a demo set generated on first use is noted on stderr."""
    return _resolve(path, note=lambda text: print(f"pixelfit: {text}", file=sys.stderr))


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line on stderr, exit 2
        self.exit(EXIT_BAD_INPUT, f"pixelfit: {message} (see --help)\n")


def scan_check(ds: Dataset) -> dict:
    """The data check as ``pixelfit fit`` with its defaults would find it (otsu binarization, the
    default split); where that split is impossible (too few patches), over all patches, unsplit."""
    from pixelfit.data import binary_target, check_data, pack_binarized
    from pixelfit.ladder import prepare

    try:
        prep = prepare(ds, Binarizer("otsu"))
    except PixelfitError as exc:
        pos, _ = choose_positive(ds.counts)
        B = Binarizer("otsu").fit(ds.images).transform(ds.images).reshape(len(ds), -1)
        check = check_data(ds.images, ds.labels, binary_target(ds, pos), pack_binarized(B), B.shape[1])
        return {**check.counts(), "binarize": "otsu", "split": None, "no_split": str(exc)}
    assert prep.check is not None
    return {**prep.check.counts(), "binarize": "otsu", "split": prep.split_method}


def scan_report(ds: Dataset) -> dict:
    pos, neg = choose_positive(ds.counts)
    return {"source": ds.source, "layout": ds.layout, "shape": list(ds.shape), "patches": len(ds),
            "counts": ds.counts, "default_positive": pos, "negative": neg,
            "split": None if ds.subset is None else {part: int((ds.subset == part).sum()) for part in ("train", "test")},
            "skipped": [{"path": s.path, "reason": s.reason} for s in ds.skipped],
            "check": scan_check(ds)}


def check_lines(c: dict) -> list[str]:
    """The data check's counts as text (scan, check)."""
    lines = [f"duplicates: {c['duplicate_groups']} group(s) of identical grey patches holding "
             f"{c['duplicate_patches']} patches; {c['cross_class_duplicate_groups']} group(s) span classes"]
    floor = "-" if c["error_floor"] is None else f"{100 * c['error_floor']:.1f} %"
    lines.append(f"conflicts: {c['conflict_groups']} group(s) of identical binarized patches carry both labels "
                 f"({c['conflict_patches']} patches); error floor {floor}")
    if c["leaked_test_grey"] is not None:
        lines.append(f"leakage: {c['leaked_test_grey']} held-out patch(es) with a grey copy in training, "
                     f"{c['leaked_test_binary']} with a binarized copy, {c['near_duplicate_test']} within one bit")
    return lines


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
    c = rep["check"]
    where = {None: "all patches, unsplit", "given": "the folder's own split"}.get(
        c["split"], f"the default {c['split']} split")
    if c.get("no_split"):
        print(f"no default split: {c['no_split']}")
    print(f"data check (binarized with otsu, the default; {where}):")
    for line in check_lines(c):
        print("  " + line)
    return EXIT_OK


def cmd_check(args) -> int:
    from pixelfit.ladder import prepare
    from pixelfit.outputs import write_check_outputs

    ds = load_dataset(resolve_dataset_path(args.path))
    binarizer = Binarizer.parse(args.binarize, invert=args.invert)
    prep = prepare(ds, binarizer, args.positive, args.test_fraction, args.seed, args.split)
    try:
        Path(args.out).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise PixelfitError(f"--out {args.out}: cannot create the folder ({exc.strerror or exc})") from None
    doc = write_check_outputs(args.out, prep)
    assert prep.check is not None
    print(f"{ds.source}: {len(ds)} patches; {len(prep.y_train)} train / {len(prep.y_test)} held-out "
          f"({prep.split_method} split); binarize {prep.binarizer.describe()}")
    for line in check_lines(doc["check"]):
        print("  " + line)
    print("  suspect labels: not looked for (they need trained rungs: see `pixelfit fit`)")
    print(f"wrote {args.out}/check.json, check.csv ({len(prep.check.findings)} flagged row(s))")
    return EXIT_OK


def _add_split_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--split", choices=("group-duplicates", "stratified"), default="group-duplicates",
                   help="how to hold out patches when the folder is not pre-split: group-duplicates (the "
                        "default) keeps identical grey patches on one side of the split and of every CV fold; "
                        "stratified draws patches one by one")
    p.add_argument("--test-fraction", type=float, default=0.25, help="held-out share when not pre-split (0.25)")
    p.add_argument("--seed", type=int, default=0, help="seed of the split, folds and models, 0 .. 2**32-1 (0)")


class _ProgressBar:
    """A one-line progress bar on stderr (a line per rung when stderr is not a terminal)."""

    def __init__(self, stream=None, width: int = 30):
        self.stream = stream or sys.stderr
        self.width = width
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def update(self, done: int, total: int, message: str, rung_done: bool, notice: bool = False) -> None:
        if notice:  # a fact to keep (a search's estimate): its own line, terminal or not
            self.stream.write(("\r" + " " * 100 + "\r" if self.tty else "") + message + "\n")
            self.stream.flush()
            return
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
    from pixelfit.evaluate import parse_spec
    from pixelfit.families import parse_families, parse_size_overrides, plan_rungs
    from pixelfit.ladder import effective_folds, prepare
    from pixelfit.review import library_versions
    from pixelfit.robustness import CheckSettings, augment
    from pixelfit.runfolder import OccupiedFolderError, RunFolder

    if args.spec is None and (args.confidence is not None or args.budget_bytes is not None):
        raise PixelfitError("--confidence and --budget-bytes go with --spec, e.g. --spec \"precision>=0.90,recall>=0.85\"")
    spec = None if args.spec is None else parse_spec(args.spec, 0.95 if args.confidence is None else args.confidence,
                                                      args.budget_bytes)
    from pixelfit.ladder import available_cpus, check_workers

    threads = check_workers(available_cpus() if args.threads is None else args.threads)
    check_settings = CheckSettings(bias_variance=args.bias_variance, seed=args.seed, workers=threads)
    source = resolve_dataset_path(args.path)
    folder = RunFolder(args.out, [source], overwrite=args.overwrite)
    try:
        folder.check()  # before the import, so a misplaced --out is said at once
    except OccupiedFolderError as exc:
        raise PixelfitError(f"{exc} (--overwrite)", field=exc.field) from None
    ds = load_dataset(source)
    binarizer = Binarizer.parse(args.binarize, invert=args.invert)
    prep = augment(prepare(ds, binarizer, args.positive, args.test_fraction, args.seed, args.split), args.augment)
    families = parse_families(args.families)
    rungs_plan = plan_rungs(families, prep.n_pixels, args.max_size, parse_size_overrides(args.sizes))
    effective_folds(prep.y_train, args.folds)  # refuse bad folds before anything is printed or locked
    if not rungs_plan:
        raise PixelfitError("no rung to train: --max-size and --sizes leave every family empty")
    settings = {"families": families, "max_size": args.max_size, "sizes": args.sizes, "folds": args.folds,
                "split": args.split, "seed": args.seed, "spec": args.spec,
                "exhaustive": args.exhaustive, "scheduler": args.scheduler,
                "augment": args.augment, "bias_variance": args.bias_variance, "threads": threads}
    settings["command"] = ["pixelfit", *getattr(args, "argv", [])]
    settings["versions"] = library_versions()
    try:  # the lock is held from before training until the run is in place
        folder.open()
    except OccupiedFolderError as exc:
        raise PixelfitError(f"{exc} (--overwrite)", field=exc.field) from None
    except OSError as exc:
        raise PixelfitError(f"{args.out}: cannot create the folder ({exc.strerror or exc})", field="out") from None
    try:
        for note in folder.notes:
            print(f"note: {note}", file=sys.stderr)
        return _fit_into(args, folder, ds, prep, rungs_plan, settings, spec, check_settings)
    finally:
        folder.close()


def _fit_into(args, folder, ds, prep, rungs_plan, settings, spec, check_settings) -> int:
    from pixelfit.evaluate import apply_spec
    from pixelfit.ladder import LadderCancelled, conclude, measure_integer, run_ladder, suspect_labels
    from pixelfit.outputs import write_fit_outputs

    h, w = prep.shape
    check = prep.check
    assert check is not None
    leak = ""
    if check.leaked:
        leak = (f" ({check.figures['leaked_test_grey']} with a grey copy in training, "
                f"{check.figures['leaked_test_binary']} with a binarized copy;")
    print(f"{ds.source}: {len(ds)} patches of {h}x{w}; detecting {prep.positive!r} against {prep.negative!r}; "
          f"{len(prep.y_train)} train / {len(prep.y_test)} held-out{leak}"
          f"{(' ' if leak else ' (') + ('pre-split)' if prep.presplit else f'{prep.split_method} split)')}; "
          f"binarize {prep.binarizer.describe()}")
    warning = check.warning()
    if warning:
        print(warning)
    if ds.skipped:
        print(f"skipped {len(ds.skipped)} file(s) on import (see summary.json or `pixelfit scan`)")
    bar = _ProgressBar()
    done_rungs = []
    cancelled = False
    try:
        for pr in run_ladder(prep, rungs_plan, args.folds, args.seed, exhaustive=args.exhaustive,
                             scheduler=args.scheduler, workers=check_settings.workers):
            if pr.rung is not None:
                done_rungs.append(pr.rung)
            bar.update(pr.done, pr.total, pr.message, pr.rung is not None, pr.notice)
    except (KeyboardInterrupt, LadderCancelled):
        cancelled = True
    finally:
        bar.close()
    recommended = conclude(done_rungs, prep.y_test) if done_rungs else None
    check.suspects = suspect_labels(prep, done_rungs)
    answer = apply_spec(done_rungs, prep.y_train, prep.y_test, spec)
    for r in done_rungs:  # what ships is the integer predictor at the threshold the spec chose
        measure_integer(r, prep.X_test, prep.y_test)
    checks = None
    if done_rungs and not cancelled:
        checks, cancelled = _run_checks(prep, done_rungs, recommended, check_settings)
    if args.rules and done_rungs:
        _write_rules(folder.staging, prep, done_rungs, checks)
    summary = write_fit_outputs(folder.staging, prep, done_rungs, recommended, settings, cancelled, spec, answer,
                                checks)
    if args.report:  # inside the run, so the page and the files it describes land together
        from pixelfit.review import REPORT_NAME, write_report

        write_report(folder.staging, dataset=ds)
    folder.commit()
    print(ladder_table(summary))
    leak_free = [(f"{r['family']}-{r['size']}", r["held_out_without_leaked"]) for r in summary["rungs"]
                 if r.get("held_out_without_leaked")]
    if leak_free:
        n_left = leak_free[0][1]["left_out"]
        changes = [f"{k} {fmt(v['f1'])} ({'-' if v['f1_change'] is None else format(v['f1_change'], '+.3f')})"
                   for k, v in leak_free]
        print(f"held-out F1 without the {n_left} patch(es) whose binarized copy is in training: " + ", ".join(changes))
    if check.suspects:
        print(f"suspect labels: {len(check.suspects)} training patch(es) the strongest rungs all call the other "
              f"class (listed in summary.json and check.csv; nothing was relabelled)")
    if recommended is not None:
        print(f"recommended: {recommended.key} (smallest rung within one standard error of the best CV F1)")
    else:
        print("no recommendation: it needs cross-validation (--folds of at least 2)")
    pictures = "".join(f", {p}" for p in ("bias_variance.png", "learning_curve.png", "stress.png")
                       if (Path(args.out) / p).exists())
    print(f"wrote {args.out}/summary.json, summary.csv, split.csv, check.csv, ladder.png{pictures}, heatmaps/"
          f"{', rules/' if args.rules and done_rungs else ''}")
    if args.report:
        print(f"wrote {Path(args.out) / REPORT_NAME}")
    if folder.previous is not None:
        print(f"the earlier content of {args.out} is kept in {folder.previous}")
    if spec is not None:
        print(spec_table(summary))
        print(answer_text(summary))
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
        save_rung(Path(out) / r.rule_file, prep, r, checks=None if checks is None else checks.rung_entry(r.key))


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
    print(f"operating threshold: {rule.operating_threshold:.6g}, chosen on {rule.operating_chosen_on} "
          "(a patch is positive when its score is above it)")
    sp = ev.get("spec")
    if isinstance(sp, dict) and isinstance(sp.get("test"), dict):
        t = sp["test"]
        print(f"spec verdict: {sp.get('verdict')} (held-out at threshold {sp.get('threshold')}: tp {t.get('tp')}, "
              f"fp {t.get('fp')}, fn {t.get('fn')}, tn {t.get('tn')}; precision {fmt(t.get('precision'))} "
              f"(lower {fmt(t.get('precision_lower'))}), recall {fmt(t.get('recall'))} "
              f"(lower {fmt(t.get('recall_lower'))}))")
    cost = ev.get("cost")
    if isinstance(cost, dict):
        ops = cost.get("ops")
        ops_text = (f"at most {ops.get('total')} operations per patch" if isinstance(ops, dict) else f"ops {ops}")
        print(f"firmware cost (integer-only C export): {cost.get('flash_bytes')} bytes of flash tables, "
              f"{cost.get('ram_bytes')} bytes of locals, {ops_text}")
    print("metrics (at the rule's own decision, score above 0.5):")
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
    truth, mismatch = _apply_truth(rule, labels if labeled else None, args.positive)
    buf = io.StringIO()
    wr = csv.writer(buf, lineterminator="\n")
    labeled = truth is not None
    wr.writerow(["path", "score", "prediction"] + (["label"] if labeled else []))
    for i, name in enumerate(names):
        row = [name, f"{scores[i]:.6g}", rule.positive if pred[i] else rule.negative]
        wr.writerow(row + ([labels[i]] if labeled else []))
    # The rows go to --csv (a file, or "-" for standard output) or, with --verbose, to standard
    # output; without either only the summary is printed (on standard error when rows share stdout).
    to_stdout = args.csv == "-" or (args.verbose and not args.csv)
    if args.csv and args.csv != "-":
        write_text(args.csv, buf.getvalue())
    elif to_stdout:
        sys.stdout.write(buf.getvalue())
    info = sys.stderr if to_stdout else sys.stdout
    used = (f"threshold {args.threshold:g}, given" if args.threshold is not None else
            f"threshold {rule.operating_threshold:g}, the rule's, chosen on {rule.operating_chosen_on}")
    print(f"applied {rule.family}-{rule.size} to {len(names)} patches: {int(pred.sum())} called {rule.positive!r} "
          f"(score above {used})", file=info)
    for s in ds.skipped:
        print(f"  skipped {s.path}: {s.reason}", file=info)
    if mismatch:
        print(mismatch, file=info)
    if truth is not None:
        if not truth.any():
            print(f"no patch is labeled {args.positive or rule.positive!r}; recall is undefined", file=info)
        m = detection_metrics(truth, pred)
        print(metrics_line("labels", m).strip(), file=info)
    if args.csv and args.csv != "-":
        print(f"wrote {args.csv}", file=info)
    elif not to_stdout:
        print("one line per patch: add --csv OUT.csv (or --csv - for standard output) or --verbose", file=info)
    return EXIT_OK


def _apply_truth(rule, labels, positive: str | None):
    """Which patches are truly the rule's positive class: (bool array or None, a note or None).

    The folder's classes must be the rule's two (a pooled ``not-X`` negative takes any other
    class), or ``positive`` names the folder class that stands for the rule's positive one;
    otherwise the patches are scored as unlabelled, with a note saying why.
    """
    if labels is None:
        if positive is not None:
            raise PixelfitError("these patches carry no class labels, so no class can stand for the rule's "
                                "positive one", field="positive")
        return None, None
    found = sorted(set(labels.tolist()))
    if positive is not None:
        if positive not in found:
            raise PixelfitError(f"{positive!r} is not a class of these patches; classes found: {', '.join(found)}",
                                field="positive")
        return labels == positive, None
    pooled = rule.negative == f"not-{rule.positive}"
    if set(found) <= {rule.positive, rule.negative} or (pooled and rule.positive in found):
        return labels == rule.positive, None
    return None, (f"the patches' classes are {', '.join(map(repr, found))}, but the rule tells {rule.positive!r} "
                  f"from {rule.negative!r}: scored as unlabelled (--positive NAME says which class is "
                  f"{rule.positive!r})")


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
    import numpy as np

    from pixelfit.evaluate import QUANTIZED_F1_TOLERANCE, quantization_check
    from pixelfit.firmware import default_vectors, export_c
    from pixelfit.rulefile import load_rule

    rule = load_rule(args.rule)
    if args.threshold is not None and not 0.0 <= args.threshold <= 1.0:
        raise PixelfitError(f"--threshold {args.threshold:g}: a score threshold lies between 0 and 1")
    threshold = args.threshold if args.threshold is not None else rule.operating_threshold
    X = labels = None
    where = "the generated test vectors"
    if args.vectors_from:
        from pixelfit.data import load_for_apply

        ds = load_for_apply(resolve_dataset_path(args.vectors_from), rule.shape)
        keep = np.ones(len(ds), bool)
        if args.split:
            keep = _subset_from_split(args.split, args.subset, ds.names)
            where = f"the {int(keep.sum())} {args.subset} patches of {args.split}"
        else:
            where = f"the {int(keep.sum())} patches of {args.vectors_from}"
        X = rule.binarize(ds.images[keep])
        lab = ds.labels[keep]
        if len(lab) and all(v in (rule.positive, rule.negative) for v in lab):
            labels = lab == rule.positive
    vectors = X[: args.max_vectors] if X is not None else default_vectors(rule)
    h, v = export_c(rule, args.c, vectors, threshold)
    print(f"wrote {h} and {v}")
    integer = rule.integer(threshold)
    c = integer.cost()
    o = c["ops"]
    print(f"integer-only predictor: {c['flash_bytes']} bytes of flash tables, {c['ram_bytes']} bytes of locals, "
          f"at most {o['total']} operations per patch ({o['pixel_reads']} pixel reads, {o['additions']} additions, "
          f"{o['multiplications']} multiplications, {o['comparisons']} comparisons)")
    print(f"decision: positive when the score is above {threshold:g} (chosen on "
          f"{'the command line' if args.threshold is not None else rule.operating_chosen_on})"
          + ("; exact (no rounding)" if not integer.facts else "; fixed point, see the header's comment"))
    measured = X if X is not None else vectors
    check = quantization_check(rule.predict(measured, threshold), integer.predict(measured), labels)
    share = "-" if check["agreement"] is None else f"{check['agreement']:.1%}"
    print(f"agrees with the floating-point model on {check['agree']} of {where} ({share})")
    if check["test"] is not None:
        print(metrics_line("integer", check["test"]).strip())
        print(f"  (the floating-point model: F1 {fmt(check['f1_float'])})")
        if check["loses_f1"]:
            print(f"warning: the integer predictor loses {100 * check['f1_loss']:.1f} points of F1 against the "
                  f"floating-point model (more than {100 * QUANTIZED_F1_TOLERANCE:.0f})")
    elif X is not None:
        print("no metrics: the patches are not all labelled with the rule's two classes")
    return EXIT_OK


def cmd_report(args) -> int:
    from pixelfit.review import write_report

    print(f"wrote {write_report(args.run, args.out)}")
    return EXIT_OK


def cmd_explain(args) -> int:
    from pixelfit.explain import explain_call, read_patch_file
    from pixelfit.rulefile import load_rule

    rule = load_rule(args.rule)
    facts = []
    for path in args.patches:
        e = explain_call(rule, read_patch_file(path, rule.shape))
        facts.append({"patch": str(path), **e})
    if args.json:
        print(json.dumps(facts if len(facts) > 1 else facts[0], indent=2))
        return EXIT_OK
    for f in facts:
        print(f"{f['patch']}:")
        print(bits_grid(f["bits"], f["pixels_read"]))
        for line in explanation_lines(f):
            print(f"  {line}")
    return EXIT_OK


def cmd_compare(args) -> int:
    from pixelfit.explain import compare_run

    c = compare_run(args.run, args.rung_a, args.rung_b)
    if args.json:
        print(json.dumps(c, indent=2))
        return EXIT_OK
    print(f"{args.rung_a} (threshold {c['threshold_a']:g}) against {args.rung_b} (threshold {c['threshold_b']:g}), "
          f"detecting {c['positive']!r}, on the held-out patches of {c['source']}")
    for line in comparison_lines(c, args.rung_a, args.rung_b):
        print(line)
    for side, key in ((args.rung_a, "only_a_right"), (args.rung_b, "only_b_right")):
        names = c[key]
        if names:
            print(f"only {side} right: {', '.join(names[:10])}{' ...' if len(names) > 10 else ''}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from pixelfit.demo import write_demo_set

    written = write_demo_set(args.name, args.out)
    print(f"wrote {len(written)} patches of the synthetic {args.name} set to {args.out}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from pixelfit.conventions import AUGMENTS, DEFAULT_FOLDS, DEFAULT_MAX_SIZE, DEFAULT_REPLICATES

    p = _Parser(prog="pixelfit", description="How few pixels does a detector need? Train a ladder of rules "
                "of increasing size over small binary patches and measure each one.")
    p.add_argument("--version", action="version", version=f"pixelfit {__version__}")
    sub = p.add_subparsers(dest="command", parser_class=_Parser, metavar="COMMAND")

    s = sub.add_parser("scan", help="report what would be imported from a folder or .npz",
                       description="Report what would be imported: classes and counts, patch shape, skipped files.")
    s.add_argument("path", help="folder of patches, .npz file, or a demo set name")
    s.add_argument("--json", action="store_true", help="print the report as JSON")
    s.set_defaults(func=cmd_scan)

    c = sub.add_parser("check", help="check the data for duplicates, conflicting labels and leakage",
                       description="Find identical grey patches (within and across classes), identical "
                       "binarized patches with both labels and the error floor they impose, and held-out "
                       "patches with a copy (or a one-bit neighbour) in training; write check.json and "
                       "check.csv into --out. Nothing is trained.")
    c.add_argument("path", help="folder of patches, .npz file, or a demo set name")
    c.add_argument("--out", required=True, help="output folder (created if missing)")
    c.add_argument("--binarize", default="otsu", metavar="METHOD", help="as for fit; default otsu")
    c.add_argument("--invert", action="store_true", help="flip the bits after thresholding")
    c.add_argument("--positive", metavar="CLASS", help="class to detect (default: the less frequent class)")
    _add_split_options(c)
    c.set_defaults(func=cmd_check)

    f = sub.add_parser("fit", help="train the ladder and write the results",
                       description="Train the ladder of models by size on the binarized patches; write "
                       "summary.json, summary.csv, split.csv, ladder.png, heatmaps/ and the pictures of the checks "
                       "(bias_variance.png, learning_curve.png, stress.png) into --out.")
    f.add_argument("path", help="folder of patches, .npz file, or a demo set name (e.g. bottle-caps)")
    f.add_argument("--out", required=True, metavar="DIR",
                   help="output folder (created if missing). A run is written beside it and swapped in whole "
                        "when it ends; an earlier run there is kept as DIR.previous. Refused while another run "
                        "writes DIR, and when DIR is inside the input (or holds it)")
    f.add_argument("--overwrite", action="store_true",
                   help="accept a non-empty DIR that is not a pixelfit run folder (moved to DIR.previous)")
    f.add_argument("--binarize", default="otsu", metavar="METHOD",
                   help="fixed:T (pixel >= T), otsu (one threshold over the training set), otsu-patch, "
                        "mean-patch; default otsu")
    f.add_argument("--invert", action="store_true", help="flip the bits after thresholding (dark objects)")
    f.add_argument("--positive", metavar="CLASS", help="class to detect (default: the less frequent class)")
    _add_split_options(f)
    f.add_argument("--families", metavar="LIST", help="comma-separated: constant,lut,nb,logistic,tree,mlp,memorize "
                   "(default all)")
    f.add_argument("--max-size", type=int, metavar="K", default=DEFAULT_MAX_SIZE,
                   help="largest size on every family's axis (at least 1; default: each family's own sizes)")
    f.add_argument("--sizes", action="append", metavar="FAMILY=LIST", help="one family's sizes, e.g. lut=1,2,3,5")
    f.add_argument("--folds", type=int, default=DEFAULT_FOLDS,
                   help=f"cross-validation folds on the training part; 0 turns it off ({DEFAULT_FOLDS})")
    f.add_argument("--spec", metavar="SPEC", help="what the detector must reach on unseen patches, e.g. "
                   "\"precision>=0.90,recall>=0.85\" (either may be left out): each rung's threshold is chosen on "
                   "the training part, judged on the held-out part, and the cheapest rung that meets it is the answer")
    f.add_argument("--confidence", type=float, metavar="C", help="confidence of the held-out lower bounds (0.95)")
    f.add_argument("--budget-bytes", type=int, metavar="N", help="rungs whose firmware takes more flash bytes "
                   "than this are over budget")
    f.add_argument("--exhaustive", action="store_true",
                   help="score every pixel set of each lut rung, however long it is estimated to take (by default "
                        "a search estimated over 30 s becomes a beam search)")
    f.add_argument("--scheduler", metavar="ADDRESS", help="run the lut searches on a Dask cluster through this "
                   "scheduler (tcp://host:8786); needs pip install 'pixelfit[cluster]'")
    f.add_argument("--threads", type=int, metavar="N", default=None,
                   help="fits run at once (a rung's CV folds and final fit, the checks' refits); the figures do "
                        "not depend on it (default: the CPUs this process may use)")
    f.add_argument("--no-rules", dest="rules", action="store_false", help="do not write rules/<family>-<size>.json")
    f.add_argument("--report", action="store_true", help="also write the review page, report.html, into --out")
    f.add_argument("--bias-variance", type=int, default=DEFAULT_REPLICATES, metavar="B",
                   help=f"bootstrap replicates per rung for the bias-variance decomposition; 0 turns it off "
                        f"({DEFAULT_REPLICATES})")
    f.add_argument("--augment", choices=AUGMENTS, default="none",
                   help="shift1: train on the training patches plus their eight one-pixel shifts (none)")
    f.set_defaults(func=cmd_fit)

    rp = sub.add_parser("report", help="write the review page of a fit folder",
                        description="Write one self-contained HTML page (pictures, tables and files inline; no "
                        "script, no network) from the output folder of `pixelfit fit`, for a reviewer who "
                        "does not run pixelfit.")
    rp.add_argument("run", metavar="RUN_DIR", help="output folder of `pixelfit fit`")
    rp.add_argument("--out", metavar="FILE.html", help="where to write the page (default RUN_DIR/report.html)")
    rp.set_defaults(func=cmd_report)

    ex = sub.add_parser("explain", help="say why a rule calls each patch as it does",
                        description="For each patch file: the score, the rule's threshold and the call, and why "
                        "(a truth table's pattern and its training counts, a tree's path, each pixel's "
                        "contribution to a linear vote, the one-pixel flips that change a network's call, "
                        "whether the memorizing rule saw the pattern). The patch is binarized as the rule's file "
                        "says; the grid shows the patch's bits, a pixel the rule reads in brackets.")
    ex.add_argument("rule", help="a rule file (rules/<family>-<size>.json)")
    ex.add_argument("patches", nargs="+", metavar="PATCH_FILE", help="image files of patches of the rule's size")
    ex.add_argument("--json", action="store_true", help="print the facts as JSON")
    ex.set_defaults(func=cmd_explain)

    cp = sub.add_parser("compare", help="compare two rungs of a fit folder on its held-out patches",
                        description="Each rung's held-out confusion matrix at its rule file's threshold, McNemar's "
                        "exact test on the patches where exactly one of them is right, and those patches by name.")
    cp.add_argument("run", metavar="RUN_DIR", help="output folder of `pixelfit fit` (with rules/)")
    cp.add_argument("rung_a", metavar="RUNG_A", help="a rung, e.g. lut-3")
    cp.add_argument("rung_b", metavar="RUNG_B", help="another rung, e.g. tree-4")
    cp.add_argument("--json", action="store_true", help="print the comparison as JSON")
    cp.set_defaults(func=cmd_compare)

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
    a.add_argument("--csv", metavar="OUT", help="write one row per patch (path, score, prediction, label) to OUT; "
                   "'-' for standard output. Without it only the summary is printed")
    a.add_argument("--verbose", action="store_true", help="print the per-patch rows on standard output too")
    a.add_argument("--threshold", type=float, metavar="T", help="call positive when score > T "
                   "(default: the operating threshold stored in the rule)")
    a.add_argument("--split", metavar="SPLIT_CSV", help="a split.csv from `pixelfit fit`; with --subset, apply to "
                   "that part only")
    a.add_argument("--subset", choices=("train", "test"), default="test", help="part of --split to use (test)")
    a.add_argument("--positive", metavar="NAME", help="the class of these patches that stands for the rule's "
                   "positive class (the others for its negative one); needed when the folder's classes are not "
                   "the rule's two, which are otherwise scored as unlabelled")
    a.set_defaults(func=cmd_apply)

    e = sub.add_parser("export", help="export a rule file as integer-only C99 for firmware",
                       description="Write a self-contained, integer-only C99 header with a predict function over "
                       "a row-major patch of 0/1 bytes, and OUT_vectors.h with test vectors; print its flash, RAM "
                       "and operations, and how the integer predictor compares with the floating-point model.")
    e.add_argument("rule")
    e.add_argument("--c", required=True, metavar="OUT.h", help="header to write")
    e.add_argument("--vectors-from", metavar="PATH", help="take test vectors from these patches (default: "
                   "generated patches)")
    e.add_argument("--max-vectors", type=int, default=256, help="most test vectors taken from --vectors-from (256)")
    e.add_argument("--split", metavar="SPLIT_CSV", help="a split.csv from `pixelfit fit`; with --subset, take "
                   "that part of --vectors-from only (measure on held-out patches)")
    e.add_argument("--subset", choices=("train", "test"), default="test", help="part of --split to use (test)")
    e.add_argument("--threshold", type=float, metavar="T", help="call positive when score > T (default: the "
                   "rule's recorded operating threshold, else its own decision)")
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
    from pixelfit.app import environment_problem, probe_problem

    problem = environment_problem() or probe_problem()
    if problem:
        raise PixelfitError(problem)
    from pixelfit.app import launch  # Qt is imported only from here on

    return launch(args.path)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    args = parser.parse_args(argv)
    if args.command is None:  # plain `pixelfit` opens the desktop application on the demo set
        args = parser.parse_args(["gui"])
    args.argv = argv  # recorded in summary.json so a run says how it was made
    try:
        return int(args.func(args))
    except PixelfitError as exc:
        # One line, whatever a message quoted from a file or a library held.
        flag = FLAGS.get(exc.field or "")
        print(f"pixelfit: {f'{flag}: ' if flag else ''}{' '.join(str(exc).splitlines())}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:  # outside the ladder (which keeps finished rungs): nothing half-written stays
        print("pixelfit: interrupted", file=sys.stderr)
        return EXIT_INCOMPLETE
    except BrokenPipeError:
        return EXIT_OK
    except OSError as exc:  # a write that failed (disk full, folder gone): what was written before stays
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"pixelfit: could not finish: {where}{' '.join(str(exc.strerror or exc).splitlines())}", file=sys.stderr)
        return EXIT_INCOMPLETE
