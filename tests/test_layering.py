"""The core must run headless: importing it (and running the CLI's core path) loads no Qt."""

import subprocess
import sys
from pathlib import Path

import pixelfit

CORE_MODULES = ["pixelfit", "pixelfit.data", "pixelfit.models", "pixelfit.evaluate", "pixelfit.ladder",
                "pixelfit.report", "pixelfit.plots", "pixelfit.rulefile", "pixelfit.cli"]


def test_core_imports_without_qt():
    code = ("import sys\n" + "".join(f"import {m}\n" for m in CORE_MODULES)
            + "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'shiboken6'))\n"
            + "print(','.join(bad))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "", f"the core pulled in Qt modules: {out}"


def test_no_qt_import_statement_outside_app():
    root = Path(pixelfit.__file__).parent
    offenders = []
    for path in root.rglob("*.py"):
        if path.relative_to(root).parts[0] == "app":
            continue
        for lineno, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            stripped = line.strip()
            if stripped.startswith(("import PySide6", "from PySide6", "import pyqtgraph", "from pyqtgraph")):
                offenders.append(f"{path.relative_to(root)}:{lineno}")
    assert not offenders, offenders
