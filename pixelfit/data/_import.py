"""Import labeled grayscale patches from one path, reporting everything that was skipped.

Four layouts are recognised, in this order:

``npz``
    a ``.npz`` file with ``images`` (n, h, w) uint8, ``labels`` (n,) and optional ``names`` (n,).
``pre-split``
    a folder with ``train/`` and ``test/`` sub-folders, each laid out as one of the next two.
``labels-csv``
    a folder with ``labels.csv`` (columns ``path,label``; paths relative to the folder).
``class-folders``
    a folder with one sub-folder per class; files are found recursively below each.

Nothing unreadable stops an import: each such file is listed in :attr:`Dataset.skipped` with the
reason. Only when nothing usable remains is :class:`~pixelfit.errors.DatasetError` raised.
A README (``README``, ``README.md``, ``README.txt``) beside the class folders or beside
``train/`` and ``test/`` describes the data: it is neither imported nor listed as skipped.
"""

from __future__ import annotations

import csv
import io
import os
import zipfile
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image, UnidentifiedImageError

from pixelfit.errors import DatasetError

#: Largest patch side accepted: pixelfit is a tool for small patches.
MAX_SIDE = 64
#: File name endings read as images.
IMAGE_SUFFIXES = frozenset({".png", ".bmp", ".tif", ".tiff", ".pgm", ".pbm", ".ppm", ".jpg", ".jpeg"})
LABELS_CSV = "labels.csv"
#: Names (compared in lower case) of a folder's description, which is not a patch.
README_NAMES = frozenset({"readme", "readme.md", "readme.txt"})
#: Refuse .npz members bigger than this many bytes once decompressed (a zip bomb guard).
MAX_NPZ_BYTES = 4 * 1024**3


@dataclass(frozen=True)
class Skipped:
    """One file that was not imported, and why."""

    path: str
    reason: str


@dataclass
class Dataset:
    """Labeled grayscale patches as imported.

    Attributes
    ----------
    images : ndarray of shape (n_patches, height, width), uint8
    labels : ndarray of shape (n_patches,), str
        Class name of each patch.
    names : list of str
        Path of each patch relative to the imported folder, or ``#i`` for an unnamed .npz row.
    source : str
        The path that was imported.
    layout : str
        One of ``class-folders``, ``labels-csv``, ``pre-split``, ``npz``.
    subset : ndarray of shape (n_patches,), str, or None
        ``train``/``test`` for a pre-split folder; None when the split is pixelfit's to make.
    skipped : list of Skipped
    """

    images: np.ndarray
    labels: np.ndarray
    names: list[str]
    source: str
    layout: str
    subset: np.ndarray | None = None
    skipped: list[Skipped] = field(default_factory=list)

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.images.shape[1]), int(self.images.shape[2]))

    @property
    def counts(self) -> dict[str, int]:
        return dict(sorted(Counter(self.labels.tolist()).items()))

    def __len__(self) -> int:
        return int(self.images.shape[0])


def read_patch(path: str | os.PathLike) -> np.ndarray:
    """Read one image file as a 2-D uint8 grayscale array.

    Colour is turned to luma by Pillow's ``L`` conversion (ITU-R 601-2 weights), alpha is dropped,
    16-bit images are scaled to 8 bits, float images in [0, 1] or [0, 255] are scaled likewise.

    Raises
    ------
    ValueError
        With a one-line reason when the file is not a usable patch.
    """
    path = Path(path)
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise ValueError(f"cannot read: {exc.strerror or exc}") from None
    if size == 0:
        raise ValueError("empty file (0 bytes)")
    try:
        with Image.open(path) as im:
            # The header is read lazily: refuse big images before decoding a single pixel,
            # which also defuses decompression bombs that declare a huge size.
            w, h = im.size
            if w > MAX_SIDE or h > MAX_SIDE:
                raise ValueError(f"patch is {h}x{w}; pixelfit takes patches of at most {MAX_SIDE}x{MAX_SIDE}")
            if getattr(im, "n_frames", 1) > 1:
                im.seek(0)
            im.load()
            return _to_gray8(im)
    except ValueError:
        raise
    except UnidentifiedImageError:
        raise ValueError("not an image Pillow can read") from None
    except Image.DecompressionBombError:
        raise ValueError("refused: declares an implausibly large image") from None
    except (OSError, SyntaxError, EOFError, IndexError, KeyError, TypeError) as exc:
        # Pillow reports truncated and corrupt data with these.
        raise ValueError(f"corrupt or truncated image ({type(exc).__name__}: {exc})") from None


def _to_gray8(im: Image.Image) -> np.ndarray:
    mode = im.mode
    if mode in ("I;16", "I;16B", "I;16L", "I;16N", "I"):
        arr = np.asarray(im, dtype=np.float64)
        top = 65535.0 if mode.startswith("I;16") or arr.max(initial=0) > 255 else 255.0
        if arr.min(initial=0) < 0 or arr.max(initial=0) > 65535:
            raise ValueError(f"integer image values outside 0..65535 (mode {mode})")
        return np.rint(arr * (255.0 / top)).astype(np.uint8)
    if mode == "F":
        arr = np.asarray(im, dtype=np.float64)
        if not np.isfinite(arr).all():
            raise ValueError("float image holds NaN or infinity")
        lo, hi = float(arr.min(initial=0)), float(arr.max(initial=0))
        if lo >= 0 and hi <= 1:
            return np.rint(arr * 255.0).astype(np.uint8)
        if lo >= 0 and hi <= 255:
            return np.rint(arr).astype(np.uint8)
        raise ValueError(f"float image values {lo:g}..{hi:g} are outside [0, 1] and [0, 255]")
    if mode in ("RGBA", "LA", "PA", "RGBa", "La"):
        im = im.convert("RGB") if mode != "LA" else im.getchannel(0)
    elif mode == "P":
        im = im.convert("RGB")
    if im.mode != "L":
        im = im.convert("L")
    return np.asarray(im, dtype=np.uint8).copy()


def _is_hidden(rel: Path) -> bool:
    return any(part.startswith(".") for part in rel.parts)


def _walk_files(folder: Path) -> list[Path]:
    """All files below ``folder``, sorted; symlinked folders are not followed (no loops)."""
    found: list[Path] = []
    for dirpath, dirnames, filenames in os.walk(folder, followlinks=False, onerror=None):
        dirnames.sort()
        for name in sorted(filenames):
            found.append(Path(dirpath) / name)
    return found


class _Collector:
    """Reads files into patches, keeping the first shape seen and listing every refusal."""

    def __init__(self, root: Path):
        self.root = root
        self.images: list[np.ndarray] = []
        self.labels: list[str] = []
        self.names: list[str] = []
        self.skipped: list[Skipped] = []

    def rel(self, path: Path) -> str:
        try:
            return path.relative_to(self.root).as_posix()
        except ValueError:
            return path.as_posix()

    def skip(self, path: Path | str, reason: str) -> None:
        self.skipped.append(Skipped(path if isinstance(path, str) else self.rel(path), reason))

    def add_file(self, path: Path, label: str) -> None:
        rel = self.rel(path)
        if _is_hidden(Path(rel)):
            self.skip(rel, "hidden file")
            return
        if path.suffix.lower() not in IMAGE_SUFFIXES:
            self.skip(rel, f"not an image file type ({path.suffix or 'no extension'})")
            return
        try:
            arr = read_patch(path)
        except ValueError as exc:
            self.skip(rel, str(exc))
            return
        self.images.append(arr)
        self.labels.append(label)
        self.names.append(rel)

    def finish(self) -> tuple[np.ndarray, np.ndarray, list[str]]:
        """Stack the patches of the most common shape; list the others as skipped."""
        if not self.images:
            return np.zeros((0, 0, 0), np.uint8), np.array([], dtype=str), []
        shapes = Counter(a.shape for a in self.images)
        # The most common shape wins; ties go to the shape seen first.
        first_seen = {s: i for i, s in reversed(list(enumerate(a.shape for a in self.images)))}
        shape = max(shapes, key=lambda s: (shapes[s], -first_seen[s]))
        keep = [i for i, a in enumerate(self.images) if a.shape == shape]
        for i, a in enumerate(self.images):
            if a.shape != shape:
                self.skip(self.names[i], f"patch is {a.shape[0]}x{a.shape[1]}, the others are {shape[0]}x{shape[1]}")
        images = np.stack([self.images[i] for i in keep]).astype(np.uint8)
        labels = np.array([self.labels[i] for i in keep], dtype=str)
        names = [self.names[i] for i in keep]
        return images, labels, names


def _collect_class_folders(folder: Path, col: _Collector) -> None:
    entries = sorted(folder.iterdir(), key=lambda p: p.name)
    for entry in entries:
        if entry.name.startswith("."):
            col.skip(entry, "hidden")
            continue
        if entry.is_dir() and not entry.is_symlink():
            before = len(col.images)
            before_skipped = len(col.skipped)
            for path in _walk_files(entry):
                col.add_file(path, entry.name)
            if len(col.images) == before and len(col.skipped) == before_skipped:
                col.skip(entry, "class folder holds no files")
        elif entry.is_dir():
            col.skip(entry, "symbolic link to a folder (not followed)")
        elif entry.name != LABELS_CSV and entry.name.lower() not in README_NAMES:
            col.skip(entry, "file outside any class folder")


def _collect_labels_csv(folder: Path, col: _Collector) -> None:
    csv_path = folder / LABELS_CSV
    try:
        text = csv_path.read_text(encoding="utf-8-sig")  # -sig strips a BOM when present
    except UnicodeDecodeError:
        raise DatasetError(f"{csv_path}: not UTF-8 text") from None
    except OSError as exc:
        raise DatasetError(f"{csv_path}: cannot read ({exc.strerror or exc})") from None
    reader = csv.reader(io.StringIO(text))
    header = next(reader, None)
    if header is None or [h.strip().lower() for h in header[:2]] != ["path", "label"]:
        raise DatasetError(f"{csv_path}: the first row must be the header 'path,label'")
    listed: dict[str, str] = {}
    for lineno, row in enumerate(reader, start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) < 2 or not row[0].strip() or not row[1].strip():
            col.skip(f"{LABELS_CSV}:{lineno}", "row needs both a path and a label")
            continue
        rel, label = row[0].strip(), row[1].strip()
        key = Path(rel).as_posix()
        if key in listed:
            if listed[key] == label:
                col.skip(f"{LABELS_CSV}:{lineno}", f"duplicate row for {key}")
            else:
                col.skip(f"{LABELS_CSV}:{lineno}", f"{key} listed again with another label ({label})")
            continue
        listed[key] = label
        path = folder / rel
        if not path.is_file():
            col.skip(key, "listed in labels.csv but no such file")
            continue
        col.add_file(path, label)
    for path in _walk_files(folder):
        rel = col.rel(path)
        if rel == LABELS_CSV or rel in listed:
            continue
        if _is_hidden(Path(rel)):
            col.skip(rel, "hidden file")
        else:
            col.skip(rel, "not listed in labels.csv")


def _collect_folder(folder: Path, col: _Collector) -> str:
    if (folder / LABELS_CSV).is_file():
        _collect_labels_csv(folder, col)
        return "labels-csv"
    _collect_class_folders(folder, col)
    return "class-folders"


def load_npz(path: Path) -> Dataset:
    """Load an ``.npz`` file; see the module docstring for the arrays it must hold."""
    try:
        with zipfile.ZipFile(path) as zf:
            total = sum(i.file_size for i in zf.infolist())
        if total > MAX_NPZ_BYTES:
            raise DatasetError(f"{path}: arrays would take {total / 1e9:.1f} GB; the limit is {MAX_NPZ_BYTES / 1e9:.0f} GB")
        with np.load(path, allow_pickle=False) as npz:
            members = set(npz.files)
            missing = {"images", "labels"} - members
            if missing:
                raise DatasetError(f"{path}: missing array(s) {', '.join(sorted(missing))}; found {', '.join(sorted(members)) or 'none'}")
            images = npz["images"]
            labels = npz["labels"]
            names = npz["names"] if "names" in members else None
    except DatasetError:
        raise
    except (OSError, ValueError, zipfile.BadZipFile, EOFError, KeyError, RuntimeError) as exc:
        raise DatasetError(f"{path}: not a readable .npz file ({type(exc).__name__}: {exc})") from None
    if images.ndim != 3:
        raise DatasetError(f"{path}: 'images' must have 3 dimensions (n, height, width), it has {images.ndim}")
    if images.dtype != np.uint8:
        if images.dtype.kind in "fc" and not np.isfinite(images).all():
            raise DatasetError(f"{path}: 'images' holds NaN or infinity")
        if images.dtype.kind in "iuf" and images.size and (images.min() < 0 or images.max() > 255):
            raise DatasetError(f"{path}: 'images' must be uint8 (0..255); it is {images.dtype} with values outside 0..255")
        if images.dtype.kind not in "iuf" or (images.dtype.kind == "f" and not np.all(images == np.round(images))):
            raise DatasetError(f"{path}: 'images' must be uint8; it is {images.dtype}")
        images = images.astype(np.uint8)
    n, h, w = images.shape
    if h > MAX_SIDE or w > MAX_SIDE:
        raise DatasetError(f"{path}: patches are {h}x{w}; pixelfit takes patches of at most {MAX_SIDE}x{MAX_SIDE}")
    if labels.ndim != 1 or labels.shape[0] != n:
        raise DatasetError(f"{path}: 'labels' must have shape ({n},) to match 'images'; it has {labels.shape}")
    if labels.dtype.kind not in "USiub":
        raise DatasetError(f"{path}: 'labels' must be strings or integers; it is {labels.dtype}")
    if names is not None:
        if names.ndim != 1 or names.shape[0] != n:
            raise DatasetError(f"{path}: 'names' must have shape ({n},) to match 'images'; it has {names.shape}")
        name_list = [str(s) for s in names.tolist()]
    else:
        name_list = [f"#{i}" for i in range(n)]
    return Dataset(
        images=np.ascontiguousarray(images),
        labels=np.array([str(v) for v in labels.tolist()], dtype=str),
        names=name_list,
        source=str(path),
        layout="npz",
    )


def load_dataset(path: str | os.PathLike) -> Dataset:
    """Import every patch under ``path``.

    Parameters
    ----------
    path : str or path-like
        A folder in one of the supported layouts, or an ``.npz`` file.

    Returns
    -------
    Dataset

    Raises
    ------
    DatasetError
        When the path does not exist, cannot be read, or holds no usable patch of two classes.
    """
    root = Path(path)
    if not root.exists():
        raise DatasetError(f"{root}: no such file or folder")
    if root.is_file():
        if root.suffix.lower() == ".npz":
            ds = load_npz(root)
            _check_usable(ds)
            return ds
        raise DatasetError(f"{root}: a single file must be an .npz array file; give a folder of patches otherwise")
    if not os.access(root, os.R_OK | os.X_OK):
        raise DatasetError(f"{root}: folder cannot be read (permission denied)")
    try:
        sub = {p.name for p in root.iterdir()}
    except OSError as exc:
        raise DatasetError(f"{root}: folder cannot be read ({exc.strerror or exc})") from None
    col = _Collector(root)
    subset: np.ndarray | None = None
    if {"train", "test"} <= sub and (root / "train").is_dir() and (root / "test").is_dir():
        layout = "pre-split"
        parts: list[str] = []
        for part in ("train", "test"):
            sub_col = _Collector(root / part)
            _collect_folder(root / part, sub_col)
            for arr, lab, name in zip(sub_col.images, sub_col.labels, sub_col.names):
                col.images.append(arr)
                col.labels.append(lab)
                col.names.append(f"{part}/{name}")
                parts.append(part)
            col.skipped.extend(Skipped(f"{part}/{s.path}", s.reason) for s in sub_col.skipped)
        for name in sorted(sub - {"train", "test"}):
            if name.lower() not in README_NAMES:
                col.skip(name, "outside train/ and test/ in a pre-split folder")
        part_of = dict(zip(col.names, parts))
        images, labels, names = col.finish()
        subset = np.array([part_of[n] for n in names], dtype=str)
    else:
        layout = _collect_folder(root, col)
        images, labels, names = col.finish()
    ds = Dataset(images=images, labels=labels, names=names, source=str(root), layout=layout,
                 subset=subset, skipped=col.skipped)
    _check_usable(ds)
    return ds


def _check_usable(ds: Dataset) -> None:
    if len(ds) == 0:
        n_skip = len(ds.skipped)
        detail = f"; {n_skip} file(s) skipped, first: {ds.skipped[0].path}: {ds.skipped[0].reason}" if n_skip else ""
        raise DatasetError(f"{ds.source}: no readable patches found{detail}")
    classes = ds.counts
    if len(classes) < 2:
        only = next(iter(classes))
        raise DatasetError(f"{ds.source}: only one class ({only!r}, {classes[only]} patches); a detector needs at least two")
    if ds.subset is not None:
        for part in ("train", "test"):
            if not np.any(ds.subset == part):
                raise DatasetError(f"{ds.source}: pre-split folder has no readable patches in {part}/")


def choose_positive(counts: dict[str, int], positive: str | None = None) -> tuple[str, str]:
    """Pick the class to detect and name the negative class.

    The default positive class is the less frequent one, ties broken alphabetically. With more
    than two classes the others are pooled as the negative class ``not-<positive>``.
    """
    if positive is not None:
        if positive not in counts:
            raise DatasetError(f"--positive {positive!r} is not a class here; classes are: {', '.join(counts)}")
    else:
        positive = min(counts, key=lambda c: (counts[c], c))
    others = [c for c in counts if c != positive]
    negative = others[0] if len(others) == 1 else f"not-{positive}"
    return positive, negative


def binary_target(ds: Dataset, positive: str) -> np.ndarray:
    """Boolean target of shape (n_patches,): True where the patch is of the positive class."""
    return ds.labels == positive
