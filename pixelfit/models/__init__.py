"""Models of the ladder: pixelfit's own rules and the estimators built on scikit-learn.

The families (which estimator at which size, and everything else a family is) live in
:mod:`pixelfit.families`.
"""

from pixelfit.models._estimators import SparseLogistic, pixel_mutual_information
from pixelfit.models._rules import BEAM_MARK, BEAM_NOTE, ConstantRule, LutRule, MemorizeRule, is_beam
from pixelfit.models._sizes import log2_comb, log2_lut_class, log2_memorize_class, log2_tree_class
from pixelfit.models.lut_engine import SearchCancelled

__all__ = [
    "SparseLogistic", "pixel_mutual_information", "SearchCancelled", "ConstantRule", "LutRule", "MemorizeRule",
    "log2_comb", "log2_lut_class", "log2_memorize_class", "log2_tree_class", "BEAM_MARK", "BEAM_NOTE", "is_beam",
]
