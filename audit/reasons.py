"""Reason codes for results that could not be computed (NaN with a reason, never an exception).

Every statistical function that returns NaN fills a ``reason`` field with one of these codes
(or several joined by ';'). An empty string means the value was computed.
"""

OK = ""
TOO_FEW_POINTS = "too_few_points"
CONSTANT_SERIES = "constant_series"
SINGULAR_DESIGN = "singular_design"
NO_RESIDUAL_DF = "no_residual_df"
ZERO_RESIDUAL_VARIANCE = "zero_residual_variance"
NON_FINITE_INPUT = "non_finite_input"
EMPTY_PHASE = "empty_phase"
ZERO_VARIANCE = "zero_variance"
NOT_RATIO_SCALE = "not_ratio_scale"
NONPOSITIVE_MEAN = "nonpositive_mean"
NO_DIRECTION = "no_desired_direction"
NO_CONTRAST = "no_baseline_treatment_contrast"
NUMERICAL_FAILURE = "numerical_failure"


def join(*codes: str) -> str:
    """Join non-empty reason codes with ';' (order kept, duplicates dropped)."""
    seen: list[str] = []
    for code in codes:
        for part in (code or "").split(";"):
            if part and part not in seen:
                seen.append(part)
    return ";".join(seen)
