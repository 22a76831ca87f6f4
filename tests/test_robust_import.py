"""Every bad input to the import gets one of two answers, and the test says which.

*refused*: the whole import cannot go on; ``load_dataset`` raises :class:`DatasetError` and the
CLI exits 2 with exactly one line on stderr. *skipped*: the file is left out, listed in
``Dataset.skipped`` with its reason, and every good patch beside it is still imported.
"""
from __future__ import annotations

import csv
import io
import json
import os
import re
import struct
import warnings
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from pixelfit.cli import main
from pixelfit.data import load_dataset, read_patch
from pixelfit.errors import DatasetError, PixelfitError

N_GOOD = 6  # good patches per class in the base folder


def _patch(value: int, shape=(8, 8)) -> np.ndarray:
    img = np.full(shape, value, np.uint8)
    img[0, 0] = 255 - value  # not flat, so nothing downstream sees a constant image
    return img


@pytest.fixture
def base(tmp_path) -> Path:
    """Two class folders of good 8x8 patches, into which each test drops its bad input."""
    root = tmp_path / "base"
    for cls, start in (("spot", 150), ("blank", 20)):
        (root / cls).mkdir(parents=True)
        for i in range(N_GOOD):
            Image.fromarray(_patch(start + i)).save(root / cls / f"g{i}.png")
    return root


def reasons(ds) -> dict[str, str]:
    return {s.path: s.reason for s in ds.skipped}


def assert_skipped(root: Path, rel: str, reason_part: str, good: int = 2 * N_GOOD):
    """The file is listed with a reason containing ``reason_part``; the good patches all arrive."""
    ds = load_dataset(root)
    assert rel not in ds.names
    assert rel in reasons(ds), reasons(ds)
    assert reason_part in reasons(ds)[rel]
    assert len(ds) == good
    return ds


def assert_refused(path, text: str, capsys):
    """load_dataset raises DatasetError containing ``text``; `pixelfit scan` exits 2 with that one
    line on stderr."""
    with pytest.raises(DatasetError, match=re.escape(text)) as info:
        load_dataset(path)
    assert isinstance(info.value, PixelfitError)
    assert main(["scan", str(path)]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    assert captured.err.count("\n") == 1 and captured.err.startswith("pixelfit: ")
    assert text in captured.err
    return info.value


def _png(img: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(img).save(buf, "PNG")
    return buf.getvalue()


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    # PNG chunk layout: length, type, data, CRC-32 of type+data (W3C, 2003, PNG Specification 2nd ed., s. 5.3)
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def _png_declaring(width: int, height: int) -> bytes:
    """A few hundred bytes of valid PNG structure whose header declares width x height gray pixels."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", zlib.compress(b"\0" * 4096))
            + _png_chunk(b"IEND", b""))


# ---- whole-import refusals -------------------------------------------------------------------


def test_empty_folder_refused(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert_refused(tmp_path / "empty", "no readable patches found", capsys)


def test_only_one_class_refused(base, capsys):
    for f in (base / "blank").iterdir():
        f.unlink()
    (base / "blank").rmdir()
    assert_refused(base, "only one class", capsys)


def test_class_folder_with_no_readable_image(base, capsys):
    for f in (base / "blank").iterdir():
        f.write_bytes(b"garbage, not pixels")
    # With two classes left it is refused, and the line says which class fell out and why.
    err = assert_refused(base, "only one class", capsys)
    assert "class 'blank' dropped" in str(err)
    # With a third class the import goes on; the dropped class is listed, as is each of its files.
    (base / "third").mkdir()
    for i in range(3):
        Image.fromarray(_patch(90 + i)).save(base / "third" / f"t{i}.png")
    ds = load_dataset(base)
    assert ds.counts == {"spot": N_GOOD, "third": 3}
    assert "dropped: none of its 6 entries is a readable patch" in reasons(ds)["blank"]
    assert all("not an image" in reasons(ds)[f"blank/g{i}.png"] for i in range(N_GOOD))


def test_nonexistent_path_refused(tmp_path, capsys):
    assert_refused(tmp_path / "no-such-folder", "no such file or folder", capsys)


def test_single_non_npz_file_refused(base, capsys):
    assert_refused(base / "spot" / "g0.png", "a single file must be an .npz", capsys)


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="running as root: permission bits do not stop root from reading, "
                           "so a real unreadable folder cannot be made; the simulated tests below cover it")
def test_unreadable_folder_refused_real_permissions(base, capsys):
    base.chmod(0)
    try:
        assert_refused(base, "cannot be read", capsys)
    finally:
        base.chmod(0o755)


def test_unreadable_folder_refused_simulated(base, capsys, monkeypatch):
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: False if Path(p) == base else real_access(p, mode, **kw))
    assert_refused(base, "folder cannot be read (permission denied)", capsys)


def test_folder_that_fails_to_list_refused_simulated(tmp_path, capsys, monkeypatch):
    # A pre-split folder whose train/ cannot be listed: the split cannot be kept, so refuse.
    root = tmp_path / "pre"
    for part in ("train", "test"):
        for cls in ("a", "b"):
            (root / part / cls).mkdir(parents=True)
            Image.fromarray(_patch(40)).save(root / part / cls / "x.png")
            Image.fromarray(_patch(41)).save(root / part / cls / "y.png")
    real_listdir = os.listdir

    def listdir(p="."):
        if Path(p) == root / "train":
            raise PermissionError(13, "Permission denied", str(p))
        return real_listdir(p)

    real_scandir = os.scandir

    def scandir(p="."):
        if Path(p) == root / "train":
            raise PermissionError(13, "Permission denied", str(p))
        return real_scandir(p)

    monkeypatch.setattr(os, "listdir", listdir)
    monkeypatch.setattr(os, "scandir", scandir)
    assert_refused(root, "folder cannot be read (Permission denied)", capsys)


def test_unreadable_file_skipped_simulated(base, monkeypatch):
    import pixelfit.data._import as import_mod

    target = base / "spot" / "g3.png"
    real_open = open

    def guarded_open(file, *args, **kwargs):
        if Path(file) == target:
            raise PermissionError(13, "Permission denied", str(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(import_mod, "open", guarded_open, raising=False)
    assert_skipped(base, "spot/g3.png", "cannot read: Permission denied", good=2 * N_GOOD - 1)


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="running as root: permission bits do not stop root from reading; "
                           "test_unreadable_file_skipped_simulated covers it")
def test_unreadable_file_skipped_real_permissions(base):
    target = base / "spot" / "g3.png"
    target.chmod(0)
    try:
        assert_skipped(base, "spot/g3.png", "cannot read: Permission denied", good=2 * N_GOOD - 1)
    finally:
        target.chmod(0o644)


def test_unreadable_subfolder_skipped_simulated(base, monkeypatch):
    sub = base / "spot" / "batch2"
    sub.mkdir()
    Image.fromarray(_patch(170)).save(sub / "x.png")
    real_scandir = os.scandir

    def scandir(p="."):
        if Path(p) == sub:
            raise PermissionError(13, "Permission denied", str(p))
        return real_scandir(p)

    monkeypatch.setattr(os, "scandir", scandir)
    assert_skipped(base, "spot/batch2", "folder cannot be read (Permission denied)")


# ---- per-file skips ---------------------------------------------------------------------------


def test_corrupt_png_skipped(base):
    data = bytearray(_png(_patch(10)))
    idat = data.index(b"IDAT")
    data[idat + 6 : idat + 14] = b"\xff" * 8  # damage the compressed pixels, keep the header
    (base / "spot" / "corrupt.png").write_bytes(bytes(data))
    assert_skipped(base, "spot/corrupt.png", "corrupt or truncated image")


def test_truncated_png_skipped(base):
    data = _png(np.arange(64, dtype=np.uint8).reshape(8, 8))
    (base / "spot" / "cut.png").write_bytes(data[: len(data) - 30])
    ds = assert_skipped(base, "spot/cut.png", "corrupt or truncated image")
    assert len(ds.skipped) == 1


def test_zero_byte_file_skipped(base):
    (base / "spot" / "zero.png").write_bytes(b"")
    assert_skipped(base, "spot/zero.png", "empty file (0 bytes)")


def test_non_image_with_image_extension_skipped(base):
    (base / "spot" / "notes.png").write_text("this is a text file that someone renamed\n")
    assert_skipped(base, "spot/notes.png", "not an image Pillow can read")


def test_other_format_with_image_extension_is_not_decoded(base):
    # A GIF renamed .png: GIF is not among the formats pixelfit decodes, whatever the name says.
    buf = io.BytesIO()
    Image.fromarray(_patch(10)).save(buf, "GIF")
    (base / "spot" / "really-gif.png").write_bytes(buf.getvalue())
    assert_skipped(base, "spot/really-gif.png", "not an image Pillow can read as PNG, BMP, TIFF, PPM, JPEG")


def test_text_and_hidden_files_skipped(base):
    (base / "spot" / "readme.txt").write_text("hello")
    (base / "spot" / ".DS_Store").write_bytes(b"\0\0\0\1Bud1")
    (base / "spot" / ".cache").mkdir()
    Image.fromarray(_patch(10)).save(base / "spot" / ".cache" / "thumb.png")
    (base / ".trash").mkdir()
    ds = load_dataset(base)
    r = reasons(ds)
    assert r["spot/readme.txt"] == "not an image file type (.txt)"
    assert r["spot/.DS_Store"] == "hidden file"
    assert r["spot/.cache"] == "hidden folder"
    assert r[".trash"] == "hidden"
    assert "spot/.cache/thumb.png" not in ds.names and len(ds) == 2 * N_GOOD


def test_file_outside_class_folders_skipped(base):
    Image.fromarray(_patch(10)).save(base / "stray.png")
    assert_skipped(base, "stray.png", "file outside any class folder")


def test_fifo_with_image_name_skipped_without_blocking(base):
    if not hasattr(os, "mkfifo"):
        pytest.skip("no named pipes on this system")
    os.mkfifo(base / "spot" / "pipe.png")
    assert_skipped(base, "spot/pipe.png", "not a regular file")


# ---- image modes: each read as 8-bit gray with a known value ----------------------------------


def _gray_ramp() -> np.ndarray:
    return (np.arange(64, dtype=np.uint8).reshape(8, 8) * 4)


def test_rgb_read_as_luma(tmp_path):
    ramp = _gray_ramp()
    Image.fromarray(np.stack([ramp] * 3, axis=-1), "RGB").save(tmp_path / "rgb.png")
    # Equal R, G, B give that value back: the ITU-R 601-2 weights sum to 1 (Pillow, Image.convert docs).
    assert np.array_equal(read_patch(tmp_path / "rgb.png"), ramp)
    rgb = np.zeros((8, 8, 3), np.uint8)
    rgb[..., 1] = 200
    Image.fromarray(rgb, "RGB").save(tmp_path / "green.png")
    # L = R*299/1000 + G*587/1000 + B*114/1000 (Pillow, Image.convert docs): 200*0.587 = 117.4 -> 117
    assert read_patch(tmp_path / "green.png")[0, 0] == 117


def test_rgba_alpha_dropped(tmp_path):
    ramp = _gray_ramp()
    rgba = np.stack([ramp, ramp, ramp, np.zeros_like(ramp)], axis=-1)  # fully transparent
    Image.fromarray(rgba, "RGBA").save(tmp_path / "rgba.png")
    assert np.array_equal(read_patch(tmp_path / "rgba.png"), ramp)


def test_palette_read_through_its_palette(tmp_path):
    ramp = _gray_ramp()
    Image.fromarray(ramp).convert("P").save(tmp_path / "pal.png")
    assert Image.open(tmp_path / "pal.png").mode == "P"
    assert np.array_equal(read_patch(tmp_path / "pal.png"), ramp)


def test_one_bit_read_as_0_and_255(tmp_path):
    bits = _gray_ramp() >= 128
    Image.fromarray(bits).save(tmp_path / "bits.png")
    assert Image.open(tmp_path / "bits.png").mode == "1"
    assert np.array_equal(read_patch(tmp_path / "bits.png"), np.where(bits, 255, 0))


def test_sixteen_bit_tiff_scaled(tmp_path):
    ramp = _gray_ramp()
    Image.fromarray(ramp.astype(np.uint16) * 257).save(tmp_path / "deep.tif")  # 257 * v maps 255 to 65535
    assert Image.open(tmp_path / "deep.tif").mode == "I;16"
    assert np.array_equal(read_patch(tmp_path / "deep.tif"), ramp)


def test_float_tiff_in_unit_range_scaled(tmp_path):
    ramp = _gray_ramp()
    Image.fromarray(ramp.astype(np.float32) / 255).save(tmp_path / "f.tif")
    assert Image.open(tmp_path / "f.tif").mode == "F"
    assert np.array_equal(read_patch(tmp_path / "f.tif"), ramp)


def test_float_tiff_out_of_range_or_nan_skipped(base):
    Image.fromarray(np.full((8, 8), 300.5, np.float32)).save(base / "spot" / "hot.tif")
    Image.fromarray(np.full((8, 8), np.nan, np.float32)).save(base / "spot" / "nan.tif")
    ds = load_dataset(base)
    assert reasons(ds)["spot/hot.tif"] == "float image values 300.5..300.5 are outside [0, 1] and [0, 255]"
    assert reasons(ds)["spot/nan.tif"] == "float image holds NaN or infinity"
    assert len(ds) == 2 * N_GOOD


def test_all_modes_imported_together(base):
    ramp = _gray_ramp()
    d = base / "spot"
    Image.fromarray(np.stack([ramp] * 3, axis=-1), "RGB").save(d / "m-rgb.png")
    Image.fromarray(np.stack([ramp] * 4, axis=-1), "RGBA").save(d / "m-rgba.png")
    Image.fromarray(ramp).convert("P").save(d / "m-pal.png")
    Image.fromarray(ramp >= 128).save(d / "m-bits.png")
    Image.fromarray(ramp.astype(np.uint16) * 257).save(d / "m-deep.tif")
    Image.fromarray(ramp.astype(np.float32) / 255).save(d / "m-float.tif")
    ds = load_dataset(base)
    assert ds.skipped == []
    assert ds.counts["spot"] == N_GOOD + 6
    assert ds.images.dtype == np.uint8 and ds.images.shape[1:] == (8, 8)


def test_colour_mode_without_gray_conversion_skipped(base):
    ramp = _gray_ramp()
    Image.fromarray(np.stack([ramp] * 3, axis=-1), "RGB").convert("LAB").save(base / "spot" / "lab.tif")
    assert_skipped(base, "spot/lab.tif", "image mode LAB cannot be turned to grayscale")


# ---- shapes, sizes, bombs ---------------------------------------------------------------------


def test_mixed_shapes_minority_skipped(base):
    Image.fromarray(_patch(30, (9, 9))).save(base / "spot" / "odd.png")
    Image.fromarray(_patch(30, (8, 12))).save(base / "blank" / "wide.png")
    ds = load_dataset(base)
    assert ds.shape == (8, 8)
    assert reasons(ds)["spot/odd.png"] == "patch is 9x9, the others are 8x8"
    assert reasons(ds)["blank/wide.png"] == "patch is 8x12, the others are 8x8"
    assert len(ds) == 2 * N_GOOD


def test_patch_larger_than_64_skipped(base):
    Image.fromarray(np.zeros((65, 64), np.uint8)).save(base / "spot" / "big.png")
    assert_skipped(base, "spot/big.png", "patch is 65x64; pixelfit takes patches of at most 64x64")


def test_decompression_bomb_refused_without_decoding(base):
    bomb = _png_declaring(100_000, 100_000)
    assert len(bomb) < 1000
    (base / "spot" / "bomb.png").write_bytes(bomb)
    assert_skipped(base, "spot/bomb.png", "refused: declares an implausibly large image")


def test_bomb_between_pillow_limits_refused_without_warning(base):
    # 10,000 x 10,000 is above Pillow's warning limit but below its error limit: Pillow would
    # only warn; pixelfit refuses it and lets no warning out.
    (base / "spot" / "big-header.png").write_bytes(_png_declaring(10_000, 10_000))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert_skipped(base, "spot/big-header.png", "refused: declares an implausibly large image")
    assert not [w for w in caught if issubclass(w.category, Image.DecompressionBombWarning)]


# ---- links and names --------------------------------------------------------------------------


def test_symlink_loops_skipped(base):
    os.symlink("loop.png", base / "spot" / "loop.png")  # a link to itself
    os.symlink("..", base / "spot" / "up")  # a folder link that would walk in circles
    os.symlink("blank", base / "alias")  # a class folder reached twice
    ds = load_dataset(base)
    r = reasons(ds)
    assert r["spot/loop.png"] == "symbolic link whose target cannot be reached (missing, or a loop)"
    assert r["spot/up"] == "symbolic link to a folder (not followed)"
    assert r["alias"] == "symbolic link to a folder (not followed)"
    assert len(ds) == 2 * N_GOOD


def test_unicode_and_space_names_imported(tmp_path, capsys):
    root = tmp_path / "mit Leerzeichen ü"
    for cls, start in (("défaut ø", 150), ("bon 良", 20)):
        (root / cls / "sous dossier").mkdir(parents=True)
        for i in range(6):
            Image.fromarray(_patch(start + i)).save(root / cls / "sous dossier" / f"patch n°{i} é.png")
    ds = load_dataset(root)
    assert ds.counts == {"bon 良": 6, "défaut ø": 6}
    assert "défaut ø/sous dossier/patch n°0 é.png" in ds.names
    out = tmp_path / "run ü"
    assert main(["fit", str(root), "--out", str(out), "--families", "constant,lut", "--sizes", "lut=1",
                 "--folds", "2", "--test-fraction", "0.34"]) == 0
    s = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert s["dataset"]["counts"] == {"bon 良": 6, "défaut ø": 6}
    rows = list(csv.DictReader(open(out / "split.csv", encoding="utf-8")))
    assert {r["path"] for r in rows} == set(ds.names)


def test_name_that_is_not_utf8_skipped_and_printable(base, capsys):
    bad = os.fsencode(base / "spot") + b"/caf\xe9.png"  # Latin-1 bytes, not UTF-8
    with open(bad, "wb") as fh:
        fh.write(_png(_patch(10)))
    ds = assert_skipped(base, "spot/caf\\xe9.png", "name is not valid UTF-8 text; rename the file")
    json.dumps(reasons(ds), ensure_ascii=False).encode("utf-8")  # the report can be written as UTF-8
    assert main(["scan", str(base)]) == 0
    assert "spot/caf\\xe9.png: name is not valid UTF-8" in capsys.readouterr().out


# ---- labels.csv -------------------------------------------------------------------------------


@pytest.fixture
def listed(tmp_path) -> Path:
    root = tmp_path / "listed"
    (root / "img").mkdir(parents=True)
    rows = [["path", "label"]]
    for i in range(8):
        Image.fromarray(_patch(20 + 15 * i)).save(root / "img" / f"q{i}.png")
        rows.append([f"img/q{i}.png", "spot" if i % 2 else "blank"])
    with open(root / "labels.csv", "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    return root


def _rewrite_csv(root: Path, edit) -> None:
    lines = (root / "labels.csv").read_text(encoding="utf-8").splitlines()
    (root / "labels.csv").write_text("\n".join(edit(lines)) + "\n", encoding="utf-8")


def test_labels_csv_missing_row_skipped(listed):
    _rewrite_csv(listed, lambda lines: [ln for ln in lines if "q3.png" not in ln])
    assert_skipped(listed, "img/q3.png", "not listed in labels.csv", good=7)


def test_labels_csv_unknown_file_skipped(listed):
    _rewrite_csv(listed, lambda lines: lines + ["img/ghost.png,spot"])
    assert_skipped(listed, "img/ghost.png", "listed in labels.csv but no such file", good=8)


def test_labels_csv_duplicate_rows_skipped(listed):
    _rewrite_csv(listed, lambda lines: lines + ["img/q1.png,spot", "img/q2.png,spot"])
    ds = load_dataset(listed)
    r = reasons(ds)
    assert r["labels.csv:10"] == "duplicate row for img/q1.png"
    assert r["labels.csv:11"] == "img/q2.png listed again with another label (spot); the first row's label (blank) is used"
    assert len(ds) == 8
    assert ds.labels[ds.names.index("img/q2.png")] == "blank"


def test_labels_csv_with_bom_read(listed):
    text = (listed / "labels.csv").read_text(encoding="utf-8")
    (listed / "labels.csv").write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    ds = load_dataset(listed)
    assert len(ds) == 8 and ds.skipped == []


def test_labels_csv_row_without_label_skipped(listed):
    _rewrite_csv(listed, lambda lines: lines[:3] + ["img/q2.png,"] + lines[4:])
    ds = load_dataset(listed)
    assert reasons(ds)["labels.csv:4"] == "row needs both a path and a label"
    assert reasons(ds)["img/q2.png"] == "not listed in labels.csv"
    assert len(ds) == 7


def test_labels_csv_paths_leaving_the_folder_skipped(listed):
    Image.fromarray(_patch(10)).save(listed.parent / "outside.png")
    _rewrite_csv(listed, lambda lines: lines + ["../outside.png,spot", f"{listed.parent / 'outside.png'},spot"])
    ds = load_dataset(listed)
    assert reasons(ds)["labels.csv:10"] == "../outside.png: paths in labels.csv must stay inside the folder"
    assert "must stay inside the folder" in reasons(ds)["labels.csv:11"]
    assert len(ds) == 8


def test_labels_csv_windows_separators_read(listed):
    _rewrite_csv(listed, lambda lines: [ln.replace("/", "\\") for ln in lines])
    ds = load_dataset(listed)
    assert len(ds) == 8 and ds.skipped == []


def test_labels_csv_without_header_refused(listed, capsys):
    _rewrite_csv(listed, lambda lines: lines[1:])
    assert_refused(listed, "the first row must be the header 'path,label'", capsys)


def test_labels_csv_not_text_refused(listed, capsys):
    (listed / "labels.csv").write_bytes(b"path,label\nimg/q0.png,\xff\xfe\n")
    assert_refused(listed, "not UTF-8 text", capsys)
    (listed / "labels.csv").write_bytes(b'path,label\nimg/q0.png,"' + b"x" * 200_000 + b'"\n')
    assert_refused(listed, "not valid CSV at line 2 (field larger than field limit", capsys)


def test_labels_csv_control_characters_skipped(listed):
    _rewrite_csv(listed, lambda lines: lines[:2] + ["img/q1.png,sp\0ot"] + lines[3:])
    ds = load_dataset(listed)
    assert reasons(ds)["labels.csv:3"] == "label holds control characters"
    assert len(ds) == 7


# ---- .npz -------------------------------------------------------------------------------------


def _npz(tmp_path, name="bad.npz", **arrays) -> Path:
    path = tmp_path / name
    np.savez(path, **arrays)
    return path


def _good_arrays(n=8):
    images = np.stack([_patch(20 + 20 * i) for i in range(n)])
    labels = np.array(["spot", "blank"] * (n // 2))
    return images, labels


def test_npz_wrong_dtypes_refused(tmp_path, capsys):
    images, labels = _good_arrays()
    assert_refused(_npz(tmp_path, "frac.npz", images=images / 3.0, labels=labels),
                   "'images' must be uint8; it is float64", capsys)
    assert_refused(_npz(tmp_path, "wide.npz", images=images.astype(np.int32) * 2, labels=labels),
                   "'images' must be uint8 (0..255); it is int32 with values outside 0..255", capsys)
    assert_refused(_npz(tmp_path, "bool.npz", images=images > 50, labels=labels),
                   "'images' must be uint8; it is bool", capsys)
    assert_refused(_npz(tmp_path, "text.npz", images=images.astype(str), labels=labels),
                   "'images' must be uint8; it is <U3", capsys)
    assert_refused(_npz(tmp_path, "flab.npz", images=images, labels=np.linspace(0, 1, 8)),
                   "'labels' must be strings or integers; it is float64", capsys)
    # Integer-valued floats inside 0..255 are the same pixels, and are taken.
    ds = load_dataset(_npz(tmp_path, "whole.npz", images=images.astype(np.float32), labels=labels))
    assert np.array_equal(ds.images, images)


def test_npz_wrong_dimensions_refused(tmp_path, capsys):
    images, labels = _good_arrays()
    assert_refused(_npz(tmp_path, "flat.npz", images=images.reshape(8, 64), labels=labels),
                   "'images' must have 3 dimensions", capsys)
    assert_refused(_npz(tmp_path, "rgb.npz", images=np.stack([images] * 3, -1), labels=labels),
                   "'images' must have 3 dimensions", capsys)
    assert_refused(_npz(tmp_path, "lab2d.npz", images=images, labels=labels.reshape(4, 2)),
                   "'labels' must have shape (8,)", capsys)
    assert_refused(_npz(tmp_path, "big.npz", images=np.zeros((2, 65, 8), np.uint8), labels=labels[:2]),
                   "patches are 65x8; pixelfit takes patches of at most 64x64", capsys)
    assert_refused(_npz(tmp_path, "thin.npz", images=np.zeros((2, 0, 8), np.uint8), labels=labels[:2]),
                   "patches are 0x8: no pixels", capsys)


def test_npz_nan_refused(tmp_path, capsys):
    images, labels = _good_arrays()
    f = images.astype(np.float64)
    f[3, 2, 2] = np.nan
    assert_refused(_npz(tmp_path, images=f, labels=labels), "'images' holds NaN or infinity", capsys)


def test_npz_mismatched_lengths_refused(tmp_path, capsys):
    images, labels = _good_arrays()
    assert_refused(_npz(tmp_path, "lab.npz", images=images, labels=labels[:7]),
                   "'labels' must have shape (8,) to match 'images'; it has (7,)", capsys)
    assert_refused(_npz(tmp_path, "names.npz", images=images, labels=labels, names=np.array(["a", "b"])),
                   "'names' must have shape (8,) to match 'images'; it has (2,)", capsys)


def test_npz_object_arrays_never_unpickled(tmp_path, capsys):
    images, labels = _good_arrays()
    path = tmp_path / "obj.npz"
    np.savez(path, images=images, labels=np.array(list(labels), dtype=object))
    assert_refused(path, "not a readable .npz file (ValueError: Object arrays cannot be loaded", capsys)


def test_npz_missing_arrays_and_bad_zip_refused(tmp_path, capsys):
    images, _ = _good_arrays()
    assert_refused(_npz(tmp_path, "nolab.npz", images=images), "missing array(s) labels", capsys)
    (tmp_path / "junk.npz").write_bytes(b"PK\x03\x04 not really a zip")
    assert_refused(tmp_path / "junk.npz", "not a readable .npz file (BadZipFile", capsys)


def test_npz_header_declaring_more_than_it_holds_refused(tmp_path, capsys):
    # The .npy header says 10^6 patches of 64x64; the member holds a few bytes. Refused before
    # numpy allocates 4 GB for it.
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, {"descr": "|u1", "fortran_order": False, "shape": (10**6, 64, 64)})
    buf.write(b"\0" * 64)
    path = tmp_path / "liar.npz"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("images.npy", buf.getvalue())
        zf.writestr("labels.npy", buf.getvalue())
    assert_refused(path, "'images' declares 4096000000 bytes of data but holds", capsys)


def test_npz_bytes_labels_decoded_and_bad_text_refused(tmp_path, capsys):
    images, labels = _good_arrays()
    ds = load_dataset(_npz(tmp_path, "b.npz", images=images, labels=labels.astype("S")))
    assert ds.counts == {"blank": 4, "spot": 4}  # b"spot" is the class spot, not "b'spot'"
    assert_refused(_npz(tmp_path, "l1.npz", images=images, labels=np.array([b"caf\xe9", b"x"] * 4)),
                   "'labels' holds bytes that are not UTF-8 text", capsys)
    assert_refused(_npz(tmp_path, "sur.npz", images=images, labels=np.array(["\ud800", "x"] * 4)),
                   "'labels' holds text that cannot be written as UTF-8", capsys)
    assert_refused(_npz(tmp_path, "empty.npz", images=images, labels=np.array(["", "x"] * 4)),
                   "'labels' holds an empty class name", capsys)


# ---- the desktop application's model: a message, and the application goes on ------------------


def test_application_model_turns_every_refusal_into_a_message(base, tmp_path):
    from pixelfit.app.session import Session

    session = Session()
    messages = []
    session.subscribe("message", lambda text, error=False: messages.append((text, error)))
    assert session.open(base) is True
    good = session.dataset
    (tmp_path / "empty").mkdir()
    nan = tmp_path / "nan.npz"
    np.savez(nan, images=np.full((4, 8, 8), np.nan), labels=np.array(["a", "b"] * 2))
    (tmp_path / "junk.npz").write_bytes(b"PK\x03\x04 not a zip")
    for bad in (tmp_path / "empty", tmp_path / "missing", nan, tmp_path / "junk.npz"):
        messages.clear()
        assert session.open(bad) is False
        assert len(messages) == 1 and messages[0][1] is True and "\n" not in messages[0][0]
        assert session.dataset is good  # the patches already open stay open
    (base / "spot" / "zero.png").write_bytes(b"")
    messages.clear()
    assert session.open(base) is True
    assert messages[-1] == (f"opened {base.name}: {2 * N_GOOD} patches of 8x8; skipped 1 file(s)", False)
