"""Metrics with intervals, bounds, rung comparison and importance maps."""

from pixelfit.evaluate._bounds import (
    consistent_sample_size,
    generalization_bound,
    hoeffding_bound,
    vc_bound,
    vc_confidence,
)
from pixelfit.evaluate._compare import (
    mcnemar,
    mcnemar_from_counts,
    one_standard_error_choice,
    operating_points,
    threshold_for_target,
)
from pixelfit.evaluate._importance import mean_difference_map, mutual_information_map, permutation_map
from pixelfit.evaluate._metrics import (
    clopper_pearson_interval,
    confusion,
    detection_metrics,
    error_rate,
    metrics_from_counts,
    wilson_interval,
)
from pixelfit.evaluate._variance import (
    VERDICT_FLAT,
    VERDICT_HELPS,
    VERDICT_UNCLEAR,
    bias_variance_01,
    last_segment_slope,
    slope_verdict,
)

# Class sizes are counted in pixelfit.models; they are re-exported here beside the bounds that use them.
from pixelfit.models import log2_comb, log2_lut_class, log2_memorize_class, log2_tree_class  # noqa: E402, I001

__all__ = [
    "consistent_sample_size", "generalization_bound", "hoeffding_bound", "vc_bound", "vc_confidence",
    "mcnemar", "mcnemar_from_counts", "one_standard_error_choice", "operating_points", "threshold_for_target",
    "mean_difference_map", "mutual_information_map", "permutation_map", "clopper_pearson_interval", "confusion",
    "detection_metrics", "error_rate", "metrics_from_counts", "wilson_interval", "log2_comb", "log2_lut_class",
    "log2_memorize_class", "log2_tree_class", "VERDICT_FLAT", "VERDICT_HELPS", "VERDICT_UNCLEAR", "bias_variance_01",
    "last_segment_slope", "slope_verdict",
]
