import numpy as np
import pytest
from PIL import Image

from pixelfit.data import choose_positive, load_dataset, read_patch
from pixelfit.errors import DatasetError


def test_class_folders(class_folder, patches):
    ds = load_dataset(class_folder)
    imgs, labels = patches
    assert ds.layout == "class-folders"
    assert ds.shape == (8, 8)
    assert ds.counts == {"blank": int((labels == "blank").sum()), "spot": int((labels == "spot").sum())}
    assert ds.skipped == []
    # every patch arrives unchanged
    i = ds.names.index("spot/p0000.png")
    assert np.array_equal(ds.images[i], imgs[0])


def test_class_folders_recursive_and_skips(class_folder):
    sub = class_folder / "spot" / "deeper"
    sub.mkdir()
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(sub / "x.png")
    (class_folder / "spot" / "bad.png").write_bytes(b"not a png")
    (class_folder / "spot" / "readme.txt").write_text("hello")
    (class_folder / "blank" / ".hidden.png").write_bytes(b"")
    Image.fromarray(np.zeros((9, 9), np.uint8)).save(class_folder / "blank" / "odd.png")
    ds = load_dataset(class_folder)
    assert "spot/deeper/x.png" in ds.names
    reasons = {s.path: s.reason for s in ds.skipped}
    assert "not an image" in reasons["spot/bad.png"]
    assert "not an image file type" in reasons["spot/readme.txt"]
    assert reasons["blank/.hidden.png"] == "hidden file"
    assert "9x9" in reasons["blank/odd.png"]


def test_labels_csv(labels_folder, patches):
    ds = load_dataset(labels_folder)
    assert ds.layout == "labels-csv"
    assert len(ds) == len(patches[1])
    assert ds.names[0] == "img/q0000.png"


def test_presplit_keeps_given_split(presplit_folder):
    ds = load_dataset(presplit_folder)
    assert ds.layout == "pre-split"
    assert (ds.subset == "train").sum() == 90
    assert (ds.subset == "test").sum() == 30
    assert all(n.startswith(("train/", "test/")) for n in ds.names)


def test_npz(npz_file, patches):
    ds = load_dataset(npz_file)
    assert ds.layout == "npz"
    assert np.array_equal(ds.images, patches[0])
    assert ds.names[:2] == ["#0", "#1"]


def test_npz_wrong_dims(tmp_path):
    p = tmp_path / "bad.npz"
    np.savez(p, images=np.zeros((4, 8), np.uint8), labels=np.array(["a", "b", "a", "b"]))
    with pytest.raises(DatasetError, match="3 dimensions"):
        load_dataset(p)


def test_gray_conversions(tmp_path):
    rgb = np.zeros((4, 4, 3), np.uint8)
    rgb[..., 0] = 255
    Image.fromarray(rgb, "RGB").save(tmp_path / "rgb.png")
    # ITU-R 601-2 luma of pure red: 255 * 299/1000 = 76.2 -> 76 (Pillow's "L" conversion documentation)
    assert read_patch(tmp_path / "rgb.png")[0, 0] == 76
    Image.fromarray(np.full((4, 4), 65535, np.uint16)).save(tmp_path / "deep.png")
    assert read_patch(tmp_path / "deep.png")[0, 0] == 255


def test_large_patch_refused(tmp_path):
    Image.fromarray(np.zeros((65, 65), np.uint8)).save(tmp_path / "big.png")
    with pytest.raises(ValueError, match="at most 64x64"):
        read_patch(tmp_path / "big.png")


def test_missing_and_one_class(tmp_path):
    with pytest.raises(DatasetError, match="no such"):
        load_dataset(tmp_path / "nope")
    (tmp_path / "only" / "a").mkdir(parents=True)
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(tmp_path / "only" / "a" / "x.png")
    with pytest.raises(DatasetError, match="only one class"):
        load_dataset(tmp_path / "only")


def test_choose_positive():
    assert choose_positive({"a": 5, "b": 3}) == ("b", "a")
    assert choose_positive({"a": 3, "b": 3}) == ("a", "b")  # tie: alphabetical
    assert choose_positive({"a": 5, "b": 3, "c": 9}, "a") == ("a", "not-a")
    with pytest.raises(DatasetError):
        choose_positive({"a": 1, "b": 2}, "zzz")
