"""Text rendering shared by the commands: the ladder table, pixel grids, metric lines."""

from __future__ import annotations


def fmt(v, digits: int = 3) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def ci_text(ci) -> str:
    return "" if not ci else f" [{ci[0]:.2f},{ci[1]:.2f}]"


def ladder_table(summary: dict) -> str:
    from pixelfit.models import BEAM_MARK, BEAM_NOTE, is_beam

    head = (f"{'rung':<14} {'log2|H|':>8} {'params':>7} {'train F1':>8} {'CV F1':>13} "
            f"{'held-out P [95% CI]':>21} {'held-out R [95% CI]':>21} {'F1':>6} {'bound':>6}")
    lines = [head, "-" * len(head)]
    for r in summary["rungs"]:
        key = f"{r['family']}-{r['size']}" + (BEAM_MARK if is_beam(r.get("search")) else "")
        cv = "-" if not r["cv"] else f"{r['cv']['f1_mean']:.3f}±{r['cv']['f1_std']:.3f}"
        t = r["test"]
        p = f"{fmt(t['precision'])}{ci_text(t['precision_ci'])}"
        rc = f"{fmt(t['recall'])}{ci_text(t['recall_ci'])}"
        log2h = r["log2_class_size"]
        log2h_s = "-" if log2h is None else (f"{log2h:.1f}" if log2h < 1e6 else f"{log2h:.2g}")
        bound = "-" if r["bound"] is None else f"{r['bound']['error_upper']:.3f}"
        mark = "  <- recommended" if r["recommended"] else ""
        sig = ""
        vs = r.get("versus_smaller")
        if vs and vs["significant"]:
            sig = " *"
        lines.append(f"{key:<14} {log2h_s:>8} {r['parameters']:>7} {fmt(r['train']['f1']):>8} {cv:>13} "
                     f"{p:>21} {rc:>21} {fmt(t['f1']):>6} {bound:>6}{sig}{mark}")
    lines.append("* significantly better than the next smaller rung of its family on held-out patches "
                 "(McNemar, p < 0.05)")
    if any(is_beam(r.get("search")) for r in summary["rungs"]):
        lines.append(BEAM_NOTE)
    return "\n".join(lines)


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
