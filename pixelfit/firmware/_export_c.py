"""Export a rule as a self-contained C99 header, plus a companion header of test vectors.

The predict function takes a row-major patch of 0/1 bytes (any non-zero byte counts as 1) and
returns 1 for the positive class. No allocation anywhere; truth tables, trees and memorized
tables use integers only; the weighted families use double-precision constants.
"""

from __future__ import annotations

import math
import os
import re
from pathlib import Path

import numpy as np

from pixelfit._atomic import write_text
from pixelfit.rulefile import CAUTION, Rule


def c_identifier(stem: str) -> str:
    ident = re.sub(r"[^0-9A-Za-z_]", "_", stem).lower()
    if not ident or ident[0].isdigit():
        ident = "pf_" + ident
    return ident


def _double(x: float) -> str:
    return repr(float(x))


def _rows(values, per_line: int = 12, fmt=str) -> str:
    vals = [fmt(v) for v in values]
    lines = [", ".join(vals[i : i + per_line]) for i in range(0, len(vals), per_line)]
    return "    " + ",\n    ".join(lines) if lines else "    0"


def _stat(value) -> str:
    """A number from the file's evaluation as text; anything else (text, lists) as 'unknown'."""
    if isinstance(value, int) and not isinstance(value, bool):
        return str(value)
    if isinstance(value, float) and math.isfinite(value):
        return f"{value:.3f}"
    return "undefined" if value is None else "unknown"


def _comment(text: str) -> str:
    return text.replace("*/", "* /")


def _body(rule: Rule, ident: str, P: str) -> tuple[list[str], list[str], bool]:
    """(static tables, statements of the predict function, needs math.h)."""
    f = rule.family
    tables: list[str] = []
    code: list[str] = []
    needs_math = False
    if f == "constant":
        code.append(f"    (void)patch;\n    return {int(rule._label)};")
    elif f == "lut":
        px = rule._pixels
        k = len(px)
        tables.append(f"static const uint16_t {ident}_pixels[{k}] = {{\n{_rows(px)}\n}};")
        tables.append(f"static const uint8_t {ident}_table[{2**k}] = {{\n{_rows(rule._table.astype(int), 32)}\n}};")
        code.append(f"    unsigned code = 0u;\n    unsigned j;\n    for (j = 0u; j < {k}u; ++j) {{\n"
                    f"        if (patch[{ident}_pixels[j]] != 0u) {{\n            code |= 1u << j;\n        }}\n    }}\n"
                    f"    return {ident}_table[code];")
    elif f == "tree":
        n = len(rule._feat)
        tables.append(f"static const int16_t {ident}_pixel[{n}] = {{\n{_rows(rule._feat)}\n}};")
        tables.append(f"static const int16_t {ident}_left[{n}] = {{\n{_rows(rule._left)}\n}};")
        tables.append(f"static const int16_t {ident}_right[{n}] = {{\n{_rows(rule._right)}\n}};")
        tables.append(f"static const uint8_t {ident}_label[{n}] = {{\n{_rows(rule._tlabel.astype(int), 32)}\n}};")
        code.append(f"    int16_t node = 0;\n    while ({ident}_pixel[node] >= 0) {{\n"
                    f"        node = (patch[{ident}_pixel[node]] != 0u) ? {ident}_right[node] : {ident}_left[node];\n"
                    f"    }}\n    return {ident}_label[node];")
    elif f == "memorize":
        pats = sorted(rule._index.items())
        n = len(pats)
        nb = -(-rule.n_pixels // 8)
        labels = [int(rule._labels[i]) for _, i in pats]
        tables.append(f"#define {P}_BYTES {nb}\n#define {P}_N_PATTERNS {n}")
        tables.append(f"static const uint8_t {ident}_patterns[{max(1, n)}][{nb}] = {{\n"
                      + (",\n".join("    {" + ", ".join(str(b) for b in key) + "}" for key, _ in pats) or "    {0}")
                      + "\n};")
        tables.append(f"static const uint8_t {ident}_labels[{max(1, n)}] = {{\n{_rows(labels or [0], 32)}\n}};")
        code.append(
            f"    uint8_t key[{P}_BYTES];\n    unsigned i;\n    long lo = 0, hi = (long){P}_N_PATTERNS - 1;\n"
            f"    for (i = 0u; i < {P}_BYTES; ++i) {{\n        key[i] = 0u;\n    }}\n"
            f"    for (i = 0u; i < {P}_PIXELS; ++i) {{\n        if (patch[i] != 0u) {{\n"
            f"            key[i / 8u] |= (uint8_t)(0x80u >> (i % 8u));\n        }}\n    }}\n"
            f"    while (lo <= hi) {{\n        long mid = lo + (hi - lo) / 2;\n        int cmp = 0;\n"
            f"        for (i = 0u; i < {P}_BYTES && cmp == 0; ++i) {{\n"
            f"            cmp = (int){ident}_patterns[mid][i] - (int)key[i];\n        }}\n"
            f"        if (cmp == 0) {{\n            return {ident}_labels[mid];\n        }}\n"
            f"        if (cmp < 0) {{\n            lo = mid + 1;\n        }} else {{\n            hi = mid - 1;\n        }}\n"
            f"    }}\n    return {int(rule._default_label)};")
    elif f == "logistic":
        w = rule._coef.ravel()
        tables.append(f"static const double {ident}_weights[{P}_PIXELS] = {{\n{_rows(w, 4, _double)}\n}};")
        code.append(f"    double z = {_double(rule._bias)};\n    unsigned i;\n"
                    f"    for (i = 0u; i < {P}_PIXELS; ++i) {{\n        if (patch[i] != 0u) {{\n"
                    f"            z += {ident}_weights[i];\n        }}\n    }}\n"
                    f"    return z > {_double(rule.decision_logit)} ? 1 : 0;")
    elif f == "nb":
        px = rule._pixels
        k = len(px)
        on, off = rule._on, rule._off
        base = rule._prior + off.sum(axis=1)
        tables.append(f"static const uint16_t {ident}_pixels[{max(1, k)}] = {{\n{_rows(px if k else [0])}\n}};")
        for c, name in ((0, "neg"), (1, "pos")):
            tables.append(f"static const double {ident}_gain_{name}[{max(1, k)}] = {{\n"
                          f"{_rows((on[c] - off[c]) if k else [0.0], 4, _double)}\n}};")
        code.append(f"    double neg = {_double(base[0])};\n    double pos = {_double(base[1])};\n    unsigned j;\n"
                    f"    for (j = 0u; j < {k}u; ++j) {{\n        if (patch[{ident}_pixels[j]] != 0u) {{\n"
                    f"            neg += {ident}_gain_neg[j];\n            pos += {ident}_gain_pos[j];\n        }}\n    }}\n"
                    f"    return pos - neg > {_double(rule.decision_logit)} ? 1 : 0;")
    elif f == "mlp":
        act = rule._act
        needs_math = act in ("tanh", "logistic")
        widths = [rule.n_pixels] + [W.shape[1] for W, _ in rule._layers]
        for i, (W, b) in enumerate(rule._layers):
            tables.append(f"static const double {ident}_w{i}[{W.shape[0]}][{W.shape[1]}] = {{\n"
                          + ",\n".join("    {" + ", ".join(_double(v) for v in row) + "}" for row in W) + "\n};")
            tables.append(f"static const double {ident}_b{i}[{W.shape[1]}] = {{\n{_rows(b, 4, _double)}\n}};")
        widest = max(widths[1:])
        apply = {"relu": "a < 0.0 ? 0.0 : a", "identity": "a", "tanh": "tanh(a)", "logistic": "1.0 / (1.0 + exp(-a))"}[act]
        lines = [f"    double cur[{widest}];\n    double nxt[{widest}];\n    unsigned i, j;"]
        for li, (W, _b) in enumerate(rule._layers):
            n_in, n_out = W.shape
            term = f"(patch[i] != 0u ? {ident}_w0[i][j] : 0.0)" if li == 0 else f"cur[i] * {ident}_w{li}[i][j]"
            last = li == len(rule._layers) - 1
            lines.append(f"    for (j = 0u; j < {n_out}u; ++j) {{\n        double a = {ident}_b{li}[j];\n"
                         f"        for (i = 0u; i < {n_in}u; ++i) {{\n            a += {term};\n        }}\n"
                         f"        nxt[j] = {'a' if last else apply};\n    }}")
            lines.append(f"    for (j = 0u; j < {n_out}u; ++j) {{\n        cur[j] = nxt[j];\n    }}")
        lines.append(f"    return cur[0] > {_double(rule.decision_logit)} ? 1 : 0;")
        code.append("\n".join(lines))
    else:
        raise ValueError(f"no C export for family {f}")
    return tables, code, needs_math


def header_text(rule: Rule, ident: str) -> str:
    P = ident.upper()
    h, w = rule.shape
    tables, code, needs_math = _body(rule, ident, P)
    b = rule.binarizer
    doc = rule.doc
    # evaluation is free-form in the schema: take only numbers from it, never text into the C file.
    ev = doc.get("evaluation")
    ev = ev if isinstance(ev, dict) else {}
    spec = ev.get("spec")
    spec = spec if isinstance(spec, dict) else {}
    # The held-out figures at the shipped threshold: the spec's when the rule ships the spec's threshold.
    at_spec = spec.get("threshold") == rule.operating_threshold
    test = spec.get("test") if at_spec else ev.get("test")
    test = test if isinstance(test, dict) else {}
    if at_spec and "n" not in test:
        test = {**test, "n": sum(v for k, v in test.items() if k in ("tp", "fp", "fn", "tn") and isinstance(v, int))}
    lines = [
        f"/* {ident}.h: pixelfit rule {rule.family}-{rule.size}, exported as C99.",
        f" * Detects {_comment(rule.positive)!s} (returns 1) against {_comment(rule.negative)!s} (returns 0).",
        f" * Input: a {h}x{w} patch, row-major, one byte per pixel, 0 or 1 (non-zero counts as 1),",
        f" * binarized as the rule was trained: {_comment(b.describe())} (fixed: pixel >= T is 1; otsu and",
        " * per-patch methods: pixel > threshold is 1; invert flips the bits).",
        f" * Training data fingerprint (SHA-256): {doc['training_data']['fingerprint']}",
        f" * Held-out precision {_stat(test.get('precision'))}, recall {_stat(test.get('recall'))} on "
        f"{_stat(test.get('n'))} patches.",
        f" * Operating threshold {rule.operating_threshold:.6g} (chosen on: {_comment(rule.operating_chosen_on)}): "
        "a patch is positive when its score is above it.",
        f" * Caution: {_comment(CAUTION)}",
        " */",
        f"#ifndef {P}_H",
        f"#define {P}_H",
        "",
        "#include <stdint.h>",
    ]
    if needs_math:
        lines.append("#include <math.h>")
    lines += ["", f"#define {P}_HEIGHT {h}", f"#define {P}_WIDTH {w}", f"#define {P}_PIXELS {h * w}", ""]
    lines += [t + "\n" for t in tables]
    lines += [f"/* 1 when the patch is called {_comment(rule.positive)}, else 0. */",
              f"static inline int {ident}_predict(const uint8_t patch[{P}_PIXELS])", "{"]
    lines += code
    lines += ["}", "", f"#endif /* {P}_H */", ""]
    return "\n".join(lines)


def vectors_text(rule: Rule, ident: str, X: np.ndarray, header_name: str) -> str:
    P = ident.upper()
    pred = rule.predict(X).astype(int)
    n = len(X)
    rows = ",\n".join("    {" + ", ".join(str(int(v)) for v in row) + "}" for row in X.astype(np.uint8))
    return "\n".join([
        f"/* {ident}_vectors.h: test vectors for {ident}.h: patch -> expected prediction, from pixelfit. */",
        f"#ifndef {P}_VECTORS_H",
        f"#define {P}_VECTORS_H",
        "",
        f'#include "{header_name}"',
        "",
        f"#define {P}_N_VECTORS {n}",
        f"static const uint8_t {ident}_vector_patches[{n}][{P}_PIXELS] = {{\n{rows}\n}};",
        "",
        f"static const uint8_t {ident}_vector_expected[{n}] = {{\n{_rows(pred, 32)}\n}};",
        "",
        f"#endif /* {P}_VECTORS_H */",
        "",
    ])


def default_vectors(rule: Rule, n: int = 64, seed: int = 0) -> np.ndarray:
    """All-0, all-1 and ``n`` random patches of mixed density, as 0/1 rows."""
    rng = np.random.default_rng(seed)
    density = rng.uniform(0.1, 0.9, size=(n, 1))
    X = rng.random((n, rule.n_pixels)) < density
    return np.vstack([np.zeros((1, rule.n_pixels), bool), np.ones((1, rule.n_pixels), bool), X])


def export_c(rule: Rule, header_path: str | os.PathLike, vectors: np.ndarray | None = None) -> tuple[Path, Path]:
    """Write ``header_path`` and ``<stem>_vectors.h`` beside it; returns both paths.

    Parameters
    ----------
    vectors : ndarray of shape (n, n_pixels), bool, optional
        Patches for the test vectors; default: :func:`default_vectors`.
    """
    header_path = Path(header_path)
    ident = c_identifier(header_path.stem)
    X = default_vectors(rule) if vectors is None else np.asarray(vectors, bool).reshape(-1, rule.n_pixels)
    write_text(header_path, header_text(rule, ident))
    vpath = header_path.with_name(f"{header_path.stem}_vectors.h")
    write_text(vpath, vectors_text(rule, ident, X, header_path.name))
    return header_path, vpath
