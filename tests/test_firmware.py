"""The integer-only C export: it compiles warning-free, holds no floating point, answers exactly as
the numpy integer predictor does, and its flash figure is the compiler's own sizeof."""

from __future__ import annotations

import math
import re
import shutil
import subprocess

import numpy as np
import pytest
from conftest import two_rule_patches

from pixelfit.cli import main
from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import RuleFileError
from pixelfit.evaluate import quantization_check
from pixelfit.families import FAMILIES, quantize_threshold
from pixelfit.firmware import cost, cost_of_document, export_c
from pixelfit.ladder import prepare, train_rung
from pixelfit.rulefile import parse_rule, rule_document, save_rung

CC = shutil.which("cc") or shutil.which("gcc")
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler")
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O1"]
FAMILY_SIZES = [("constant", 0), ("lut", 3), ("nb", 4), ("logistic", 6), ("tree", 4), ("mlp", 4), ("memorize", 36)]


@pytest.fixture(scope="module")
def prepared():
    # Class names a C comment must survive: a newline, a comment opener and closer, a control byte.
    imgs, lab = two_rule_patches(11, 400, "open\n/* lid */", "cap\x01??/")
    ds = Dataset(imgs, lab, [f"#{i}" for i in range(len(imgs))], "generated", "npz")
    return prepare(ds, Binarizer.parse("fixed:128"), positive="open\n/* lid */")


@pytest.fixture(scope="module")
def rules(prepared):
    return {fam: parse_rule(rule_document(prepared, train_rung(prepared, fam, size, folds=0)))
            for fam, size in FAMILY_SIZES}


def _compile_and_run(tmp_path, c_source: str) -> str:
    (tmp_path / "main.c").write_text(c_source)
    exe = tmp_path / "check"
    build = subprocess.run([CC, *CFLAGS, "-o", str(exe), str(tmp_path / "main.c")], capture_output=True, text=True)
    assert build.returncode == 0, build.stderr
    return subprocess.run([str(exe)], capture_output=True, text=True, check=True).stdout


def _static_objects(header: str) -> list[str]:
    return re.findall(r"^static const \w+ (\w+)", header, flags=re.M)


@needs_cc
@pytest.mark.parametrize("threshold", [None, 0.3])
@pytest.mark.parametrize("family", [f for f, _ in FAMILY_SIZES])
def test_integer_header_compiles_has_no_float_and_agrees(prepared, rules, family, threshold, tmp_path):
    rule = rules[family]
    X = np.vstack([prepared.X_train, prepared.X_test, np.zeros((1, 36), bool), np.ones((1, 36), bool)])
    header, vectors = export_c(rule, tmp_path / f"{family}_rule.h", vectors=X, threshold=threshold)
    text = header.read_text()
    assert not re.search(r"\b(float|double|math\.h)\b", text + vectors.read_text())
    ident, P = header.stem, header.stem.upper()
    out = _compile_and_run(tmp_path, (
        f'#include <stdio.h>\n#include "{vectors.name}"\n'
        f"int main(void) {{\n  int i, bad = 0;\n  for (i = 0; i < {P}_N_VECTORS; ++i) {{\n"
        f"    int got = {ident}_predict({ident}_vector_patches[i]);\n"
        f'    printf("%d\\n", got);\n    bad += got != {ident}_vector_expected[i];\n  }}\n'
        f'  printf("%d\\n", bad);\n  return 0;\n}}\n'))
    got = np.array([int(v) for v in out.split()])
    assert got[-1] == 0  # the C agrees with its own vectors
    assert np.array_equal(got[:-1].astype(bool), rule.integer(threshold).predict(X))


@needs_cc
@pytest.mark.parametrize("family", [f for f, _ in FAMILY_SIZES])
def test_flash_bytes_are_the_compiled_sizeofs(rules, family, tmp_path):
    rule = rules[family]
    header, _ = export_c(rule, tmp_path / "r.h")
    objects = _static_objects(header.read_text())
    if family != "constant":
        assert objects
    total = " + ".join(f"sizeof(r_{name[2:]})" for name in objects) or "0"
    out = _compile_and_run(tmp_path, (
        f'#include <stdio.h>\n#include "r.h"\nint main(void) {{\n'
        f'  (void)r_predict;\n  printf("%lu %lu\\n", (unsigned long)({total}), (unsigned long)R_FLASH_BYTES);\n'
        f"  return 0;\n}}\n"))
    measured, macro = (int(v) for v in out.split())
    assert measured == macro == cost(rule)["flash_bytes"]


def test_cost_figures_by_hand(rules):
    # Counted by hand from the layouts: lut-3 holds 3 pixel indices (uint8: a 6x6 patch has 36
    # pixels) and 2^3 uint8 answers.
    c = cost(rules["lut"])
    assert c["flash_bytes"] == 3 + 8 and c["ops"]["pixel_reads"] == 3
    # nb-4 and logistic-k: k uint8 indices + k int16 weights + an int32 bias and threshold.
    nb = cost(rules["nb"])
    assert nb["flash_bytes"] == 4 + 4 * 2 + 4 + 4 and nb["ops"]["multiplications"] == 0
    k = len(rules["logistic"].pixels_used())
    assert cost(rules["logistic"])["flash_bytes"] == 3 * k + 8
    # mlp-4 on 36 pixels: int16 weights 36x4 and 4x1, int32 biases 4 and 1, an int32 threshold.
    m = cost(rules["mlp"])
    assert m["flash_bytes"] == 2 * (36 * 4 + 4) + 4 * (4 + 1) + 4
    assert m["ops"]["multiplications"] >= 4 and m["ops"]["total"] == sum(
        v for key, v in m["ops"].items() if key != "total")
    assert cost(rules["constant"]) == {"flash_bytes": 0, "ram_bytes": 0,
                                       "ops": {"pixel_reads": 0, "additions": 0, "multiplications": 0,
                                               "comparisons": 0, "total": 0}}
    assert cost_of_document(rules["tree"].doc) == cost(rules["tree"])


@pytest.mark.parametrize("family", ["nb", "logistic", "mlp"])
def test_integer_predictor_follows_the_float_model(prepared, rules, family):
    rule = rules[family]
    X = np.vstack([prepared.X_train, prepared.X_test])
    check = quantization_check(rule.predict(X), rule.integer().predict(X))
    assert check["agreement"] >= 0.99
    # At a threshold, both call positive the patches whose score clears it, up to rounding.
    check = quantization_check(rule.predict(X, threshold=0.3), rule.integer(0.3).predict(X))
    assert check["agreement"] >= 0.99


def test_exact_families_are_exact(prepared, rules):
    X = np.vstack([prepared.X_train, prepared.X_test])
    for family in ("constant", "lut", "tree", "memorize"):
        rule = rules[family]
        for t in (None, 0.2, 0.5, 0.8):
            assert np.array_equal(rule.integer(t).predict(X), rule.predict(X, threshold=t)), (family, t)


def test_threshold_quantization():
    # One decision rule: score > T, i.e. z > logit(T), i.e. q > logit(T) * 2^f, i.e. q >= floor(.) + 1.
    assert quantize_threshold(None, 10) == 1  # the default decision z > 0
    assert quantize_threshold(0.5, 10) == 1  # T = 0.5 is the default decision
    # logit(0.9) = ln 9 = 2.1972...; times 2^8 = 562.49 -> floor 562, + 1 = 563 (ln 9 by hand: 2.19722458)
    assert quantize_threshold(0.9, 8) == math.floor(math.log(9) * 256) + 1 == 563
    # an exact multiple: logit(T) * 2^f = 256 exactly (T = sigmoid(1), f = 8): q = 256 is not above it
    assert quantize_threshold(1 / (1 + math.exp(-1.0)), 8) in (256, 257)
    assert quantize_threshold(0.0, 8) == -(2**31) and quantize_threshold(1.0, 8) == 2**31 - 1


def test_quantization_check_by_hand():
    y = np.array([1, 1, 0, 0, 1], bool)
    f = np.array([1, 1, 0, 1, 0], bool)  # tp 2, fp 1, fn 1: F1 = 2/3
    q = np.array([1, 0, 0, 1, 0], bool)  # tp 1, fp 1, fn 2: F1 = 0.4
    out = quantization_check(f, q, y)
    assert out["agree"] == 4 and out["agreement"] == 0.8
    assert out["f1_float"] == pytest.approx(2 / 3) and out["test"]["f1"] == pytest.approx(0.4)
    assert out["f1_loss"] == pytest.approx(2 / 3 - 0.4) and out["loses_f1"] is True
    assert quantization_check(f, f, y)["loses_f1"] is False
    assert quantization_check(f, q)["test"] is None


def test_mlp_integer_refuses_smooth_activations(rules):
    doc = dict(rules["mlp"].doc)
    doc["model"] = {**doc["model"], "activation": "tanh"}
    with pytest.raises(RuleFileError, match="relu"):
        parse_rule(doc).integer()


def test_fit_records_cost_and_quantization(prepared, tmp_path):
    rung = train_rung(prepared, "logistic", 4, folds=0)
    assert rung.cost == cost(parse_rule(rule_document(prepared, rung)))
    q = rung.quantized
    assert q["n"] == len(prepared.y_test) and 0 <= q["agreement"] <= 1 and q["fixed_point"]["frac_bits"] > 0
    doc = parse_rule(save_rung(tmp_path / "r.json", prepared, rung).read_text()).doc
    assert doc["quantized"] == q and rung.summary(prepared.shape)["cost"] == rung.cost


def test_every_family_has_a_module_with_both_sides():
    for name, fam in FAMILIES.items():
        assert fam.name == name and type(fam).__module__ == f"pixelfit.families.{name}"


@needs_cc
def test_export_command_prints_cost_and_agreement(prepared, tmp_path, capsys):
    ds = prepared.dataset
    labels = np.where(ds.labels == prepared.positive, "open", "capped")
    prep = prepare(Dataset(ds.images, labels, ds.names, "generated", "npz"), Binarizer.parse("fixed:128"),
                   positive="open")
    rung = train_rung(prep, "nb", 4, folds=0)
    rule_path = save_rung(tmp_path / "nb.json", prep, rung)
    npz = tmp_path / "data.npz"
    np.savez(npz, images=ds.images, labels=labels)
    assert main(["export", str(rule_path), "--c", str(tmp_path / "nb.h"), "--vectors-from", str(npz)]) == 0
    out = capsys.readouterr().out
    c = rung.cost
    assert f"{c['flash_bytes']} bytes of flash" in out and "agrees with the floating-point model" in out
    assert "integer   precision" in out or "integer precision" in out
    assert main(["export", str(rule_path), "--c", str(tmp_path / "nb2.h")]) == 0
    out = capsys.readouterr().out
    assert "generated test vectors" in out and "precision" not in out
    assert main(["export", str(rule_path), "--c", str(tmp_path / "nb3.h"), "--threshold", "2"]) == 2
