"""The shipped demo sets: regenerated bit for bit, and each shows the trade-off it is there to show."""
from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from pixelfit.cli import main
from pixelfit.data import load_dataset

SHIPPED = Path(__file__).resolve().parent.parent / "demo_sets"
SETS = {"bottle-caps": {"shape": (10, 10), "classes": {"capped", "open"}, "layout": "class-folders"},
        "solder-bridges": {"shape": (12, 12), "classes": {"bridge", "clear"}, "layout": "pre-split"}}

# A reduced ladder that keeps every one-pixel rung, both ends and a few sizes of each family in
# between, without cross-validation: the held-out figures the checks use do not depend on it,
# and the full default ladder (recorded in each set's README) takes minutes on two cores.
REDUCED = ["--families", "constant,lut,nb,logistic,tree,mlp,memorize", "--sizes", "lut=1,2,3",
           "--sizes", "nb=1,16", "--sizes", "logistic=1,16,{p}", "--sizes", "tree=1,4,6,8",
           "--sizes", "mlp=16,64", "--folds", "0", "--no-rules"]
ONE_PIXEL = ("lut-1", "nb-1", "logistic-1", "tree-1")


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*.png"))}


@pytest.mark.parametrize("name", list(SETS))
def test_regenerated_set_matches_shipped_files(name, tmp_path):
    out = tmp_path / name
    assert main(["demo", name, "--out", str(out)]) == 0
    fresh, shipped = _files(out), _files(SHIPPED / name)
    assert len(shipped) == 2000
    assert sorted(fresh) == sorted(shipped)
    differing = [k for k in fresh if fresh[k] != shipped[k]]
    assert differing == []
    ds = load_dataset(SHIPPED / name)
    spec = SETS[name]
    assert ds.shape == spec["shape"] and set(ds.counts) == spec["classes"] and ds.layout == spec["layout"]
    assert ds.skipped == []
    counts = sorted(ds.counts.values())
    assert counts[0] < 0.6 * counts[1]  # unequal classes, as on a real line


def test_demo_refuses_a_folder_with_foreign_files(tmp_path, capsys):
    out = tmp_path / "caps"
    assert main(["demo", "bottle-caps", "--out", str(out)]) == 0
    assert main(["demo", "bottle-caps", "--out", str(out)]) == 0  # an earlier copy is regenerated in place
    (out / "capped" / "mine.png").write_bytes(b"not ours")
    assert main(["demo", "bottle-caps", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "capped/mine.png" in err


def _ladder(name: str, out: Path, extra: list[str]) -> dict[str, dict]:
    assert main(["fit", name, "--out", str(out), *extra]) == 0
    summary = json.loads((out / "summary.json").read_text())
    return {f"{r['family']}-{r['size']}": r for r in summary["rungs"]}


def _f1(rung: dict) -> float:
    return rung["test"]["f1"] or 0.0


@pytest.mark.parametrize("name", list(SETS))
def test_ladder_shows_the_size_trade_off(name, tmp_path, monkeypatch):
    monkeypatch.chdir(SHIPPED.parent)  # the set is found by its name, as a user would type it
    h, w = SETS[name]["shape"]
    rungs = _ladder(name, tmp_path / "fit", [a.format(p=h * w) for a in REDUCED])
    best_key = max(rungs, key=lambda k: _f1(rungs[k]))
    best = rungs[best_key]
    # The best rung lies strictly inside the ladder and meets both targets on held-out patches.
    assert best_key not in ONE_PIXEL + ("constant-0", f"memorize-{h * w}")
    assert best["test"]["precision"] >= 0.8 and best["test"]["recall"] >= 0.8
    for key in ONE_PIXEL:
        assert _f1(rungs[key]) <= _f1(best) - 0.15, key
    memorize = rungs[f"memorize-{h * w}"]
    assert memorize["train"]["f1"] >= 0.99
    assert _f1(memorize) <= _f1(best) - 0.15
    if name == "solder-bridges":
        # Joining both pads is not a weighted sum of pixels: the linear families trail.
        linear = max(_f1(r) for k, r in rungs.items() if r["family"] in ("nb", "logistic"))
        assert linear <= _f1(best) - 0.04


def test_bottle_caps_per_patch_threshold_beats_one_global_threshold(tmp_path, monkeypatch):
    monkeypatch.chdir(SHIPPED.parent)
    one = ["--families", "tree", "--sizes", "tree=6", "--folds", "0", "--no-rules"]
    global_otsu = _ladder("bottle-caps", tmp_path / "global", one)["tree-6"]
    per_patch = _ladder("bottle-caps", tmp_path / "patch", one + ["--binarize", "otsu-patch"])["tree-6"]
    assert _f1(per_patch) >= _f1(global_otsu) + 0.03


def test_a_readme_beside_the_patches_is_not_a_skipped_file(class_folder, presplit_folder):
    for root in (class_folder, presplit_folder):
        (root / "README.md").write_text("what these patches are\n")
        ds = load_dataset(root)
        assert ds.skipped == [] and "README.md" not in ds.names
    (class_folder / "notes.txt").write_text("not a patch\n")
    assert [s.path for s in load_dataset(class_folder).skipped] == ["notes.txt"]


def test_installed_package_generates_a_missing_demo_set_into_the_cache(tmp_path):
    # An installed package (no source tree beside it) carries no demo sets: the first use of a
    # name generates the set into the user's cache folder, byte for byte the bundled copy.
    import shutil
    import subprocess
    import sys

    import pixelfit

    pkg = tmp_path / "site"
    shutil.copytree(Path(pixelfit.__file__).parent, pkg / "pixelfit", ignore=shutil.ignore_patterns("__pycache__"))
    work = tmp_path / "elsewhere"
    work.mkdir()
    env = {"PATH": os.environ.get("PATH", ""), "PYTHONPATH": str(pkg), "XDG_CACHE_HOME": str(tmp_path / "cache"),
           "HOME": str(tmp_path), "PYTHONDONTWRITEBYTECODE": "1"}
    run = [sys.executable, "-m", "pixelfit", "scan", "bottle-caps"]
    first = subprocess.run(run, cwd=work, env=env, capture_output=True, text=True, timeout=300)
    assert first.returncode == 0, first.stderr
    assert "generated the demo set 'bottle-caps'" in first.stderr
    assert "2000 patches of 10x10" in first.stdout
    cached = tmp_path / "cache" / "pixelfit" / "demo_sets" / "bottle-caps"
    bundled = SHIPPED / "bottle-caps"
    files = sorted(p.relative_to(bundled) for p in bundled.rglob("*.png"))
    assert files == sorted(p.relative_to(cached) for p in cached.rglob("*.png"))
    assert all((cached / f).read_bytes() == (bundled / f).read_bytes() for f in files[::97])
    again = subprocess.run(run, cwd=work, env=env, capture_output=True, text=True, timeout=120)
    assert again.returncode == 0 and "generated" not in again.stderr
