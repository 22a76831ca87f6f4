"""Export a rule as a self-contained, integer-only C99 header, plus a companion header of test vectors.

The predict function takes a row-major patch of 0/1 bytes (any non-zero byte counts as 1) and
returns 1 for the positive class. No allocation and no floating point anywhere: truth tables,
trees and memorized tables are exact; naive Bayes, logistic and MLP weights are fixed point
(each family's :class:`~pixelfit.families.IntegerModel`). The header defines
``<PREFIX>_FLASH_BYTES``, the bytes of its ``static const`` tables, equal to :func:`cost`'s
``flash_bytes``; the test vectors are the integer predictor's own answers.
"""

from __future__ import annotations

import math
import os
import re
from pathlib import Path

import numpy as np

from pixelfit._atomic import write_text
from pixelfit.families import CTable, IntegerModel
from pixelfit.rulefile import CAUTION, Rule, parse_rule


def c_identifier(stem: str) -> str:
    ident = re.sub(r"[^0-9A-Za-z_]", "_", stem).lower()
    if not ident or ident[0].isdigit():
        ident = "pf_" + ident
    return ident


def _stat(value) -> str:
    """A number from the file's evaluation as text; anything else (text, lists) as 'unknown'."""
    if isinstance(value, int) and not isinstance(value, bool):
        return str(value)
    if isinstance(value, float) and math.isfinite(value):
        return f"{value:.3f}"
    return "undefined" if value is None else "unknown"


def _comment(text: str) -> str:
    """Text that is safe inside a C block comment, on one line.

    A newline, tab or any other non-printable character becomes a backslash escape; ``/*`` and
    ``*/`` are broken up (a nested ``/*`` is an error under -Werror, ``*/`` would end the
    comment), and so are ``??`` (a trigraph could splice lines).
    """
    out = []
    for ch in text:
        if ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch.isprintable():
            out.append(ch)
        elif ord(ch) < 0x100:
            out.append(f"\\x{ord(ch):02x}")
        else:
            out.append(f"\\u{ord(ch):04x}" if ord(ch) < 0x10000 else f"\\U{ord(ch):08x}")
    s = "".join(out)
    while "/*" in s or "*/" in s or "??" in s:
        s = s.replace("/*", "/ *").replace("*/", "* /").replace("??", "? ?")
    return s


def cost(rule: Rule, threshold: float | None = None) -> dict:
    """Firmware cost of the integer-only predictor that :func:`export_c` writes for ``rule``.

    Returns ``{'flash_bytes', 'ram_bytes', 'ops'}``: ``flash_bytes`` is the sum of ``sizeof`` of
    the header's ``static const`` tables (code not counted), ``ram_bytes`` the predict function's
    local variables as declared, ``ops`` the worst-case operations of one prediction as
    ``{'pixel_reads', 'additions', 'multiplications', 'comparisons', 'total'}``.
    """
    return rule.integer(threshold).cost()


def cost_of_document(doc: dict | str | bytes, threshold: float | None = None) -> dict:
    """:func:`cost` of a rule document (parsed JSON or its text), validated first."""
    return cost(parse_rule(doc), threshold)


def _fixed_point_lines(integer: IntegerModel) -> list[str]:
    f = integer.facts
    if not f:
        return [" * Arithmetic: integers only; this family is exact (no rounding)."]
    if "layers" in f:
        scales = ", ".join(f"layer {i}: 2^{layer['frac_bits']}" + (f" then / 2^{layer['shift']}" if "shift" in layer else "")
                           for i, layer in enumerate(f["layers"]))
        return [" * Arithmetic: integers only. Weights int16, biases and accumulators int32 (fixed point;",
                f" * weight scales {scales}); hidden units {_comment(f['hidden'])};",
                f" * the output accumulator holds z * 2^{f['output_frac_bits']}; positive when it is >= the threshold."]
    return [f" * Arithmetic: integers only. Weights int16, bias and accumulator int32, each a value times 2^{f['frac_bits']};",
            " * positive when the accumulator is >= the threshold."]


def header_text(rule: Rule, ident: str, threshold: float | None = None) -> str:
    P = ident.upper()
    h, w = rule.shape
    integer = rule.integer(threshold)
    c = integer.cost()
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
    decision = f"score > {rule.operating_threshold:.6g}" if threshold is None else f"score > {threshold:.6g}"
    lines = [
        f"/* {ident}.h: pixelfit rule {rule.family}-{rule.size}, exported as integer-only C99.",
        f" * Detects {_comment(rule.positive)} (returns 1) against {_comment(rule.negative)} (returns 0), at {decision}.",
        f" * Input: a {h}x{w} patch, row-major, one byte per pixel, 0 or 1 (non-zero counts as 1),",
        f" * binarized as the rule was trained: {_comment(b.describe())} (fixed: pixel >= T is 1; otsu and",
        " * per-patch methods: pixel > threshold is 1; invert flips the bits).",
        *_fixed_point_lines(integer),
        f" * Cost: {c['flash_bytes']} bytes of tables, {c['ram_bytes']} bytes of locals, at most "
        f"{c['ops']['total']} operations per patch.",
        f" * Training data fingerprint (SHA-256): {_comment(str(doc['training_data']['fingerprint']))}",
        f" * Held-out precision {_stat(test.get('precision'))}, recall {_stat(test.get('recall'))} on "
        f"{_stat(test.get('n'))} patches (the floating-point model, as recorded in the rule file).",
        f" * Operating threshold {rule.operating_threshold:.6g} (chosen on: {_comment(rule.operating_chosen_on)}): "
        "a patch is positive when its score is above it.",
        f" * Caution: {_comment(CAUTION)}",
        " */",
        f"#ifndef {P}_H",
        f"#define {P}_H",
        "",
        "#include <stdint.h>",
        "",
        f"#define {P}_HEIGHT {h}",
        f"#define {P}_WIDTH {w}",
        f"#define {P}_PIXELS {h * w}",
        "/* Bytes of the static const tables below (the sum of their sizeof). */",
        f"#define {P}_FLASH_BYTES {c['flash_bytes']}",
        "",
    ]
    lines += [t.declaration(ident) + "\n" for t in integer.tables]
    lines += [f"/* 1 when the patch is called {_comment(rule.positive)}, else 0. */",
              f"static inline int {ident}_predict(const uint8_t patch[{P}_PIXELS])", "{",
              integer.c_code(ident, P), "}", "", f"#endif /* {P}_H */", ""]
    return "\n".join(lines)


def vectors_text(rule: Rule, ident: str, X: np.ndarray, header_name: str, threshold: float | None = None) -> str:
    """Test vectors: each patch with the integer predictor's answer (what the C must return)."""
    P = ident.upper()
    pred = rule.integer(threshold).predict(X).astype(int)
    n = len(X)
    rows = ",\n".join("    {" + ", ".join(str(int(v)) for v in row) + "}" for row in X.astype(np.uint8))
    return "\n".join([
        f"/* {ident}_vectors.h: test vectors for {ident}.h: patch -> the integer predictor's answer, from pixelfit. */",
        f"#ifndef {P}_VECTORS_H",
        f"#define {P}_VECTORS_H",
        "",
        f'#include "{header_name}"',
        "",
        f"#define {P}_N_VECTORS {n}",
        f"static const uint8_t {ident}_vector_patches[{n}][{P}_PIXELS] = {{\n{rows}\n}};",
        "",
        CTable("vector_expected", "uint8_t", pred).declaration(ident),
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


def export_c(rule: Rule, header_path: str | os.PathLike, vectors: np.ndarray | None = None,
             threshold: float | None = None) -> tuple[Path, Path]:
    """Write ``header_path`` and ``<stem>_vectors.h`` beside it; returns both paths.

    Parameters
    ----------
    vectors : ndarray of shape (n, n_pixels), bool, optional
        Patches for the test vectors; default: :func:`default_vectors`.
    threshold : float, optional
        Call positive when the score is at least this (quantized like the weights); default:
        the model's own decision.
    """
    header_path = Path(header_path)
    ident = c_identifier(header_path.stem)
    X = default_vectors(rule) if vectors is None else np.asarray(vectors, bool).reshape(-1, rule.n_pixels)
    write_text(header_path, header_text(rule, ident, threshold))
    vpath = header_path.with_name(f"{header_path.stem}_vectors.h")
    write_text(vpath, vectors_text(rule, ident, X, header_path.name, threshold))
    return header_path, vpath
