"""Models of the ladder: pixelfit's own rules and the scikit-learn families, by size."""

from pixelfit.models._families import (
    FAMILIES,
    FAMILY_ORDER,
    Family,
    SparseLogistic,
    native_importance,
    parse_families,
    parse_size_overrides,
    pixel_mutual_information,
    pixels_used,
    plan_rungs,
    size_figures,
)
from pixelfit.models._rules import BEAM_MARK, BEAM_NOTE, ConstantRule, LutRule, MemorizeRule, is_beam
from pixelfit.models._sizes import log2_comb, log2_lut_class, log2_memorize_class, log2_tree_class
from pixelfit.models.lut_engine import SearchCancelled

__all__ = [
    "FAMILIES", "FAMILY_ORDER", "Family", "SparseLogistic", "native_importance", "parse_families",
    "parse_size_overrides", "pixel_mutual_information", "pixels_used", "plan_rungs", "size_figures",
    "SearchCancelled", "ConstantRule", "LutRule", "MemorizeRule", "log2_comb", "log2_lut_class",
    "log2_memorize_class", "log2_tree_class", "BEAM_MARK", "BEAM_NOTE", "is_beam",
]
