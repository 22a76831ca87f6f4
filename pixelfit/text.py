"""Text rendering shared by the commands and the window: the rung columns (one spec for the
command line's table, summary.csv and the window's table), pixel grids, metric lines."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from pixelfit.families import FAMILIES
from pixelfit.models import BEAM_MARK, BEAM_NOTE, is_beam

#: Appended to the rung's name in the table when it trained on a subsample of the training part.
SUBSAMPLE_MARK = " (subsample)"


def fmt(v, digits: int = 3) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def ci_text(ci) -> str:
    return "" if not ci else f" [{ci[0]:.2f},{ci[1]:.2f}]"


def _ci_part(m: dict, key: str, end: int):
    ci = m.get(f"{key}_ci")
    return None if not ci else ci[end]


def log2_text(v) -> str:
    """log2 |H| as the rung table shows it (huge classes in scientific notation)."""
    if v is None:
        return "-"
    return f"{v:.1f}" if v < 1e5 else f"{v:.3g}"


def _with_ci(m: dict, key: str) -> str:
    return f"{fmt(m[key])}{ci_text(m[key + '_ci'])}"


@dataclass(frozen=True)
class Field:
    """One column of summary.csv: its name and its value in a rung's summary entry."""

    name: str
    value: Callable[[dict], object]


@dataclass(frozen=True)
class Column:
    """One column of the rung table (the command line's and the window's): header, tooltip, cell text."""

    header: str
    tooltip: str
    text: Callable[[dict], str]


def _spec_test(key: str) -> Callable[[dict], object]:
    return lambda r: ((r.get("spec") or {}).get("test") or {}).get(key)


#: The columns of summary.csv, from a rung's entry in summary.json (:meth:`pixelfit.ladder.Rung.summary`).
FIELDS: list[Field] = [
    Field("family", lambda r: r["family"]),
    Field("size", lambda r: r["size"]),
    Field("search", lambda r: (r["search"] or {}).get("method")),
    Field("parameters", lambda r: r["parameters"]),
    Field("log2_class_size", lambda r: r["log2_class_size"]),
    Field("vc_dim", lambda r: r["vc_dim"]),
    Field("flash_bytes", lambda r: (r.get("cost") or {}).get("flash_bytes")),
    Field("ram_bytes", lambda r: (r.get("cost") or {}).get("ram_bytes")),
    Field("ops", lambda r: ((r.get("cost") or {}).get("ops") or {}).get("total")),
    Field("train_f1", lambda r: r["train"]["f1"]),
    Field("cv_f1_mean", lambda r: (r["cv"] or {}).get("f1_mean")),
    Field("cv_f1_std", lambda r: (r["cv"] or {}).get("f1_std")),
    Field("test_precision", lambda r: r["test"]["precision"]),
    Field("test_precision_lo", lambda r: _ci_part(r["test"], "precision", 0)),
    Field("test_precision_hi", lambda r: _ci_part(r["test"], "precision", 1)),
    Field("test_recall", lambda r: r["test"]["recall"]),
    Field("test_recall_lo", lambda r: _ci_part(r["test"], "recall", 0)),
    Field("test_recall_hi", lambda r: _ci_part(r["test"], "recall", 1)),
    Field("test_f1", lambda r: r["test"]["f1"]),
    Field("test_mcc", lambda r: r["test"]["mcc"]),
    Field("integer_agreement", lambda r: (r.get("quantized") or {}).get("agreement")),
    Field("integer_test_f1", lambda r: ((r.get("quantized") or {}).get("test") or {}).get("f1")),
    Field("bound", lambda r: (r["bound"] or {}).get("error_upper")),
    Field("recommended", lambda r: r["recommended"]),
    Field("operating_threshold", lambda r: (r.get("operating") or {}).get("threshold")),
    Field("operating_chosen_on", lambda r: (r.get("operating") or {}).get("chosen_on")),
    Field("spec_threshold", lambda r: (r.get("spec") or {}).get("threshold")),
    Field("spec_chosen_on", lambda r: (r.get("spec") or {}).get("chosen_on")),
    Field("spec_cv_precision", lambda r: ((r.get("spec") or {}).get("cv") or {}).get("precision")),
    Field("spec_cv_recall", lambda r: ((r.get("spec") or {}).get("cv") or {}).get("recall")),
] + [Field(f"spec_test_{k}", _spec_test(k))
     for k in ("tp", "fp", "fn", "tn", "precision", "recall", "precision_lower", "recall_lower")] + [
    Field("spec_verdict", lambda r: (r.get("spec") or {}).get("verdict")),
]

#: The columns of the rung table, from a rung's entry in summary.json.
COLUMNS: list[Column] = [
    Column("rung", "family-size; (beam) marks a truth table found by a beam search, not by trying every pixel set; "
           "(subsample) a rung trained on a stratified subsample of the training part",
           lambda r: f"{r['family']}-{r['size']}" + (BEAM_MARK if is_beam(r.get("search")) else "")
           + (SUBSAMPLE_MARK if r.get("subsample") else "")),
    Column("size", "the family's size: pixels read, tree depth or hidden units",
           lambda r: (FAMILIES[r["family"]].size_text(r["size"]) or "-") if r["family"] in FAMILIES
           else str(r["size"])),
    Column("log2|H|", "how many different rules the family can express at this size, as a power of two "
           "(finite classes only): the more there are, the easier one fits the training patches by chance",
           lambda r: log2_text(r["log2_class_size"])),
    Column("params", "parameters of the fitted rule", lambda r: str(r["parameters"])),
    Column("flash B", "bytes of constant tables of the integer-only C export (pixelfit export)",
           lambda r: fmt((r.get("cost") or {}).get("flash_bytes"))),
    Column("train F1", "F1 on the training part", lambda r: fmt(r["train"]["f1"])),
    Column("CV F1", "cross-validated F1 on the training part, mean ± fold standard deviation",
           lambda r: "-" if not r["cv"] else f"{r['cv']['f1_mean']:.3f}±{r['cv']['f1_std']:.3f}"),
    Column("held-out P [95% CI]", "precision on held-out patches with its Wilson interval",
           lambda r: _with_ci(r["test"], "precision")),
    Column("held-out R [95% CI]", "recall on held-out patches with its Wilson interval",
           lambda r: _with_ci(r["test"], "recall")),
    Column("F1", "F1 on held-out patches", lambda r: fmt(r["test"]["f1"])),
    Column("bound", "with 95 % confidence the error rate on new patches is at most this, from the training "
           "error and the class size alone, without the held-out patches",
           lambda r: "-" if r["bound"] is None else f"{r['bound']['error_upper']:.3f}"),
    Column("spec", "verdict on the spec: threshold chosen on CV scores, judged by the held-out lower bounds",
           lambda r: "-" if not r.get("spec") else r["spec"]["verdict"]),
]


def rung_cells(r: dict) -> list[str]:
    """The rung table's cells of one rung's summary entry."""
    return [c.text(r) for c in COLUMNS]


def ladder_table(summary: dict) -> str:
    rows = [rung_cells(r) for r in summary["rungs"]]
    widths = [max([len(c.header)] + [len(row[i]) for row in rows]) for i, c in enumerate(COLUMNS)]
    head = " ".join(c.header.ljust(widths[0]) if i == 0 else c.header.rjust(widths[i]) for i, c in enumerate(COLUMNS))
    lines = [head, "-" * len(head)]
    for r, row in zip(summary["rungs"], rows):
        cells = " ".join(v.ljust(widths[0]) if i == 0 else v.rjust(widths[i]) for i, v in enumerate(row))
        vs = r.get("versus_smaller")
        sig = " *" if vs and vs["significant"] else ""
        mark = "  <- recommended" if r["recommended"] else ""
        lines.append(f"{cells}{sig}{mark}")
    lines.append("* significantly better than the next smaller rung of its family on held-out patches "
                 "(McNemar, p < 0.05)")
    if any(is_beam(r.get("search")) for r in summary["rungs"]):
        lines.append(BEAM_NOTE)
    subs = {r["family"]: r["subsample"] for r in summary["rungs"] if r.get("subsample")}
    if subs:
        lines.append(subsample_footnote({f: v["n"] for f, v in subs.items()}, next(iter(subs.values()))["of"]))
    cv_sub = next(((r.get("cv") or {}).get("subsample") for r in summary["rungs"]
                   if (r.get("cv") or {}).get("subsample") and not r.get("subsample")), None)
    if cv_sub is not None:
        lines.append(cv_subsample_footnote(cv_sub["n"], cv_sub["of"]))
    return "\n".join(lines)


def cv_subsample_footnote(n: int, of: int) -> str:
    """The table's line when the CV folds ran on a large set's subsample."""
    return (f"CV F1 of the rungs not marked (subsample) on a stratified subsample of {n:,} of the {of:,} training "
            f"patches (their thresholds are chosen there too); their final fits use all of them")


def subsample_footnote(sizes: dict[str, int], of: int) -> str:
    """The table's line under rungs marked (subsample): {family: patches it trained on}."""
    each = ", ".join(f"{f} {n:,}" for f, n in sizes.items())
    return (f"(subsample) trained (CV folds and final fit) on a stratified subsample of the {of:,} training "
            f"patches ({each}), to keep a large set's slow families in time; train F1 and the bound are on "
            f"the subsample, held-out figures on every held-out patch")


def spec_table(summary: dict) -> str:
    """Per rung: the threshold chosen for the spec on the training part, and its held-out result."""
    sp = summary["spec"]
    conf = f"{sp['confidence']:.0%}"
    head = (f"{'rung':<14} {'flash':>6} {'threshold':>9} {'on':>5} {'CV P':>6} {'CV R':>6} "
            f"{'tp':>5} {'fp':>5} {'fn':>5} {'tn':>5} {'P (' + conf + ' low)':>16} {'R (' + conf + ' low)':>16}  verdict")
    lines = [head, "-" * len(head)]
    for r in summary["rungs"]:
        e = r["spec"]
        if e is None:
            continue
        t = e["test"]
        flash = "-" if not r["cost"] else str(r["cost"]["flash_bytes"])
        p = f"{fmt(t['precision'])} ({fmt(t['precision_lower'])})"
        rc = f"{fmt(t['recall'])} ({fmt(t['recall_lower'])})"
        lines.append(f"{r['family'] + '-' + str(r['size']):<14} {flash:>6} {e['threshold']:>9.4g} {e['chosen_on']:>5} "
                     f"{fmt(e['cv']['precision']):>6} {fmt(e['cv']['recall']):>6} {t['tp']:>5} {t['fp']:>5} "
                     f"{t['fn']:>5} {t['tn']:>5} {p:>16} {rc:>16}  {e['verdict']}")
    return "\n".join(lines)


def answer_text(summary: dict) -> str:
    """The answer to the spec, the last thing ``fit`` prints."""
    a = summary["answer"]
    sp = summary["spec"]
    terms = ", ".join(f"{k} >= {sp[k]:g}" for k in ("precision", "recall") if sp[k] is not None)
    budget = "" if sp["budget_bytes"] is None else f", at most {sp['budget_bytes']} flash bytes"
    head = f"answer to {terms}{budget} at {sp['confidence']:.0%} confidence: "
    head += a["rung"] if a["rung"] else "none"
    head += f" ({a['verdict']})" if a["verdict"] else ""
    return f"{head}\n  {a['reason']}"


def pixel_grid(shape: tuple[int, int], used: list[int] | None, signs: dict[int, str] | None = None) -> str:
    """The patch as ASCII: '#' (or the sign) for a pixel the rule reads, '.' for one it ignores."""
    h, w = shape
    rows = []
    for r in range(h):
        cells = []
        for c in range(w):
            i = r * w + c
            if used is None:
                cells.append("#")
            elif i in used:
                cells.append((signs or {}).get(i, "#"))
            else:
                cells.append(".")
        rows.append("  " + " ".join(cells))
    return "\n".join(rows)


def metrics_line(name: str, m: dict | None) -> str:
    if not m:
        return f"  {name:<9} -"
    return (f"  {name:<9} precision {fmt(m['precision'])}{ci_text(m['precision_ci'])}  recall {fmt(m['recall'])}"
            f"{ci_text(m['recall_ci'])}  F1 {fmt(m['f1'])}  MCC {fmt(m['mcc'])}  (n={m.get('n')}, tp {m['tp']}, "
            f"fp {m['fp']}, fn {m['fn']}, tn {m['tn']})")


def _px(p) -> str:
    return f"({p[0]},{p[1]})"


def _counts(d: dict) -> str:
    if d.get("negative") is None:
        return "training counts not recorded"
    return f"training patches: {d['negative']} negative, {d['positive']} positive"


def bits_grid(bits: list[list[int]], read: list[list[int]] | None) -> str:
    """A patch's bits row by row, each pixel the rule reads in brackets (all of them when ``read`` is None)."""
    marked = None if read is None else {(r, c) for r, c in read}
    return "\n".join("  " + "".join(f"[{v}]" if marked is None or (r, c) in marked else f" {v} "
                                     for c, v in enumerate(row)) for r, row in enumerate(bits))


def explanation_lines(e: dict) -> list[str]:
    """The facts of :func:`pixelfit.explain.explain_call` as lines of text (the window shows the same)."""
    side = ">" if e["positive"] else "<="
    lines = [f"{e['rung']} ({e['description']}): score {e['score']:.4f} {side} threshold {e['threshold']:.4f} "
             f"(chosen on {e['chosen_on']}) -> {e['call']}"]
    why = e["why"]
    kind = why["kind"]
    if kind == "truth table":
        row = why["row"]
        lines.append(f"pixels read, bit 0 first: {' '.join(_px(p) for p in why['pixels'])}; their values "
                     f"{' '.join(map(str, why['bits']))}")
        lines.append(f"pattern code {why['code']}: {_counts(row)}; table label "
                     f"{'positive' if row['label'] else 'negative'}, score {row['score']:.4f}")
    elif kind == "tree":
        for step in why["path"]:
            lines.append(f"node {step['node']}: pixel {_px(step['pixel'])} = {step['value']} -> {step['branch']}")
        leaf = why["leaf"]
        lines.append(f"leaf {leaf['node']}: {_counts(leaf)}; label {'positive' if leaf['label'] else 'negative'}, "
                     f"score {leaf['score']:.4f}")
    elif kind == "linear":
        lines.append(f"bias {why['bias']:+.4f}")
        for c in why["contributions"]:
            lines.append(f"pixel {_px(c['pixel'])} = {c['value']}: weight {c['weight']:+.4f}, "
                         f"contribution {c['contribution']:+.4f}")
        t = why["threshold_log_odds"]
        lines.append(f"log-odds {why['log_odds']:+.4f}" + ("" if t is None else f" against {t:+.4f} at the threshold"))
    elif kind == "sensitivity":
        flips = why["flips_that_change_call"]
        lines.append(f"one-pixel flips that change the call: {len(flips)}"
                     + ("" if not flips else " — " + ", ".join(f"{_px(f['pixel'])} to {f['score_if_flipped']:.3f}"
                                                              for f in flips[:12])))
        if why["most_sensitive"]:
            lines.append("most sensitive pixels: " + ", ".join(
                f"{_px(f['pixel'])} {f['change']:+.3f}" for f in why["most_sensitive"]))
    elif kind == "memorized patterns":
        lines.append(("this exact pattern was seen in training: " + _counts(why)) if why["seen"] else
                     "this exact pattern was never seen in training: the default label")
        lines.append(f"label {'positive' if why['label'] else 'negative'}, score {why['score']:.4f}")
    if why.get("note"):
        lines.append(f"({why['note']})")
    return lines


def comparison_lines(c: dict, a: str, b: str) -> list[str]:
    """The facts of :func:`pixelfit.evaluate.compare_calls` for rungs ``a`` and ``b`` as lines of text."""
    m = c["mcnemar"]
    width = max(len(a), len(b))
    lines = [f"held-out patches: {c['n']}",
             f"{'':{width}}    tp    fp    fn    tn"]
    for name, key in ((a, "a"), (b, "b")):
        cf = c[key]
        lines.append(f"{name:{width}} {cf['tp']:5d} {cf['fp']:5d} {cf['fn']:5d} {cf['tn']:5d}")
    lines.append(f"both right {c['both_right']}, both wrong {c['both_wrong']}; only {a} right {m['b']}, "
                 f"only {b} right {m['c']}")
    lines.append(f"McNemar's test ({m['method']} on the {m['discordant']} discordant patches): p = {m['p_value']:.4g}")
    return lines
