"""The model families of the ladder: one module per family, each owning all that the family is.

A family (:class:`Family`) makes its estimator by size, reports its size figures, importance
and rule-file ``model`` section (the trained side, with scikit-learn imported only inside those
methods), and decodes that section into a :class:`Model` that predicts with numpy alone and
gives the integer-only :class:`IntegerModel` that ships to firmware, with its C tables, code and
exact cost. Importing this package loads neither scikit-learn nor scipy.
"""

from pixelfit.families._base import CTable, Family, IntegerModel, Model, quantize_threshold
from pixelfit.families._registry import FAMILIES, FAMILY_ORDER, parse_families, parse_size_overrides, plan_rungs

__all__ = ["CTable", "FAMILIES", "FAMILY_ORDER", "Family", "IntegerModel", "Model", "parse_families",
           "parse_size_overrides", "plan_rungs", "quantize_threshold"]
