"""The window on a machine where it cannot open: one line that says why and what to do, exit 2."""

import os
import subprocess
import sys

from pixelfit.app import environment_problem, explain_qt_failure


def _env(**changes):
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    env.update(changes)
    return env


def test_environment_without_a_screen_is_named():
    assert "no screen found" in environment_problem({}, "linux")
    assert environment_problem({"DISPLAY": ":0"}, "linux") is None
    assert environment_problem({"WAYLAND_DISPLAY": "wayland-0"}, "linux") is None
    assert environment_problem({"QT_QPA_PLATFORM": "offscreen"}, "linux") is None
    assert environment_problem({}, "darwin") is None  # other systems always have a window server


def test_qt_messages_become_one_actionable_line():
    # Qt 6's own wording when the xcb plugin lacks a library (as printed on this machine).
    xcb = ("qt.qpa.plugin: From 6.5.0, xcb-cursor0 or libxcb-cursor0 is needed to load the Qt xcb platform plugin.\n"
           "qt.qpa.plugin: Could not load the Qt platform plugin \"xcb\" in \"\" even though it was found.\n")
    line = explain_qt_failure(xcb)
    assert "libxcb-cursor0" in line and "pixelfit fit" in line and "\n" not in line
    lib = explain_qt_failure("ImportError: libEGL.so.1: cannot open shared object file: No such file or directory")
    assert "libEGL.so.1" in lib
    assert "pixelfit fit" in explain_qt_failure("something else entirely\n")


def test_pixelfit_without_display_says_so_and_exits_2():
    res = subprocess.run([sys.executable, "-m", "pixelfit"], capture_output=True, text=True, env=_env(), timeout=60)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert "no screen found" in lines[0] and "pixelfit fit PATH --out DIR" in lines[0] and "offscreen" in lines[0]


def test_pixelfit_with_a_display_nobody_answers_exits_2():
    # An X display that does not exist: Qt would abort the process; pixelfit probes first.
    res = subprocess.run([sys.executable, "-m", "pixelfit", "gui"], capture_output=True, text=True,
                         env=_env(DISPLAY=":97", QT_QPA_PLATFORM="xcb"), timeout=90)
    assert res.returncode == 2
    assert len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert res.stderr.startswith("pixelfit: the window cannot start")
