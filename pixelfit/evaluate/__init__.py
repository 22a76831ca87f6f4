"""Metrics with intervals, bounds, rung comparison and importance maps."""

from pixelfit.evaluate._bounds import (
    consistent_sample_size,
    generalization_bound,
    hoeffding_bound,
    vc_bound,
    vc_confidence,
    vc_vacuous,
)
from pixelfit.evaluate._compare import (
    compare_calls,
    mcnemar,
    mcnemar_exact,
    mcnemar_from_counts,
    one_standard_error_choice,
)
from pixelfit.evaluate._importance import mean_difference_map, mutual_information_map, permutation_map
from pixelfit.evaluate._metrics import (
    QUANTIZED_F1_TOLERANCE,
    clopper_pearson_interval,
    confusion,
    detection_metrics,
    error_rate,
    metrics_from_counts,
    quantization_check,
    wilson_interval,
)
from pixelfit.evaluate._spec import (
    Spec,
    answer,
    apply_spec,
    choose_threshold,
    cost_order,
    evaluate_spec,
    held_out_result,
    lower_bound,
    operating_points,
    parse_spec,
    patches_needed,
    verdict,
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
    "consistent_sample_size", "generalization_bound", "hoeffding_bound", "vc_bound", "vc_confidence", "vc_vacuous",
    "compare_calls", "mcnemar", "mcnemar_exact", "mcnemar_from_counts", "one_standard_error_choice", "operating_points",
    "mean_difference_map", "mutual_information_map", "permutation_map", "clopper_pearson_interval", "confusion",
    "detection_metrics", "error_rate", "metrics_from_counts", "wilson_interval", "log2_comb", "log2_lut_class",
    "log2_memorize_class", "log2_tree_class", "QUANTIZED_F1_TOLERANCE", "quantization_check",
    "Spec", "answer", "apply_spec", "choose_threshold", "cost_order",
    "held_out_result", "evaluate_spec", "lower_bound", "parse_spec", "patches_needed", "verdict",
    "VERDICT_FLAT", "VERDICT_HELPS", "VERDICT_UNCLEAR", "bias_variance_01",
    "last_segment_slope", "slope_verdict",
]
