"""One column spec for a rung row: the command line's table, summary.csv and the window's table."""

import csv
import io

import numpy as np

from pixelfit.data import Binarizer, Dataset
from pixelfit.ladder import prepare, train_rung
from pixelfit.outputs import summary_csv
from pixelfit.text import COLUMNS, FIELDS, ladder_table, log2_text, rung_cells


def _summary():
    rng = np.random.default_rng(3)
    imgs = (rng.random((120, 5, 5)) * 255).astype(np.uint8)
    lab = np.where(imgs[:, 2, 2] > 127, "on", "off")
    prep = prepare(Dataset(imgs, lab, [f"#{i}" for i in range(120)], "generated", "npz"), Binarizer.parse("fixed:128"))
    rungs = [train_rung(prep, f, s, folds=2) for f, s in (("constant", 0), ("lut", 2), ("memorize", 25))]
    return {"rungs": [r.summary(prep.shape) for r in rungs]}


def test_table_and_csv_come_from_one_spec():
    summary = _summary()
    table = ladder_table(summary).splitlines()
    assert table[0].split()[:2] == ["rung", "size"] and "flash B" in table[0]
    for line, r in zip(table[2:], summary["rungs"]):
        assert line.split()[:2] == [rung_cells(r)[0], rung_cells(r)[1].split()[0]]
        assert log2_text(r["log2_class_size"]) in line and str(r["cost"]["flash_bytes"]) in line
    rows = list(csv.DictReader(io.StringIO(summary_csv(summary))))
    assert list(rows[0]) == [f.name for f in FIELDS]
    assert [int(row["flash_bytes"]) for row in rows] == [r["cost"]["flash_bytes"] for r in summary["rungs"]]
    # The memorize class is huge: one format everywhere, in scientific notation.
    assert "e+" in log2_text(summary["rungs"][-1]["log2_class_size"])
    assert len({c.header for c in COLUMNS}) == len(COLUMNS)


def test_window_table_uses_the_same_columns():
    from pixelfit.app.widgets import ladder_view

    assert ladder_view.COLUMNS is COLUMNS
