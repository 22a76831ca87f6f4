"""The output folder of `pixelfit fit` as one unit, driven through real processes.

Each run is `python -m pixelfit fit` in a child process on a small generated set; signals are
sent as a user (Ctrl-C) or the system (a kill) would. SIGSTOP pauses a run at a known point so
that nothing here depends on how fast the machine is.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import make_patches

from pixelfit.cli import main
from pixelfit.runfolder import RunFolder, is_run_folder

pytestmark = pytest.mark.skipif(os.name != "posix", reason="signals and process control as on POSIX")

ROOT = Path(__file__).resolve().parents[1]
FAST = ["--families", "constant,lut", "--sizes", "lut=1", "--folds", "0"]
# Enough rungs that a run is still climbing when the test acts on its first finished rung.
SLOW = ["--families", "constant,mlp", "--sizes", "mlp=1,2,3,4", "--folds", "2"]


@pytest.fixture
def data(tmp_path, rng):
    imgs, labels = make_patches(rng, n=160)
    path = tmp_path / "set.npz"
    np.savez(path, images=imgs, labels=labels)
    return path


def _start(data, out, extra) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT), PYTHONUNBUFFERED="1")
    return subprocess.Popen(
        [sys.executable, "-m", "pixelfit", "fit", str(data), "--out", str(out), *extra],
        cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        # Python turns SIGINT into KeyboardInterrupt only when it was not ignored at start
        # (a background job inherits it ignored): make it the default, as in a terminal.
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))


def _run(data, out, extra) -> subprocess.CompletedProcess:
    p = _start(data, out, extra)
    stdout, stderr = p.communicate(timeout=120)
    return subprocess.CompletedProcess(p.args, p.returncode, stdout, stderr)


def _wait_for_rung(p: subprocess.Popen) -> str:
    """Read progress lines until the first finished rung; returns it (stderr is not a terminal)."""
    assert p.stderr is not None
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        line = p.stderr.readline()
        if not line:
            raise AssertionError(f"the run ended before a rung finished (rc {p.wait()})")
        if line.rstrip().endswith(" done"):
            return line
    raise AssertionError("no rung finished in time")


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _leftovers(out: Path) -> list[str]:
    return sorted(p.name for p in out.parent.glob(f".{out.name}.partial-*"))


def test_second_run_on_the_same_folder_is_refused_while_the_first_holds_it(data, tmp_path):
    out = tmp_path / "run"
    first = _start(data, out, SLOW)
    try:
        _wait_for_rung(first)
        os.kill(first.pid, signal.SIGSTOP)  # the first run holds the folder, paused mid-ladder
        second = _run(data, out, FAST)
    finally:
        os.kill(first.pid, signal.SIGCONT)
    assert second.returncode == 2
    assert second.stderr.count("\n") == 1
    assert f"in use by another pixelfit run (process {first.pid})" in second.stderr
    _, err = first.communicate(timeout=120)
    assert first.returncode == 0, err
    s = json.loads((out / "summary.json").read_text())
    assert s["settings"]["families"] == ["constant", "mlp"] and not s["cancelled"]
    assert len(s["rungs"]) == 5
    assert not (tmp_path / ".run.lock").exists() and _leftovers(out) == []


def test_ctrl_c_keeps_exactly_the_finished_rungs_of_that_run(data, tmp_path):
    out = tmp_path / "run"
    earlier = _run(data, out, ["--families", "constant,lut,nb", "--sizes", "lut=1,2,3", "--sizes", "nb=1,2",
                               "--folds", "0"])
    assert earlier.returncode == 0, earlier.stderr
    earlier_files = _snapshot(out)
    p = _start(data, out, SLOW)
    _wait_for_rung(p)
    os.kill(p.pid, signal.SIGINT)
    stdout, stderr = p.communicate(timeout=120)
    assert p.returncode == 1, stderr
    assert "interrupted:" in stderr
    s = json.loads((out / "summary.json").read_text())
    assert s["cancelled"] is True and s["settings"]["families"] == ["constant", "mlp"]
    keys = [f"{r['family']}-{r['size']}" for r in s["rungs"]]
    assert 1 <= len(keys) < 5 and keys[0] == "constant-0"
    assert all(k.startswith(("constant", "mlp")) for k in keys)
    # The rules and heatmaps are those of these rungs, and nothing of the earlier run.
    assert sorted(p.stem for p in (out / "rules").iterdir()) == sorted(keys)
    stems = {p.stem for p in (out / "heatmaps").iterdir()}
    assert not any(st.startswith(("lut-", "nb-")) for st in stems)
    assert {st for st in stems if not st.startswith("data-")} <= {k for k in keys} | {f"{k}-permutation" for k in keys}
    assert _snapshot(tmp_path / "run.previous") == earlier_files
    assert _leftovers(out) == [] and not (tmp_path / ".run.lock").exists()


def test_killed_run_leaves_the_previous_run_intact_and_the_next_run_cleans_up(data, tmp_path):
    out = tmp_path / "run"
    assert _run(data, out, FAST).returncode == 0
    before = _snapshot(out)
    p = _start(data, out, SLOW)
    _wait_for_rung(p)
    os.kill(p.pid, signal.SIGKILL)
    p.communicate(timeout=60)
    assert _snapshot(out) == before  # the folder still holds the earlier run, whole
    assert _leftovers(out) == [f".run.partial-{p.pid}"]
    after = _run(data, out, FAST)
    assert after.returncode == 0, after.stderr
    assert f"took over the lock of process {p.pid}" in after.stderr
    assert f"removed .run.partial-{p.pid}" in after.stderr
    assert _leftovers(out) == [] and not (tmp_path / ".run.lock").exists()
    assert is_run_folder(out) and _snapshot(tmp_path / "run.previous") == before


def test_killed_while_writing_the_outputs_leaves_the_previous_run_intact(data, tmp_path):
    out = tmp_path / "run"
    assert _run(data, out, FAST).returncode == 0
    before = _snapshot(out)
    p = _start(data, out, ["--families", "constant,lut,nb,logistic", "--max-size", "4", "--folds", "0"])
    staging = tmp_path / f".run.partial-{p.pid}"
    deadline = time.monotonic() + 120
    while p.poll() is None and time.monotonic() < deadline:
        if staging.is_dir() and any(staging.iterdir()):  # the first output files are being written
            os.kill(p.pid, signal.SIGKILL)
            break
        time.sleep(0.002)
    p.communicate(timeout=60)
    assert p.returncode == -signal.SIGKILL, "the run finished before the test could stop it mid-write"
    assert any(staging.rglob("*")) and _snapshot(out) == before
    assert _run(data, out, FAST).returncode == 0
    assert _leftovers(out) == []


def test_second_run_with_fewer_rungs_leaves_no_stale_rules_or_heatmaps(class_folder, tmp_path):
    out = tmp_path / "run"
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant,lut,tree",
                 "--max-size", "3", "--folds", "0"]) == 0
    assert (out / "rules" / "tree-3.json").exists()
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant,lut",
                 "--max-size", "1", "--folds", "0"]) == 0
    assert sorted(p.name for p in (out / "rules").iterdir()) == ["constant-0.json", "lut-1.json"]
    assert not any(p.name.startswith(("tree", "lut-2", "lut-3")) for p in (out / "heatmaps").iterdir())
    assert (tmp_path / "run.previous" / "rules" / "tree-3.json").exists()
    # A third run replaces the older kept run: one earlier run is kept, not a pile of them.
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant", "--folds", "0"]) == 0
    assert sorted(p.name for p in (tmp_path / "run.previous" / "rules").iterdir()) == ["constant-0.json", "lut-1.json"]


@pytest.mark.parametrize("where", ["same", "inside", "holds"])
def test_output_overlapping_the_input_is_refused(class_folder, where, capsys):
    out = {"same": class_folder, "inside": class_folder / "runs" / "a", "holds": class_folder.parent}[where]
    before = sorted(class_folder.rglob("*"))
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant", "--folds", "0"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("pixelfit: --out: ")
    assert ("lies inside the output folder" if where == "holds" else "the input") in err
    assert sorted(class_folder.rglob("*")) == before


def test_output_reached_through_a_link_into_the_input_is_refused(class_folder, tmp_path, capsys):
    link = tmp_path / "link"
    link.symlink_to(class_folder)
    assert main(["fit", str(class_folder), "--out", str(link / "out"), "--families", "constant", "--folds", "0"]) == 2
    assert "lies inside the input" in capsys.readouterr().err


def test_someone_elses_folder_is_refused_unless_overwrite(class_folder, tmp_path, capsys):
    out = tmp_path / "notes"
    out.mkdir()
    (out / "thesis.tex").write_text("mine")
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant", "--folds", "0"]) == 2
    err = capsys.readouterr().err
    assert "not a pixelfit run" in err and "--overwrite" in err and err.count("\n") == 1
    assert [p.name for p in out.iterdir()] == ["thesis.tex"]
    assert main(["fit", str(class_folder), "--out", str(out), "--families", "constant", "--folds", "0",
                 "--overwrite"]) == 0
    assert is_run_folder(out) and (tmp_path / "notes.previous" / "thesis.tex").read_text() == "mine"


def test_run_folder_in_the_core_without_the_cli(tmp_path):
    """The window can use the same unit: a failure before the commit leaves the target as it was."""
    target = tmp_path / "out"
    target.mkdir()
    with RunFolder(target) as rf:
        (rf.staging / "summary.json").write_text(json.dumps({"format": "pixelfit-ladder-summary"}))
        assert (tmp_path / ".out.lock").read_text().strip() == str(os.getpid())
        with pytest.raises(Exception, match="in use by another pixelfit run"):
            RunFolder(target).open()
        rf.commit()
    assert is_run_folder(target)
    with pytest.raises(RuntimeError), RunFolder(target) as rf:
        (rf.staging / "summary.json").write_text("{}")
        raise RuntimeError("a crash mid-write")
    assert is_run_folder(target) and not (tmp_path / "out.previous").exists()
    assert list(tmp_path.glob(".out.*")) == []


def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)
    (tmp_path / ".out.lock").write_text(f"{pid}\n")
    with RunFolder(tmp_path / "out") as rf:
        assert rf.notes == [f"took over the lock of process {pid}, which stopped without releasing it"]
