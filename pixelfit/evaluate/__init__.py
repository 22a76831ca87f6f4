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
)
from pixelfit.evaluate._metrics import (
    clopper_pearson_interval,
    confusion,
    detection_metrics,
    error_rate,
    wilson_interval,
)
from pixelfit.evaluate._spec import (
    Spec,
    answer,
    apply_spec,
    evaluate_spec,
    lower_bound,
    parse_spec,
    patches_needed,
    verdict,
)

__all__ = [
    "consistent_sample_size", "hoeffding_bound", "log2_comb", "log2_lut_class",
    "log2_memorize_class", "log2_tree_class", "vc_bound", "vc_confidence", "clopper_pearson_interval",
    "confusion", "detection_metrics", "error_rate", "wilson_interval",
    "Spec", "answer", "apply_spec", "evaluate_spec", "lower_bound", "parse_spec", "patches_needed", "verdict",
]
