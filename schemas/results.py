"""Schemas of the results tables: one row per case, one row per case and phase.

Only the columns every run has are listed; effect-size and trend columns are added by
``audit.diagnose`` and described in the README. Probabilities lie in [0, 1], DW in [0, 4],
AR(1) estimates within the REML bound, and NaN is allowed wherever a reason code explains it.
"""

from __future__ import annotations

import pandera.pandas as pa
from pandera.typing import Series

DW_ZONES = ["positive", "inconclusive_positive", "none", "inconclusive_negative", "negative", "unknown"]
MODELS = ["level_and_trend", "level_only", "alternating"]

_P = {"ge": 0.0, "le": 1.0, "nullable": True}


class CaseResults(pa.DataFrameModel):
    """One row per diagnosed case."""

    case_key: Series[str] = pa.Field(unique=True)
    study: Series[str]
    case: Series[str]
    series: Series[str]
    design: Series[str]
    model: Series[str] = pa.Field(isin=MODELS)
    n_obs: Series[int] = pa.Field(ge=2)
    n_params: Series[int] = pa.Field(ge=1)
    df_resid: Series[int]
    effect_ols_estimate: Series[float] = pa.Field(nullable=True)
    effect_ols_std_error: Series[float] = pa.Field(ge=0.0, nullable=True)
    effect_ols_p_value: Series[float] = pa.Field(**_P)
    effect_gls_reml_estimate: Series[float] = pa.Field(nullable=True)
    effect_gls_reml_p_value: Series[float] = pa.Field(**_P)
    effect_hac_p_value: Series[float] = pa.Field(**_P)
    ar1_reml_rho: Series[float] = pa.Field(ge=-0.95, le=0.95, nullable=True)
    ar1_ml_rho: Series[float] = pa.Field(ge=-0.95, le=0.95, nullable=True)
    dw_statistic: Series[float] = pa.Field(ge=0.0, le=4.0, nullable=True)
    dw_p_positive: Series[float] = pa.Field(**_P)
    dw_p_negative: Series[float] = pa.Field(**_P)
    dw_d_lower: Series[float] = pa.Field(nullable=True)
    dw_d_upper: Series[float] = pa.Field(nullable=True)
    dw_zone: Series[str] = pa.Field(isin=DW_ZONES)
    dw_power: Series[float] = pa.Field(**_P)
    dw_session_only_statistic: Series[float] = pa.Field(ge=0.0, le=4.0, nullable=True)
    dw_session_only_p_positive: Series[float] = pa.Field(**_P)
    r1_residual: Series[float] = pa.Field(ge=-1.0, le=1.0, nullable=True)
    r1_corrected: Series[float] = pa.Field(nullable=True)
    r1_p_value: Series[float] = pa.Field(**_P)
    bg_p_value: Series[float] = pa.Field(**_P)
    lb_p_value: Series[float] = pa.Field(**_P)
    flip_any: Series[bool]
    reason: Series[str] = pa.Field(nullable=True)

    class Config:
        strict = False
        coerce = True


class PhaseResults(pa.DataFrameModel):
    """One row per case and phase."""

    case_key: Series[str]
    phase_index: Series[int] = pa.Field(ge=1)
    phase: Series[str]
    condition: Series[str] = pa.Field(isin=["baseline", "treatment"])
    n: Series[int] = pa.Field(ge=1)
    mean: Series[float]
    r1: Series[float] = pa.Field(nullable=True)
    r1_plus: Series[float] = pa.Field(nullable=True)
    r1_plus_p_value: Series[float] = pa.Field(**_P)

    class Config:
        strict = False
        coerce = True
