"""Metrics with intervals, bounds, rung comparison and importance maps."""

from pixelfit.evaluate._bounds import (
    consistent_sample_size,
    hoeffding_bound,
    log2_comb,
    log2_lut_class,
    log2_memorize_class,
    log2_tree_class,
    vc_bound,
    vc_confidence,
    vc_vacuous,
)
from pixelfit.evaluate._metrics import (
    clopper_pearson_interval,
    confusion,
    detection_metrics,
    error_rate,
    wilson_interval,
)

__all__ = [
    "consistent_sample_size", "hoeffding_bound", "log2_comb", "log2_lut_class",
    "log2_memorize_class", "log2_tree_class", "vc_bound", "vc_confidence", "vc_vacuous", "clopper_pearson_interval",
    "confusion", "detection_metrics", "error_rate", "wilson_interval",
]
