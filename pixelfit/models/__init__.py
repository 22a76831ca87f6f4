"""Models of the ladder: pixelfit's own rules and the scikit-learn families, by size."""

from pixelfit.models._families import (
    FAMILIES,
    FAMILY_ORDER,
    Family,
    SparseLogistic,
    generalization_bound,
    native_importance,
    parse_families,
    parse_size_overrides,
    pixels_used,
    plan_rungs,
    size_figures,
)
from pixelfit.models._lut_engine import SearchCancelled
from pixelfit.models._rules import BEAM_MARK, BEAM_NOTE, ConstantRule, LutRule, MemorizeRule, is_beam

__all__ = [
    "FAMILIES", "FAMILY_ORDER", "Family", "SparseLogistic", "generalization_bound",
    "native_importance", "parse_families", "parse_size_overrides", "pixels_used", "plan_rungs",
    "size_figures", "SearchCancelled", "ConstantRule", "LutRule", "MemorizeRule",
    "BEAM_MARK", "BEAM_NOTE", "is_beam",
]
