"""Rule files beyond the field checks: huge, deeply nested, applied to other patches, written
over, exported to C. Each is refused with RuleFileError (CLI: exit 2, one line) or works."""
from __future__ import annotations

import json
import os
import re

import numpy as np
import pytest

import pixelfit.rulefile._rule as rule_mod
from pixelfit import _atomic
from pixelfit.cli import main
from pixelfit.data import Binarizer, Dataset
from pixelfit.errors import RuleFileError
from pixelfit.firmware import header_text
from pixelfit.ladder import prepare, train_rung
from pixelfit.rulefile import MAX_RULE_BYTES, load_rule, parse_rule, rule_document, save_rung


@pytest.fixture(scope="module")
def prep():
    rng = np.random.default_rng(5)
    imgs = (rng.random((60, 4, 4)) * 255).astype(np.uint8)
    lab = np.where(imgs[:, 1, 2] > 127, "open", "capped")
    return prepare(Dataset(imgs, lab, [f"#{i}" for i in range(60)], "generated", "npz"), Binarizer.parse("fixed:128"))


@pytest.fixture(scope="module")
def lut_rung(prep):
    return train_rung(prep, "lut", 2, folds=0)


@pytest.fixture
def rule_path(prep, lut_rung, tmp_path):
    return save_rung(tmp_path / "lut-2.json", prep, lut_rung)


def _cli_refuses(argv, capsys, text):
    capsys.readouterr()
    assert main(argv) == 2
    captured = capsys.readouterr()
    assert captured.err.count("\n") == 1 and captured.err.startswith("pixelfit: ") and text in captured.err, captured.err


def test_file_of_several_hundred_mb_refused_unread(tmp_path, capsys, monkeypatch):
    big = tmp_path / "huge.json"
    with open(big, "wb") as fh:  # sparse: 300 MB long, no disk used
        fh.truncate(300 * 1024 * 1024)

    def no_read(self):
        raise AssertionError("the file was read")

    monkeypatch.setattr(type(big), "read_bytes", no_read)
    with pytest.raises(RuleFileError, match=f"larger than any rule file \\({MAX_RULE_BYTES / 1e6:.0f} MB limit\\)"):
        load_rule(big)
    _cli_refuses(["show", str(big)], capsys, "larger than any rule file")


def test_oversize_text_refused_before_parsing(monkeypatch):
    monkeypatch.setattr(rule_mod, "MAX_RULE_BYTES", 1000)
    with pytest.raises(RuleFileError, match="the limit is"):
        parse_rule("[" + "0," * 600 + "0]")


@pytest.mark.parametrize("depth", [40, 1_000, 200_000])
def test_deeply_nested_json_text_refused(depth):
    text = '{"format": "pixelfit-rule", "x": ' + "[" * depth + "]" * depth + "}"
    with pytest.raises(RuleFileError, match="nested deeper than 32 levels"):
        parse_rule(text)


def test_deeply_nested_document_refused():
    doc: dict = {}
    node = doc
    for _ in range(100_000):  # built without recursion; checking it must not recurse either
        node["a"] = {}
        node = node["a"]
    doc["format"] = "pixelfit-rule"
    with pytest.raises(RuleFileError, match="nested deeper than 32 levels"):
        parse_rule(doc)


def test_patch_shape_mismatch_at_apply_refused(prep, lut_rung, rule_path, tmp_path, capsys):
    rule = load_rule(rule_path)
    assert rule.shape == (4, 4)
    with pytest.raises(RuleFileError, match="this rule reads 4x4 = 16"):
        rule.predict(np.zeros((3, 25), bool))
    with pytest.raises(RuleFileError, match="the rule reads"):
        rule.binarize(np.zeros((3, 5, 5), np.uint8))
    other = tmp_path / "five.npz"
    np.savez(other, images=np.zeros((6, 5, 5), np.uint8), labels=np.array(["open", "capped"] * 3))
    _cli_refuses(["apply", str(rule_path), str(other)], capsys, "patches are 5x5, the rule reads 4x4")


def test_missing_and_non_file_rule_paths_refused(tmp_path, capsys):
    _cli_refuses(["show", str(tmp_path / "nope.json")], capsys, "cannot read")
    _cli_refuses(["show", str(tmp_path)], capsys, "not a file")


def test_rewritten_rule_file_survives_failed_rename(prep, lut_rung, rule_path, monkeypatch):
    before = rule_path.read_bytes()

    def fail(src, dst):
        raise OSError(28, "No space left on device", str(dst))

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(OSError):
        save_rung(rule_path, prep, lut_rung)
    assert rule_path.read_bytes() == before
    assert sorted(p.name for p in rule_path.parent.iterdir()) == [rule_path.name]
    load_rule(rule_path)  # still a valid rule


def _code(c_text: str) -> str:
    """The C text with its /* */ comments removed: what a compiler would read."""
    return re.sub(r"/\*.*?\*/", "", c_text, flags=re.S)


def test_c_export_takes_no_text_from_evaluation(prep, lut_rung):
    # evaluation is free-form in the schema: text there must not end a C comment and become code.
    doc = rule_document(prep, lut_rung)
    doc["evaluation"]["test"]["n"] = "*/ int injected_by_the_file; /*"
    doc["evaluation"]["test"]["precision"] = "0.99 */ #include </etc/passwd> /*"
    header = header_text(parse_rule(doc), "r")
    assert "injected_by_the_file" not in _code(header) and "passwd" not in _code(header)
    assert "Held-out precision unknown, recall" in header


@pytest.mark.parametrize("test_value", [[1, 2], "text", 5])
def test_c_export_with_evaluation_test_not_an_object(prep, lut_rung, test_value):
    doc = rule_document(prep, lut_rung)
    doc["evaluation"]["test"] = test_value
    header = header_text(parse_rule(doc), "r")
    assert "Held-out precision undefined, recall undefined on undefined patches" in header


def test_class_names_cannot_close_the_c_comment(prep, lut_rung):
    doc = rule_document(prep, lut_rung)
    doc["classes"]["positive"] = "open */ int evil; /*"
    header = header_text(parse_rule(doc), "r")
    assert "evil" in header and "evil" not in _code(header)


def test_atomic_writer_used_for_rules(prep, lut_rung, tmp_path, monkeypatch):
    # save_rung goes through the one atomic writer (no second, unguarded copy of it).
    seen = []
    real = _atomic.write_json

    def spy(path, obj):
        seen.append(path)
        return real(path, obj)

    monkeypatch.setattr(rule_mod, "write_json", spy)
    save_rung(tmp_path / "r.json", prep, lut_rung)
    assert seen == [tmp_path / "r.json"]
    assert json.loads((tmp_path / "r.json").read_text())["format"] == "pixelfit-rule"
