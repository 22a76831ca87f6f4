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
import stat
import struct
import unicodedata
import warnings
import zipfile
import zlib
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
#: Pillow decoders tried, whatever the file is called: the formats of IMAGE_SUFFIXES and no others,
#: so a renamed file of another kind (EPS, which Pillow hands to Ghostscript, for one) is never decoded.
READ_FORMATS = ("PNG", "BMP", "TIFF", "PPM", "JPEG")
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
    Only the formats in :data:`READ_FORMATS` are decoded.

    Raises
    ------
    ValueError
        With a one-line reason when the file is not a usable patch; nothing else escapes for any
        file content.
    """
    path = Path(path)
    try:
        st = path.stat()
    except OSError as exc:
        raise ValueError(f"cannot read: {exc.strerror or exc}") from None
    if not stat.S_ISREG(st.st_mode):
        # A named pipe would block the open forever; a device has no image in it.
        raise ValueError("not a regular file")
    if st.st_size == 0:
        raise ValueError("empty file (0 bytes)")
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise ValueError(f"cannot read: {exc.strerror or exc}") from None
    with fh:
        im = _decode(fh)
    return _to_gray8(im)


class _Refused(Exception):
    """A refusal of ours raised inside the decoding block, kept apart from the decoder's errors."""


def _one_line(text: object, limit: int = 200) -> str:
    line = " ".join(str(text).split())
    return line if len(line) <= limit else line[: limit - 3] + "..."


def _decode(fh) -> Image.Image:
    """Open and decode one image with Pillow; every decoder failure becomes a ValueError."""
    try:
        with warnings.catch_warnings():
            # Pillow warns (rather than refuses) between 1x and 2x its pixel limit; refuse those too.
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            # Decoder chatter about damaged metadata (EXIF, TIFF tags) would reach the user as stray
            # warning lines; the file is either read or refused with its reason anyway.
            warnings.simplefilter("ignore", UserWarning)
            im = Image.open(fh, formats=READ_FORMATS)
            # The header is read lazily: refuse big images before decoding a single pixel,
            # which also defuses decompression bombs that declare a huge size.
            w, h = im.size
            if w > MAX_SIDE or h > MAX_SIDE:
                raise _Refused(f"patch is {h}x{w}; pixelfit takes patches of at most {MAX_SIDE}x{MAX_SIDE}")
            if w < 1 or h < 1:
                raise _Refused(f"image is {h}x{w}: no pixels")
            im.load()
            return im
    except _Refused as exc:
        raise ValueError(str(exc)) from None
    except UnidentifiedImageError:
        raise ValueError(f"not an image Pillow can read as {', '.join(READ_FORMATS)}") from None
    except (Image.DecompressionBombError, Image.DecompressionBombWarning):
        raise ValueError("refused: declares an implausibly large image") from None
    except Exception as exc:  # noqa: BLE001
        # Pillow's plugins report bad data with many types (OSError, SyntaxError, struct.error,
        # NotImplementedError, ValueError, ...); for a file's content each one means the same.
        raise ValueError(f"corrupt or truncated image ({type(exc).__name__}: {_one_line(exc)})") from None


def _to_gray8(im: Image.Image) -> np.ndarray:
    try:
        return _gray8_of(im)
    except _Refused as exc:
        raise ValueError(str(exc)) from None
    except (ValueError, TypeError, OSError) as exc:
        # Pillow cannot convert some modes (LAB, for one) to grayscale.
        raise ValueError(f"image mode {im.mode} cannot be turned to grayscale ({_one_line(exc)})") from None


def _gray8_of(im: Image.Image) -> np.ndarray:
    mode = im.mode
    if mode in ("I;16", "I;16B", "I;16L", "I;16N", "I"):
        arr = np.asarray(im, dtype=np.float64)
        top = 65535.0 if mode.startswith("I;16") or arr.max(initial=0) > 255 else 255.0
        if arr.min(initial=0) < 0 or arr.max(initial=0) > 65535:
            raise _Refused(f"integer image values outside 0..65535 (mode {mode})")
        return np.rint(arr * (255.0 / top)).astype(np.uint8)
    if mode == "F":
        arr = np.asarray(im, dtype=np.float64)
        if not np.isfinite(arr).all():
            raise _Refused("float image holds NaN or infinity")
        lo, hi = float(arr.min()), float(arr.max())
        if lo >= 0 and hi <= 1:
            return np.rint(arr * 255.0).astype(np.uint8)
        if lo >= 0 and hi <= 255:
            return np.rint(arr).astype(np.uint8)
        raise _Refused(f"float image values {lo:g}..{hi:g} are outside [0, 1] and [0, 255]")
    if mode in ("RGBA", "LA", "PA", "RGBa", "La"):
        im = im.convert("RGB") if mode != "LA" else im.getchannel(0)
    elif mode == "P":
        im = im.convert("RGB")
    if im.mode != "L":
        im = im.convert("L")
    return np.asarray(im, dtype=np.uint8).copy()


def _is_hidden(rel: Path) -> bool:
    return any(part.startswith(".") for part in rel.parts)


def _is_text(name: str) -> bool:
    """False for a file name that is not valid UTF-8 (os functions hand those over with surrogates)."""
    try:
        name.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _has_control(text: str) -> bool:
    """True when the text holds a control character (a NUL, a line break...), unfit for a class name."""
    return any(unicodedata.category(ch) == "Cc" for ch in text)


def _printable(name: str) -> str:
    """The name with undecodable bytes shown as ``\\xNN``, safe to print and to write as UTF-8."""
    if _is_text(name):
        return name
    return name.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def _walk_files(folder: Path, col: _Collector) -> tuple[list[Path], list[Path]]:
    """Files below ``folder``, sorted, and the symbolic links to folders met on the way.

    Linked folders are not followed (a link can make a loop); hidden folders are listed once as
    skipped and not entered; a folder that cannot be listed is listed as skipped with the reason.
    """
    found: list[Path] = []
    linked: list[Path] = []

    def unreadable(err: OSError) -> None:
        col.skip(Path(err.filename), f"folder cannot be read ({err.strerror or err})")

    for dirpath, dirnames, filenames in os.walk(folder, followlinks=False, onerror=unreadable):
        here = Path(dirpath)
        keep = []
        for name in sorted(dirnames):
            if (here / name).is_symlink():
                linked.append(here / name)
            elif name.startswith("."):
                col.skip(here / name, "hidden folder")
            else:
                keep.append(name)
        dirnames[:] = keep
        found.extend(here / name for name in sorted(filenames))
    return found, linked


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
        self.skipped.append(Skipped(_printable(path if isinstance(path, str) else self.rel(path)), reason))

    def add_file(self, path: Path, label: str) -> None:
        rel = self.rel(path)
        if _is_hidden(Path(rel)):
            self.skip(rel, "hidden file")
            return
        if not _is_text(rel):
            self.skip(rel, "name is not valid UTF-8 text; rename the file")
            return
        if path.is_symlink() and not path.exists():
            self.skip(rel, "symbolic link whose target cannot be reached (missing, or a loop)")
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

    def finish(self, shape: tuple[int, int] | None = None) -> tuple[np.ndarray, np.ndarray, list[str]]:
        """Stack the patches of ``shape`` (default: the most common); list the others as skipped."""
        if not self.images:
            h, w = shape or (0, 0)
            return np.zeros((0, h, w), np.uint8), np.array([], dtype=str), []
        expected = shape is not None
        if shape is None:
            shapes = Counter(a.shape for a in self.images)
            # The most common shape wins; ties go to the shape seen first.
            first_seen = {s: i for i, s in reversed(list(enumerate(a.shape for a in self.images)))}
            shape = max(shapes, key=lambda s: (shapes[s], -first_seen[s]))
        keep = [i for i, a in enumerate(self.images) if a.shape == shape]
        for i, a in enumerate(self.images):
            if a.shape != shape:
                other = "expected" if expected else "the others are"
                self.skip(self.names[i], f"patch is {a.shape[0]}x{a.shape[1]}, {other} {shape[0]}x{shape[1]}")
        images = np.stack([self.images[i] for i in keep]).astype(np.uint8)
        labels = np.array([self.labels[i] for i in keep], dtype=str)
        names = [self.names[i] for i in keep]
        return images, labels, names


def _list_folder(folder: Path) -> list[Path]:
    try:
        return sorted(folder.iterdir(), key=lambda p: p.name)
    except OSError as exc:
        raise DatasetError(f"{_printable(str(folder))}: folder cannot be read ({exc.strerror or exc})") from None


def _collect_class_folders(folder: Path, col: _Collector) -> None:
    for entry in _list_folder(folder):
        if entry.name.startswith("."):
            col.skip(entry, "hidden")
            continue
        if entry.is_dir() and not entry.is_symlink():
            if not _is_text(entry.name):
                col.skip(entry, "class folder name is not valid UTF-8 text; rename the folder")
                continue
            before = len(col.images)
            before_skipped = len(col.skipped)
            files, linked = _walk_files(entry, col)
            for path in files:
                col.add_file(path, entry.name)
            for path in linked:
                col.skip(path, "symbolic link to a folder (not followed)")
            if len(col.images) == before and len(col.skipped) == before_skipped:
                col.skip(entry, "class folder holds no files")
            elif len(col.images) == before:
                col.skip(entry, f"class {_printable(entry.name)!r} dropped: none of its "
                                f"{len(col.skipped) - before_skipped} entries is a readable patch")
        elif entry.is_dir():
            col.skip(entry, "symbolic link to a folder (not followed)")
        elif entry.is_symlink() and not entry.exists():
            col.skip(entry, "symbolic link whose target cannot be reached (missing, or a loop)")
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
    try:
        rows = list(reader)
    except csv.Error as exc:
        raise DatasetError(f"{csv_path}: not valid CSV at line {reader.line_num} ({exc})") from None
    header = rows[0] if rows else None
    if header is None or [h.strip().lower() for h in header[:2]] != ["path", "label"]:
        raise DatasetError(f"{csv_path}: the first row must be the header 'path,label'")
    listed: dict[str, str] = {}
    for lineno, row in enumerate(rows[1:], start=2):
        where = f"{LABELS_CSV}:{lineno}"
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) < 2 or not row[0].strip() or not row[1].strip():
            col.skip(where, "row needs both a path and a label")
            continue
        # Backslashes: a list written on Windows names the same files.
        rel, label = row[0].strip().replace("\\", "/"), row[1].strip()
        key = Path(rel).as_posix()
        if Path(rel).is_absolute() or ".." in Path(rel).parts:
            col.skip(where, f"{key}: paths in labels.csv must stay inside the folder")
            continue
        if key in listed:
            if listed[key] == label:
                col.skip(where, f"duplicate row for {key}")
            else:
                col.skip(where, f"{key} listed again with another label ({label}); "
                                f"the first row's label ({listed[key]}) is used")
            continue
        listed[key] = label
        if _has_control(label):
            col.skip(where, "label holds control characters")
            continue
        path = folder / rel
        if not path.is_file():
            col.skip(key, "listed in labels.csv but no such file")
            continue
        col.add_file(path, label)
    files, linked = _walk_files(folder, col)
    for path in files:
        rel = col.rel(path)
        if rel == LABELS_CSV or rel in listed:
            continue
        if _is_hidden(Path(rel)):
            col.skip(rel, "hidden file")
        else:
            col.skip(rel, "not listed in labels.csv")
    for path in linked:
        rel = col.rel(path)
        if not any(key.startswith(rel + "/") for key in listed):
            col.skip(rel, "symbolic link to a folder (not followed)")


def _collect_folder(folder: Path, col: _Collector) -> str:
    if (folder / LABELS_CSV).is_file():
        _collect_labels_csv(folder, col)
        return "labels-csv"
    _collect_class_folders(folder, col)
    return "class-folders"


#: What reading an .npz member can raise on bad content: zip damage, deflate damage, npy header
#: damage, object arrays (pickles, refused by ``allow_pickle=False``), unsupported zip features.
_NPZ_ERRORS = (OSError, ValueError, EOFError, KeyError, RuntimeError, NotImplementedError, MemoryError,
               zipfile.BadZipFile, zlib.error, struct.error)


def _check_npz_members(path: Path, zf: zipfile.ZipFile) -> None:
    """Refuse sizes before numpy allocates them: the zip's and each .npy header's own."""
    infos = zf.infolist()
    total = sum(i.file_size for i in infos)
    if total > MAX_NPZ_BYTES:
        raise DatasetError(f"{path}: arrays would take {total / 1e9:.1f} GB; the limit is {MAX_NPZ_BYTES / 1e9:.0f} GB")
    for info in infos:
        if info.filename not in ("images.npy", "labels.npy", "names.npy"):
            continue
        with zf.open(info) as fh:
            version = np.lib.format.read_magic(fh)
            if version == (1, 0):
                shape, _, dtype = np.lib.format.read_array_header_1_0(fh)
            else:
                shape, _, dtype = np.lib.format.read_array_header_2_0(fh)
        # numpy allocates the declared shape before reading the data, so a header that declares
        # more than the member holds is refused here.
        declared = int(np.prod(shape, dtype=object)) * dtype.itemsize
        if declared > info.file_size:
            raise DatasetError(f"{path}: '{info.filename[:-4]}' declares {declared} bytes of data but holds "
                               f"{info.file_size}; the file is damaged or truncated")


def _text_values(path: Path, what: str, arr: np.ndarray) -> list[str]:
    """Class names or patch names as str; bytes must be UTF-8 and every value printable text."""
    if arr.dtype.kind == "S":
        try:
            values = [v.decode("utf-8") for v in arr.tolist()]
        except UnicodeDecodeError:
            raise DatasetError(f"{path}: '{what}' holds bytes that are not UTF-8 text") from None
    else:
        values = [str(v) for v in arr.tolist()]
    if not all(_is_text(v) for v in values):
        raise DatasetError(f"{path}: '{what}' holds text that cannot be written as UTF-8 (lone surrogates)")
    return values


def load_npz(path: Path, require_labels: bool = True) -> Dataset:
    """Load an ``.npz`` file; see the module docstring for the arrays it must hold.

    With ``require_labels=False`` a file without ``labels`` loads with empty labels.

    Raises
    ------
    DatasetError
        For anything that is not such a file; object arrays are refused (never unpickled).
    """
    try:
        with zipfile.ZipFile(path) as zf:
            _check_npz_members(path, zf)
        with np.load(path, allow_pickle=False) as npz:
            members = set(npz.files)
            missing = ({"images", "labels"} if require_labels else {"images"}) - members
            if missing:
                raise DatasetError(f"{path}: missing array(s) {', '.join(sorted(missing))}; found "
                                   f"{_one_line(', '.join(sorted(members))) or 'none'}")
            images = npz["images"]
            labels = npz["labels"] if "labels" in members else None
            names = npz["names"] if "names" in members else None
    except DatasetError:
        raise
    except _NPZ_ERRORS as exc:
        raise DatasetError(f"{path}: not a readable .npz file ({type(exc).__name__}: {_one_line(exc)})") from None
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
    if h < 1 or w < 1:
        raise DatasetError(f"{path}: patches are {h}x{w}: no pixels")
    if labels is None:  # allowed only with require_labels=False
        label_list = [""] * n
    else:
        if labels.ndim != 1 or labels.shape[0] != n:
            raise DatasetError(f"{path}: 'labels' must have shape ({n},) to match 'images'; it has {labels.shape}")
        if labels.dtype.kind not in "USiub":
            raise DatasetError(f"{path}: 'labels' must be strings or integers; it is {labels.dtype}")
        label_list = _text_values(path, "labels", labels)
        if any(not v.strip() for v in label_list):
            raise DatasetError(f"{path}: 'labels' holds an empty class name")
        if any(_has_control(v) for v in label_list):
            raise DatasetError(f"{path}: 'labels' holds a class name with control characters")
    if names is not None:
        if names.ndim != 1 or names.shape[0] != n:
            raise DatasetError(f"{path}: 'names' must have shape ({n},) to match 'images'; it has {names.shape}")
        if names.dtype.kind not in "USiu":
            raise DatasetError(f"{path}: 'names' must be strings or integers; it is {names.dtype}")
        name_list = _text_values(path, "names", names)
    else:
        name_list = [f"#{i}" for i in range(n)]
    return Dataset(
        images=np.ascontiguousarray(images),
        labels=np.array(label_list, dtype=str),
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
    n_skip = len(ds.skipped)
    # A dropped class says most about a missing class; otherwise the first entry will do.
    first = next((s for s in ds.skipped if " dropped: " in s.reason), ds.skipped[0]) if n_skip else None
    detail = f"; {n_skip} file(s) skipped, first: {first.path}: {first.reason}" if first else ""
    if len(ds) == 0:
        raise DatasetError(f"{ds.source}: no readable patches found{detail}")
    classes = ds.counts
    if len(classes) < 2:
        only = next(iter(classes))
        raise DatasetError(f"{ds.source}: only one class ({only!r}, {classes[only]} patches); a detector needs "
                           f"at least two{detail}")
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
            raise DatasetError(f"the class to detect, {positive!r}, is not a class here; classes are: {', '.join(counts)}",
                               field="positive")
    else:
        positive = min(counts, key=lambda c: (counts[c], c))
    others = [c for c in counts if c != positive]
    negative = others[0] if len(others) == 1 else f"not-{positive}"
    return positive, negative


def binary_target(ds: Dataset, positive: str) -> np.ndarray:
    """Boolean target of shape (n_patches,): True where the patch is of the positive class."""
    return ds.labels == positive


def load_for_apply(path: str | os.PathLike, shape: tuple[int, int]) -> Dataset:
    """Patches to apply a rule to: any layout, labels where the layout gives them ('' otherwise).

    Files directly in the folder (or a single image file) are unlabeled; files below a first-level
    sub-folder take its name as label (below ``train/``/``test/``, the name one level further down);
    ``labels.csv`` labels the files it lists. Patches of another shape than ``shape`` are skipped
    with the reason.
    """
    root = Path(path)
    if not root.exists():
        raise DatasetError(f"{root}: no such file or folder")
    if root.is_file() and root.suffix.lower() == ".npz":
        ds = load_npz(root, require_labels=False)
        if ds.shape != tuple(shape):
            raise DatasetError(f"{root}: patches are {ds.shape[0]}x{ds.shape[1]}, the rule reads {shape[0]}x{shape[1]}")
        return ds
    col = _Collector(root.parent if root.is_file() else root)
    if root.is_file():
        col.add_file(root, "")
    elif (root / LABELS_CSV).is_file():
        _collect_labels_csv(root, col)
    else:
        files, linked = _walk_files(root, col)
        for path in linked:
            col.skip(path, "symbolic link to a folder (not followed)")
        for file in files:
            parts = file.relative_to(root).parts
            if len(parts) <= 2 and parts[-1].lower() in README_NAMES:
                continue  # a README beside the patches or the class folders is documentation
            if len(parts) > 2 and parts[0] in ("train", "test"):
                label = parts[1]
            elif len(parts) > 1:
                label = parts[0]
            else:
                label = ""
            col.add_file(file, label)
    images, labels, names = col.finish((int(shape[0]), int(shape[1])))
    ds = Dataset(images=images, labels=labels, names=names, source=str(root), layout="apply", skipped=col.skipped)
    if len(ds) == 0:
        first = f"; first skipped: {ds.skipped[0].path}: {ds.skipped[0].reason}" if ds.skipped else ""
        raise DatasetError(f"{root}: no patch the rule can read{first}")
    return ds
