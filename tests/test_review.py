"""The review page: contract, escaping of names from the user's files, optional sections, and a
load in a real browser engine (QtWebEngine, in a child process)."""

from __future__ import annotations

import base64
import io
import json
import os
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import html5lib
import numpy as np
import pytest
from conftest import SEED, make_patches
from PIL import Image

from pixelfit.cli import main
from pixelfit.review import NOT_COMPUTED, render_report
from pixelfit.rulefile import CAUTION

HOSTILE_POS = "<script>alert(1)</script>"
HOSTILE_NEG = "it's \"quoted\" </style><b>bold</b> & <!-- x"
HERE = Path(__file__).parent
XHTML = "{http://www.w3.org/1999/xhtml}"


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory) -> Path:
    """A fitted run on an .npz set whose class names are markup, with the page written by fit --report."""
    root = tmp_path_factory.mktemp("hostile")
    imgs, labels = make_patches(np.random.default_rng(SEED), n=160)
    labels = np.where(labels == "spot", HOSTILE_POS, HOSTILE_NEG)
    np.savez(root / "patches.npz", images=imgs, labels=labels)
    out = root / "run"
    rc = main(["fit", str(root / "patches.npz"), "--out", str(out), "--families", "constant,lut,logistic,tree",
               "--max-size", "3", "--folds", "3", "--positive", HOSTILE_POS, "--report"])
    assert rc == 0
    return out


def _parse(html: str):
    return html5lib.parse(html)


def _summary(run: Path) -> dict:
    return json.loads((run / "summary.json").read_text(encoding="utf-8"))


def _chosen(summary: dict) -> str:
    rec = summary["recommended"]
    return f"{rec['family']}-{rec['size']}"


def static_checks(html: str) -> dict:
    """What can be checked without a browser: the parsed tree and every embedded picture decoded."""
    doc = _parse(html)
    refs = [el.get(a) for el in doc.iter() for a in ("src", "href") if el.get(a) is not None]
    imgs = [el for el in doc.iter(f"{XHTML}img")]
    decoded = []
    for el in imgs:
        head, _, data = el.get("src").partition(",")
        assert head == "data:image/png;base64", head
        with Image.open(io.BytesIO(base64.b64decode(data))) as im:
            im.load()
            decoded.append(im.size)
    text = "".join(doc.itertext())
    return {"refs": refs, "images": decoded, "scripts": len(list(doc.iter(f"{XHTML}script"))), "text": text}


def test_fit_report_contract(hostile_run):
    page = hostile_run / "report.html"
    assert page.is_file()
    html = page.read_text(encoding="utf-8")
    s = _summary(hostile_run)
    assert s["settings"]["command"][:2] == ["pixelfit", "fit"] and "--report" in s["settings"]["command"]
    assert s["settings"]["versions"]["numpy"] == np.__version__
    seen = static_checks(html)
    assert _chosen(s) in seen["text"]
    assert CAUTION in seen["text"]
    assert s["dataset"]["fingerprint"] in seen["text"]
    for r in s["rungs"]:
        assert f"{r['family']}-{r['size']}" in seen["text"]
    assert not [u for u in seen["refs"] if u.lower().startswith(("http:", "https:", "//", "file:"))]
    assert all(u.startswith(("data:", "#")) for u in seen["refs"]), seen["refs"]
    assert len(seen["images"]) >= 3 and all(w > 0 and h > 0 for w, h in seen["images"])
    assert seen["scripts"] == 0
    assert len(html.encode()) < 5_000_000
    # The page was made from the data on disk: the misses are shown, not the fallback note.
    assert "False positives" in seen["text"] and "cannot be shown as thumbnails" not in seen["text"]


def test_names_from_files_come_out_as_text(hostile_run):
    html = (hostile_run / "report.html").read_text(encoding="utf-8")
    seen = static_checks(html)
    assert seen["scripts"] == 0  # the class name did not become a script element
    assert HOSTILE_POS in seen["text"] and HOSTILE_NEG in seen["text"]
    assert "<script>" not in html and "</style><b>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    doc = _parse(html)
    assert len(list(doc.iter(f"{XHTML}style"))) == 1 and not list(doc.iter(f"{XHTML}b"))


def test_report_command_writes_atomically(hostile_run, tmp_path, monkeypatch, capsys):
    out = tmp_path / "x.html"
    assert main(["report", str(hostile_run), "--out", str(out)]) == 0
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    # A failed write leaves the earlier page whole and no temporary file behind; exit 1 with one line.
    out.write_text("earlier page", encoding="utf-8")

    def no_rename(*_a, **_k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", no_rename)
    capsys.readouterr()
    assert main(["report", str(hostile_run), "--out", str(out)]) == 1
    assert out.read_text(encoding="utf-8") == "earlier page"
    assert [p.name for p in tmp_path.iterdir()] == ["x.html"]
    assert "No space left" in capsys.readouterr().err


def test_report_refuses_a_folder_that_is_not_a_run(tmp_path, capsys):
    assert main(["report", str(tmp_path)]) == 2
    assert "no summary.json" in capsys.readouterr().err


def test_data_out_of_reach_is_said_not_fatal(hostile_run, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(hostile_run, run)
    s = _summary(run)
    s["dataset"]["source"] = str(tmp_path / "gone.npz")
    (run / "summary.json").write_text(json.dumps(s), encoding="utf-8")
    text = static_checks(render_report(run))["text"]
    assert "cannot be read here" in text and "cannot be shown as thumbnails" in text
    assert _chosen(s) in text and CAUTION in text
    # Data that changed since the fit are not used either.
    imgs, labels = make_patches(np.random.default_rng(SEED + 1), n=160)
    np.savez(tmp_path / "gone.npz", images=imgs, labels=labels)
    assert "not the one this run was fitted on" in static_checks(render_report(run))["text"]


def test_optional_sections_render_where_computed(hostile_run, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(hostile_run, run)
    s = _summary(run)
    before = static_checks(render_report(run))["text"]
    assert NOT_COMPUTED in before
    # Add what other parts of pixelfit record when they ran, with the keys their issues fix.
    target = s["rungs"][1]
    key = f"{target['family']}-{target['size']}"
    s["spec"] = {"precision": 0.9, "recall": 0.8, "confidence": 0.95, "budget_bytes": 512}
    s["answer"] = {"rung": key, "verdict": "plausible", "reason": "lower bounds short of the targets",
                   "extra_test_patches": 4321}
    s["dataset"]["check"] = {"duplicate_groups": 7, "duplicate_patches": 15, "cross_class_duplicate_groups": 2,
                             "conflict_groups": 2, "conflict_patches": 5, "error_floor": 0.0123,
                             "leaked_test_grey": 3, "leaked_test_binary": 9, "near_duplicate_test": 11,
                             "suspects": [{"path": "#17", "label": HOSTILE_NEG, "score": 0.987}]}
    s["split"]["method"] = "grouped-by-duplicate"
    for r in s["rungs"]:
        r["cost"] = {"flash_bytes": 100 + r["size"], "ram_bytes": 8, "ops": 31}
        r["spec"] = {"threshold": 0.5, "chosen_on": "cv", "cv": {"precision": 0.91, "recall": 0.82},
                     "test": {"tp": 1, "fp": 2, "fn": 3, "tn": 4, "precision": 0.5, "recall": 0.4,
                              "precision_lower": 0.2, "recall_lower": 0.1}, "verdict": "plausible"}
    target["bias_variance"] = {"replicates": 25, "loss": 0.1, "bias": 0.0617, "variance": 0.05,
                               "unbiased_variance": 0.04, "biased_variance": 0.0017}
    target["stress"] = {"shift:1,0": {"precision": 0.5, "recall": 0.25, "f1": 0.333},
                        "worst": {"name": "shift:1,0", "f1_drop": 0.4444}}
    s["learning_curve"] = {"rungs": [key], "fractions": [0.1, 1.0], "points": [
        {"rung": key, "fraction": 0.1, "cv_error": 0.3, "cv_error_std": 0.02, "test_error": 0.31}],
        "verdict": {key: "more data would likely help"}}
    (run / "summary.json").write_text(json.dumps(s), encoding="utf-8")
    text = static_checks(render_report(run))["text"]
    assert f"Answer: {key}" in text and "4321" in text  # the answer rung is the one shown in full
    assert f"The chosen rung: {key}" in text
    for figure in ("512 bytes", "0.0123", "grouped-by-duplicate", "0.987", "0.0617", "0.444", "shift:1,0",
                   "more data would likely help", "flash B", "plausible"):
        assert figure in text, figure
    assert HOSTILE_NEG in text
    assert f"Stress tests: {NOT_COMPUTED}" not in text and f"Learning curve: {NOT_COMPUTED}" not in text


def test_session_exports_the_same_page(hostile_run, tmp_path):
    # The window's export writes its run as a fit folder and calls the same write_report.
    from pixelfit.app.session import Session

    s = Session()
    assert s.open(Path(_summary(hostile_run)["dataset"]["source"]))
    s.set_positive(HOSTILE_POS)
    s.set_ladder(families=["constant", "lut"], max_size=2, folds=3)
    spec = s.start_run()
    from pixelfit.ladder import run_ladder

    for pr in run_ladder(spec.prep, spec.plan, spec.folds, spec.seed):
        if pr.rung is not None:
            s.add_rung(pr.rung)
    s.end_run("finished")
    out = s.export_report(tmp_path / "review.html")
    assert out == tmp_path / "review.html"
    text = static_checks(out.read_text(encoding="utf-8"))["text"]
    assert s.recommended.key in text and CAUTION in text and "False positives" in text
    assert "pixelfit fit" in text and "--families constant,lut" in text
    assert all(r.rule_file is None for r in s.rungs)  # the session's own rungs are untouched


def _browser(page: Path, timeout: float = 90) -> dict | str:
    """Run tests/browser_check.py on a page; the result, or why the engine could not run."""
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen",
               QTWEBENGINE_CHROMIUM_FLAGS="--no-sandbox --disable-gpu --disable-dev-shm-usage")
    try:
        res = subprocess.run([sys.executable, str(HERE / "browser_check.py"), str(page)], capture_output=True,
                             text=True, timeout=timeout, env=env)
    except subprocess.TimeoutExpired:
        return f"the browser engine did not answer within {timeout:.0f} s"
    lines = [ln for ln in res.stdout.splitlines() if ln.startswith("{")]
    if not lines:
        return f"the browser engine did not start (exit {res.returncode}): {res.stderr.strip()[-300:]}"
    out = json.loads(lines[-1])
    if "loaded" not in out:
        return out.get("engine", "no result")
    return out


def test_page_in_a_browser_engine(hostile_run):
    page = hostile_run / "report.html"
    s = _summary(hostile_run)
    seen = _browser(page)
    if isinstance(seen, str):
        # Fall back to the static checks, and say why.
        warnings.warn(f"QtWebEngine could not run here ({seen}); checked the page with html5lib and Pillow only",
                      stacklevel=1)
        static = static_checks(page.read_text(encoding="utf-8"))
        assert _chosen(s) in static["text"] and CAUTION in static["text"]
        assert static["images"] and all(w > 0 for w, _ in static["images"])
        return
    assert seen["loaded"] is True and not seen.get("timeout")
    assert [m for m in seen["console"] if m["level"] == "ErrorMessageLevel"] == []
    probe = seen["probe"]
    assert probe["images"] and all(i["naturalWidth"] > 0 and i["complete"] for i in probe["images"])
    assert all(i["scheme"] == "data" for i in probe["images"])
    assert probe["scripts"] == 0
    text = seen["text"]
    assert _chosen(s) in text and CAUTION in " ".join(text.split())
    assert HOSTILE_POS in text and HOSTILE_NEG in text  # shown as text, never run
    own = page.resolve().as_uri()
    assert all(u == own or u.startswith("data:") for u in seen["requests"]), seen["requests"]
    assert seen["blocked"] == []
