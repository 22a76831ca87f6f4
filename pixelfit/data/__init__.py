"""Import, binarize and split: numpy and Pillow only."""

from pixelfit.data._binarize import METHODS, Binarizer, grey_histogram, otsu_threshold
from pixelfit.data._import import (
    MAX_SIDE,
    Dataset,
    Skipped,
    binary_target,
    choose_positive,
    load_dataset,
    load_for_apply,
    read_patch,
)
from pixelfit.data._paths import resolve_dataset_path
from pixelfit.data._perturb import SHIFTS, grey_perturbations, shift_name, shift_patches, stuck_pixel, with_shifts
from pixelfit.data._split import fingerprint, raw_fingerprint, stratified_split

__all__ = [
    "METHODS", "Binarizer", "grey_histogram", "otsu_threshold", "MAX_SIDE", "Dataset", "Skipped", "binary_target",
    "choose_positive", "load_dataset", "load_for_apply", "read_patch", "resolve_dataset_path", "fingerprint", "raw_fingerprint",
    "stratified_split", "SHIFTS", "grey_perturbations", "shift_name", "shift_patches", "stuck_pixel", "with_shifts",
]
