"""Guarantees that hold whatever the input: writes are atomic, and nothing in a file is executed."""
from __future__ import annotations

import ast
import json
import os
from pathlib import Path

import numpy as np
import pytest

import pixelfit
from pixelfit import _atomic
from pixelfit.cli import main

PACKAGE = Path(pixelfit.__file__).resolve().parent


# ---- atomic writes ------------------------------------------------------------------------------


def _leftovers(folder: Path, keep: set[str]) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name not in keep)


def test_failed_rename_keeps_previous_file_and_no_temp(tmp_path, monkeypatch):
    target = tmp_path / "rule.json"
    _atomic.write_json(target, {"version": 1})

    def fail(src, dst):
        raise OSError(28, "No space left on device", str(dst))

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(OSError, match="No space left"):
        _atomic.write_json(target, {"version": 2, "much": list(range(1000))})
    assert json.loads(target.read_text()) == {"version": 1}
    assert _leftovers(tmp_path, {"rule.json"}) == []


def test_failure_while_writing_keeps_previous_file_and_no_temp(tmp_path, monkeypatch):
    target = tmp_path / "ladder.png"
    _atomic.write_bytes(target, b"old picture")

    def fail(fd):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(os, "fsync", fail)
    with pytest.raises(OSError, match="Input/output error"):
        _atomic.write_bytes(target, b"new picture")
    assert target.read_bytes() == b"old picture"
    assert _leftovers(tmp_path, {"ladder.png"}) == []


def test_interrupt_while_writing_leaves_no_temp(tmp_path, monkeypatch):
    target = tmp_path / "summary.csv"

    def interrupt(src, dst):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "replace", interrupt)
    with pytest.raises(KeyboardInterrupt):
        _atomic.write_text(target, "family,size\n")
    assert _leftovers(tmp_path, set()) == []


def test_unwritable_json_fails_before_touching_the_file(tmp_path):
    target = tmp_path / "summary.json"
    _atomic.write_json(target, {"ok": True})
    with pytest.raises(ValueError):
        _atomic.write_json(target, {"value": float("nan")})  # JSON has no NaN
    assert json.loads(target.read_text()) == {"ok": True}
    assert _leftovers(tmp_path, {"summary.json"}) == []


def _fit_args(npz, out):
    return ["fit", str(npz), "--out", str(out), "--families", "constant,lut", "--sizes", "lut=1", "--folds", "2"]


@pytest.fixture
def small_npz(tmp_path, rng):
    images = (rng.random((40, 6, 6)) * 100).astype(np.uint8)
    images[:14, 2:4, 2:4] = 230
    path = tmp_path / "small.npz"
    np.savez(path, images=images, labels=np.array(["spot"] * 14 + ["blank"] * 26))
    return path


def test_report_write_failure_keeps_previous_report(small_npz, tmp_path, capsys, monkeypatch):
    out = tmp_path / "run"
    assert main(_fit_args(small_npz, out)) == 0
    before = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    real_replace = os.replace

    def fail_on_summary(src, dst):
        if Path(dst).name == "summary.json":
            raise OSError(28, "No space left on device", str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", fail_on_summary)
    capsys.readouterr()
    assert main(_fit_args(small_npz, out) + ["--seed", "3"]) == 1
    err = capsys.readouterr().err.splitlines()  # progress lines (one per rung), then the reason
    assert [ln for ln in err if ln.startswith("pixelfit:")] == err[-1:]
    assert "could not finish" in err[-1] and "summary.json: No space left on device" in err[-1]
    assert (out / "summary.json").read_bytes() == before[Path("summary.json")]
    assert not [p for p in out.rglob("*") if p.name.endswith(".tmp")]
    # The whole earlier run stays, not only its summary: the new one was never swapped in.
    assert {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()} == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run", "small.npz"]


def test_unusable_out_folder_refused_before_training(small_npz, tmp_path, capsys):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    assert main(_fit_args(small_npz, blocker / "run")) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "cannot create the folder" in err


# ---- nothing from a file is executed ------------------------------------------------------------

FORBIDDEN_MODULES = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "shelve", "marshal"}
# joblib's parallel loops are fine (the lut search uses them); its file loading unpickles.
JOBLIB_LOADERS = {"load", "Memory"}
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__"}


def unsafe_uses(source: str, filename: str = "<source>") -> list[str]:
    """Every import of a pickling module or of joblib's loaders, call of eval/exec/compile/__import__,
    joblib.load, and numpy load that does not say ``allow_pickle=False``, as 'file:line what'."""
    found = []
    for node in ast.walk(ast.parse(source, filename)):
        where = f"{filename}:{getattr(node, 'lineno', '?')}"
        if isinstance(node, ast.Import):
            found += [f"{where} import {a.name}" for a in node.names if a.name.split(".")[0] in FORBIDDEN_MODULES]
        elif isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] in FORBIDDEN_MODULES:
            found.append(f"{where} from {node.module} import")
        elif isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == "joblib":
            found += [f"{where} from joblib import {a.name}" for a in node.names if a.name in JOBLIB_LOADERS]
        elif isinstance(node, ast.Call):
            f = node.func
            if isinstance(f, ast.Name) and f.id in FORBIDDEN_CALLS:
                found.append(f"{where} {f.id}(")
            elif isinstance(f, ast.Attribute) and f.attr in FORBIDDEN_CALLS and isinstance(f.value, ast.Name) \
                    and f.value.id == "builtins":
                found.append(f"{where} builtins.{f.attr}(")
            elif isinstance(f, ast.Attribute) and f.attr in JOBLIB_LOADERS and isinstance(f.value, ast.Name) \
                    and f.value.id == "joblib":
                found.append(f"{where} joblib.{f.attr}(")
            elif isinstance(f, ast.Attribute) and f.attr == "load" and isinstance(f.value, ast.Name) \
                    and f.value.id in ("np", "numpy"):
                safe = any(k.arg == "allow_pickle" and isinstance(k.value, ast.Constant) and k.value.value is False
                           for k in node.keywords)
                if not safe:
                    found.append(f"{where} {f.value.id}.load( without allow_pickle=False")
    return found


@pytest.mark.parametrize("snippet", [
    "import pickle", "joblib.load(path)", "from joblib import load", "import cloudpickle as cp",
    "x = eval(text)", "exec(code)", "builtins.eval(s)", "compile(s, 'f', 'exec')",
    "np.load(path)", "np.load(path, allow_pickle=True)", "numpy.load(p, allow_pickle=flag)",
])
def test_scanner_finds_each_unsafe_use(snippet):
    assert unsafe_uses(snippet)


@pytest.mark.parametrize("snippet", [
    "np.load(path, allow_pickle=False)", "from joblib import Parallel, delayed",
    "re.compile('x')", "model.evaluate(x)", "s = 'pickle eval('",
    "# eval(x) in a comment",
])
def test_scanner_lets_safe_code_through(snippet):
    assert unsafe_uses(snippet) == []


def test_package_source_has_no_unsafe_use():
    files = sorted(PACKAGE.rglob("*.py"))
    assert len(files) > 10  # the scan sees the package, not an empty folder
    found = [hit for f in files for hit in unsafe_uses(f.read_text(encoding="utf-8"), str(f.relative_to(PACKAGE)))]
    assert found == []


# ---- permissions --------------------------------------------------------------------------------


@pytest.mark.parametrize("umask, expected", [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_written_files_honour_the_umask(tmp_path, npz_file, umask, expected):
    # A plain open() creates files with 0666 less the umask; an atomic write must do the same, or a
    # colleague or a build server cannot read a rule file (a bare temporary file is 0600).
    old = os.umask(umask)
    try:
        out = tmp_path / "run"
        assert main(["fit", str(npz_file), "--out", str(out), "--families", "constant,lut", "--max-size", "1",
                     "--folds", "0"]) == 0
        assert main(["export", str(out / "rules" / "lut-1.json"), "--c", str(tmp_path / "fw" / "rule.h")]) == 0
    finally:
        os.umask(old)
    written = [p for p in list(out.rglob("*")) + list((tmp_path / "fw").iterdir()) if p.is_file()]
    assert len(written) > 6
    modes = {p.name: oct(p.stat().st_mode & 0o777) for p in written}
    assert set(modes.values()) == {oct(expected)}, modes


def test_rewriting_a_file_keeps_its_permissions(tmp_path):
    target = tmp_path / "rule.json"
    _atomic.write_json(target, {"version": 1})
    os.chmod(target, 0o640)
    _atomic.write_json(target, {"version": 2})
    assert target.stat().st_mode & 0o777 == 0o640
    assert json.loads(target.read_text())["version"] == 2
