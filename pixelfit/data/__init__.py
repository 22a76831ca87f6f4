"""Import, binarize and split: numpy and Pillow only."""

from pixelfit.data._binarize import METHODS, Binarizer, grey_histogram, otsu_threshold
from pixelfit.data._check import (
    CHECK_KEYS,
    FINDINGS,
    DataCheck,
    Groups,
    check_csv_rows,
    check_data,
    distinct_count,
    grey_groups,
    pack_binarized,
)
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
from pixelfit.data._perturb import SHIFTS, grey_perturbations, shift_name, shift_patches, stuck_pixel, with_shifts
from pixelfit.data._split import SPLIT_METHODS, check_seed, fingerprint, grouped_split, raw_fingerprint, stratified_split

__all__ = [
    "METHODS", "Binarizer", "grey_histogram", "otsu_threshold", "MAX_SIDE", "Dataset", "Skipped", "binary_target",
    "choose_positive", "load_dataset", "load_for_apply", "read_patch", "fingerprint", "raw_fingerprint",
    "stratified_split", "SPLIT_METHODS", "grouped_split", "CHECK_KEYS", "FINDINGS", "DataCheck", "Groups",
    "check_csv_rows", "check_data", "distinct_count", "grey_groups", "pack_binarized", "check_seed",
    "SHIFTS", "grey_perturbations", "shift_name", "shift_patches", "stuck_pixel", "with_shifts",
]
