"""Shared fixtures: a fixed seed and small generated patch folders in every layout."""
from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # Qt tests run without a display

SEED = 20261201


@pytest.fixture
def rng():
    return np.random.default_rng(SEED)


def make_patches(rng, n: int = 120, shape=(8, 8), positive_share: float = 1 / 3):
    """Dark noisy patches; positives carry a bright 2x2 spot near the centre."""
    imgs = (rng.random((n,) + shape) * 110).astype(np.uint8)
    labels = np.where(rng.random(n) < positive_share, "spot", "blank")
    labels[:2] = ["spot", "blank"]  # both classes always present
    r, c = shape[0] // 2 - 1, shape[1] // 2 - 1
    for i in np.flatnonzero(labels == "spot"):
        imgs[i, r : r + 2, c : c + 2] = 200 + rng.integers(0, 55)
    return imgs, labels


def two_rule_patches(seed: int, n: int, positive: str, negative: str):
    """6x6 grey patches (uint8) whose class is a two-pixel rule of their bits at 128, with 5 % of the
    labels flipped; returns (images, labels)."""
    r = np.random.default_rng(seed)
    imgs = (r.random((n, 6, 6)) * 255).astype(np.uint8)
    b = imgs > 127
    noisy = r.random(n) < 0.05
    lab = np.where(((b[:, 2, 3] & b[:, 4, 4]) | (b[:, 1, 1] & ~b[:, 2, 3])) ^ noisy, positive, negative)
    return imgs, lab


def write_class_folders(root: Path, imgs, labels) -> Path:
    for i, (img, lab) in enumerate(zip(imgs, labels)):
        d = root / lab
        d.mkdir(parents=True, exist_ok=True)
        Image.fromarray(img).save(d / f"p{i:04d}.png")
    return root


def write_labels_csv(root: Path, imgs, labels) -> Path:
    (root / "img").mkdir(parents=True, exist_ok=True)
    with open(root / "labels.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["path", "label"])
        for i, (img, lab) in enumerate(zip(imgs, labels)):
            Image.fromarray(img).save(root / "img" / f"q{i:04d}.png")
            w.writerow([f"img/q{i:04d}.png", lab])
    return root


@pytest.fixture
def patches(rng):
    return make_patches(rng)


@pytest.fixture
def class_folder(tmp_path, patches):
    return write_class_folders(tmp_path / "classes", *patches)


@pytest.fixture
def labels_folder(tmp_path, patches):
    return write_labels_csv(tmp_path / "listed", *patches)


@pytest.fixture
def presplit_folder(tmp_path, patches):
    imgs, labels = patches
    root = tmp_path / "presplit"
    write_class_folders(root / "train", imgs[:90], labels[:90])
    write_labels_csv(root / "test", imgs[90:], labels[90:])
    return root


@pytest.fixture
def npz_file(tmp_path, patches):
    imgs, labels = patches
    path = tmp_path / "patches.npz"
    np.savez(path, images=imgs, labels=labels)
    return path
