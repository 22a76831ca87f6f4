"""The layering contract: the core runs headless, and every module imports only from layers below.

The layers are declared once, as import-linter contracts in pyproject.toml ([tool.importlinter]);
this file runs them, shows that they catch a violation, and checks at run time that importing the
core loads no Qt.
"""

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import pixelfit

ROOT = Path(pixelfit.__file__).parent
PROJECT = ROOT.parent


def core_modules() -> list[str]:
    """Every module of the package outside the Qt layer, found on disk (no hand-kept list)."""
    mods = []
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(ROOT)
        if rel.parts[0] in ("app", "__main__.py"):
            continue
        parts = ["pixelfit", *rel.with_suffix("").parts]
        if parts[-1] == "__init__":
            parts.pop()
        mods.append(".".join(parts))
    return mods


def test_core_imports_without_qt():
    mods = core_modules()
    assert "pixelfit.ladder" in mods and "pixelfit.firmware" in mods
    code = ("import sys\n" + "".join(f"import {m}\n" for m in mods)
            + "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'shiboken6'))\n"
            + "print(','.join(bad))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "", f"the core pulled in Qt modules: {out}"


def test_rule_files_load_without_scikit_learn_or_scipy():
    # Rule files promise numpy-only prediction: loading and predicting must not pull in the trainers.
    code = ("import sys\nimport pixelfit.rulefile, pixelfit.firmware, pixelfit.families\n"
            "print(','.join(sorted(m for m in sys.modules if m.split('.')[0] in ('sklearn', 'scipy'))))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "", f"pixelfit.rulefile loaded {out}"


def test_no_qt_import_statement_outside_app():
    offenders = []
    for path in ROOT.rglob("*.py"):
        if path.relative_to(ROOT).parts[0] == "app":
            continue
        for lineno, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            stripped = line.strip()
            if stripped.startswith(("import PySide6", "from PySide6", "import pyqtgraph", "from pyqtgraph")):
                offenders.append(f"{path.relative_to(ROOT)}:{lineno}")
    assert not offenders, offenders


def _lint_imports(project: Path) -> subprocess.CompletedProcess:
    exe = shutil.which("lint-imports", path=str(Path(sys.executable).parent)) or shutil.which("lint-imports")
    if exe is None:
        pytest.fail("lint-imports (import-linter, in the test extra) is not installed")
    env = {"PYTHONPATH": str(project), "PATH": str(Path(sys.executable).parent), "PYTHONDONTWRITEBYTECODE": "1"}
    return subprocess.run([exe, "--config", str(project / "pyproject.toml"), "--no-cache"], cwd=project,
                          capture_output=True, text=True, env=env)


def test_layer_contracts_hold():
    res = _lint_imports(PROJECT)
    assert res.returncode == 0, res.stdout[-3000:] + res.stderr[-2000:]
    assert "0 broken" in res.stdout


@pytest.mark.parametrize("module, statement", [
    # the window once took the dataset resolver from the command line (a cycle)
    ("app/session.py", "from pixelfit.cli import main as _x"),
    # an arrow running up: evaluation code reaching into the ladder
    ("evaluate/_importance.py", "from pixelfit.ladder import Prepared as _x"),
    # models once took class sizes from evaluate
    ("models/_estimators.py", "from pixelfit.evaluate import hoeffding_bound as _x"),
    # a family knows its estimator and its C code, never the ladder or the export around it
    ("families/lut.py", "from pixelfit.firmware import export_c as _x"),
    # data is the bottom layer of the core
    ("data/_split.py", "from pixelfit.models import LutRule as _x"),
])
def test_layer_contracts_catch_a_violation(tmp_path, module, statement):
    shutil.copytree(ROOT, tmp_path / "pixelfit", ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy(PROJECT / "pyproject.toml", tmp_path / "pyproject.toml")
    target = tmp_path / "pixelfit" / module
    target.write_text(target.read_text(encoding="utf-8") + f"\n{statement}  # noqa\n", encoding="utf-8")
    res = _lint_imports(tmp_path)
    assert res.returncode != 0, res.stdout[-2000:]
    assert "BROKEN" in res.stdout
