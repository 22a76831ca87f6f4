"""Can the window open here? Answered before Qt is loaded, so a missing screen is one plain line.

Qt ends the whole process (it does not raise) when its platform plugin cannot start: no display,
or a system library the plugin needs is missing. So the check runs where Qt cannot hurt: first on
the environment, then by starting a bare Qt application in a short child process.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys

HEADLESS_HINT = ("`pixelfit fit PATH --out DIR` does the same job without a window; to run the window "
                 "offscreen (for screenshots or tests), set QT_QPA_PLATFORM=offscreen")

_PROBE = ("import sys\nfrom pixelfit.app._qt import QtWidgets\n"
          "app = QtWidgets.QApplication(sys.argv[:1])\nprint(app.platformName())\n")


def environment_problem(env: dict[str, str] | None = None, platform: str | None = None) -> str | None:
    """Why no window can open with these environment variables, or None when one may."""
    env = dict(os.environ) if env is None else env
    platform = platform or sys.platform
    if not platform.startswith("linux") or env.get("QT_QPA_PLATFORM"):
        return None
    if env.get("DISPLAY") or env.get("WAYLAND_DISPLAY"):
        return None
    return f"no screen found (neither DISPLAY nor WAYLAND_DISPLAY is set); {HEADLESS_HINT}"


def probe_problem(env: dict[str, str] | None = None, timeout: float = 30.0) -> str | None:
    """Start a bare Qt application in a child process; None when it works, else why it did not."""
    try:
        res = subprocess.run([sys.executable, "-c", _PROBE], capture_output=True, text=True, timeout=timeout,
                             env=None if env is None else dict(env))
    except subprocess.TimeoutExpired:
        return None  # slow is not broken: let the window try
    if res.returncode == 0:
        return None
    return explain_qt_failure(res.stderr)


def explain_qt_failure(stderr: str) -> str:
    """One line from what Qt printed when its platform plugin failed."""
    needed = re.search(r"(\S+) (?:or (\S+) )?is needed to load the Qt (\w+) platform plugin", stderr)
    if needed:
        pkgs = " or ".join(p for p in needed.groups()[:2] if p)
        example = needed.group(2) or needed.group(1)
        return (f"the window cannot start: Qt's {needed.group(3)} platform plugin needs {pkgs}; install it "
                f"(for example `apt-get install {example}`), or {HEADLESS_HINT}")
    lib = re.search(r"(lib[\w.+-]+\.so[\w.]*): cannot open shared object file", stderr)
    if lib:
        return (f"the window cannot start: the system library {lib.group(1)} is missing; install the package "
                f"that provides it, or {HEADLESS_HINT}")
    display = re.search(r"could not connect to display ?(\S*)", stderr)
    if display:
        where = display.group(1) or os.environ.get("DISPLAY", "")
        return f"the window cannot start: no screen answers at display {where!r}; {HEADLESS_HINT}"
    last = next((ln.strip() for ln in reversed(stderr.splitlines()) if ln.strip()), "no message")
    return f"the window cannot start: Qt said {last!r}; {HEADLESS_HINT}"
