"""Schemas of the summary tables written by ``audit.summary.summarize`` (store tables summary_*).

Rates and shares lie in [0, 1]; intervals are ordered; AR(1) coefficients that feed the GLS test
lie within +-0.95; NaN is allowed where a part could not be computed (too few cases).
``SUMMARY_SCHEMAS`` maps table name to schema; ``summary_validators()`` gives the store hook.
"""

from __future__ import annotations

import pandas as pd
import pandera.pandas as pa
from pandera.typing import Series

GROUP_BY = ["all", "study", "design", "outcome_scale"]
ALTERNATIVES = ["gls_reml", "gls_shrunken", "hac", "tau_adjusted"]
VERDICTS = ["effect", "no effect", "undetermined", "not computed"]

_RATE = {"ge": 0.0, "le": 1.0, "nullable": True}
_NN = {"ge": 0.0, "nullable": True}


class _Base(pa.DataFrameModel):
    class Config:
        strict = False
        coerce = True


class SummaryOverall(_Base):
    """One row: the review-wide answer."""

    alpha: Series[float] = pa.Field(gt=0.0, lt=1.0)
    n_studies: Series[int] = pa.Field(ge=0)
    n_cases: Series[int] = pa.Field(ge=0)
    pooled_ar1: Series[float] = pa.Field(nullable=True)
    pooled_ar1_ci_lower: Series[float] = pa.Field(nullable=True)
    pooled_ar1_ci_upper: Series[float] = pa.Field(nullable=True)
    pooled_ar1_tau2: Series[float] = pa.Field(**_NN)
    mean_dw_power: Series[float] = pa.Field(**_RATE)
    n_verdict_changes: Series[int] = pa.Field(ge=0)
    answer: Series[str]

    @pa.dataframe_check(name="one_row")
    def _one_row(cls, df: pd.DataFrame) -> bool:
        return len(df) == 1


class PooledAutocorrelation(_Base):
    """Random-effects pooled AR(1) coefficient and corrected r1, overall and by group."""

    measure: Series[str] = pa.Field(isin=["ar1_coefficient", "r1_corrected"])
    group_by: Series[str] = pa.Field(isin=GROUP_BY)
    group: Series[str]
    n_cases: Series[int] = pa.Field(ge=0)
    estimate: Series[float] = pa.Field(nullable=True)
    std_error: Series[float] = pa.Field(**_NN)
    ci_lower: Series[float] = pa.Field(nullable=True)
    ci_upper: Series[float] = pa.Field(nullable=True)
    pi_lower: Series[float] = pa.Field(nullable=True)
    pi_upper: Series[float] = pa.Field(nullable=True)
    tau2: Series[float] = pa.Field(**_NN)
    i2: Series[float] = pa.Field(**_RATE)
    q: Series[float] = pa.Field(**_NN)
    q_p_value: Series[float] = pa.Field(**_RATE)
    method: Series[str]
    within_variance: Series[str]
    reason: Series[str] = pa.Field(nullable=True)

    @pa.dataframe_check(name="ordered_intervals")
    def _ordered(cls, df: pd.DataFrame) -> pd.Series:
        ci = (df["ci_lower"] <= df["estimate"]) & (df["estimate"] <= df["ci_upper"])
        pi = (df["pi_lower"] <= df["ci_lower"]) & (df["ci_upper"] <= df["pi_upper"])
        return (ci | df["estimate"].isna()) & (pi | df["pi_lower"].isna())


class CaseShrinkage(_Base):
    """One row per case: calibrated AR(1) estimate, its empirical-Bayes shrunken value and weight."""

    case_key: Series[str] = pa.Field(unique=True)
    study: Series[str]
    calibration: Series[str] = pa.Field(isin=["exact mean inversion", "first order"])
    raw: Series[float] = pa.Field(ge=-0.95, le=0.95, nullable=True)
    raw_variance: Series[float] = pa.Field(**_NN)
    raw_at_bound: Series[bool]
    pooled_mean: Series[float] = pa.Field(nullable=True)
    tau2: Series[float] = pa.Field(**_NN)
    weight: Series[float] = pa.Field(ge=0.0, le=1.0)
    shrunken: Series[float] = pa.Field(ge=-0.95, le=0.95, nullable=True)
    reason: Series[str] = pa.Field(nullable=True)


class DurbinWatsonSummary(_Base):
    """Share of cases with a significant exact DW test and mean exact power at the pooled AR(1)."""

    group_by: Series[str] = pa.Field(isin=GROUP_BY)
    group: Series[str]
    n_cases: Series[int] = pa.Field(ge=0)
    n_significant_positive: Series[int] = pa.Field(ge=0)
    share_significant_positive: Series[float] = pa.Field(**_RATE)
    positive_ci_lower: Series[float] = pa.Field(**_RATE)
    positive_ci_upper: Series[float] = pa.Field(**_RATE)
    n_significant_negative: Series[int] = pa.Field(ge=0)
    share_significant_negative: Series[float] = pa.Field(**_RATE)
    power_rho: Series[float] = pa.Field(nullable=True)
    mean_power: Series[float] = pa.Field(**_RATE)


class FlipRates(_Base):
    """Flip rates against the OLS decision, split into lost and gained significance."""

    alternative: Series[str] = pa.Field(isin=ALTERNATIVES)
    label: Series[str]
    group_by: Series[str] = pa.Field(isin=GROUP_BY)
    group: Series[str]
    n_cases: Series[int] = pa.Field(ge=0)
    n_flips: Series[int] = pa.Field(ge=0)
    flip_rate: Series[float] = pa.Field(**_RATE)
    flip_ci_lower: Series[float] = pa.Field(**_RATE)
    flip_ci_upper: Series[float] = pa.Field(**_RATE)
    n_lost: Series[int] = pa.Field(ge=0)
    lost_rate: Series[float] = pa.Field(**_RATE)
    n_gained: Series[int] = pa.Field(ge=0)
    gained_rate: Series[float] = pa.Field(**_RATE)

    @pa.dataframe_check(name="flips_are_lost_plus_gained")
    def _sum(cls, df: pd.DataFrame) -> pd.Series:
        return df["n_flips"] == df["n_lost"] + df["n_gained"]


class Sensitivity(_Base):
    """Flip rate of the GLS test at an assumed AR(1) coefficient."""

    assumed_rho: Series[float] = pa.Field(ge=-0.95, le=0.95)
    n_cases: Series[int] = pa.Field(ge=0)
    n_flips: Series[int] = pa.Field(ge=0)
    flip_rate: Series[float] = pa.Field(**_RATE)
    flip_ci_lower: Series[float] = pa.Field(**_RATE)
    flip_ci_upper: Series[float] = pa.Field(**_RATE)
    n_lost: Series[int] = pa.Field(ge=0)
    n_gained: Series[int] = pa.Field(ge=0)


class StudyVerdicts(_Base):
    """Per study outcome (study, series): three-demonstrations verdicts under each assumption."""

    study: Series[str]
    series: Series[str]
    n_cases: Series[int] = pa.Field(ge=1)
    demonstrations_independence: Series[float] = pa.Field(ge=0.0)
    verdict_independence: Series[str] = pa.Field(isin=VERDICTS)
    demonstrations_ar1: Series[float] = pa.Field(ge=0.0)
    verdict_ar1: Series[str] = pa.Field(isin=VERDICTS)
    demonstrations_shrunken: Series[float] = pa.Field(ge=0.0, nullable=True)
    verdict_shrunken: Series[str] = pa.Field(isin=VERDICTS)
    verdict_changes: Series[bool]
    change: Series[str]


class PooledEffect(_Base):
    """Pooled LRR / SMD under independence and under AR(1), with interval widths."""

    measure: Series[str] = pa.Field(isin=["lrr", "smd"])
    group_by: Series[str] = pa.Field(isin=["all", "study"])
    group: Series[str]
    assumption: Series[str] = pa.Field(isin=["independence", "ar1"])
    n_cases: Series[int] = pa.Field(ge=0)
    estimate: Series[float] = pa.Field(nullable=True)
    std_error: Series[float] = pa.Field(**_NN)
    ci_width: Series[float] = pa.Field(**_NN)
    width_ratio: Series[float] = pa.Field(**_NN)


class Screening(_Base):
    """One row per study for reviewers screening included studies."""

    study: Series[str] = pa.Field(unique=True)
    cases_audited: Series[int] = pa.Field(ge=0)
    cases_quarantined: Series[int] = pa.Field(ge=0)
    cases_meeting_five_point_standard: Series[pd.Int64Dtype] = pa.Field(ge=0, nullable=True)
    share_significant_dw: Series[float] = pa.Field(**_RATE)
    n_flips: Series[int] = pa.Field(ge=0)
    n_baseline_trend_flags: Series[pd.Int64Dtype] = pa.Field(ge=0, nullable=True)
    verdict_independence: Series[str]
    verdict_ar1: Series[str]
    verdict_changes: Series[bool]
    note: Series[str] = pa.Field(str_length={"min_value": 1})


class SummaryNotes(_Base):
    """Parts of the summary done, partial or skipped, with the reason."""

    part: Series[str]
    status: Series[str] = pa.Field(isin=["done", "partial", "skipped"])
    note: Series[str]


SUMMARY_SCHEMAS: dict[str, type[pa.DataFrameModel]] = {
    "summary_overall": SummaryOverall,
    "summary_pooled_autocorrelation": PooledAutocorrelation,
    "summary_case_shrinkage": CaseShrinkage,
    "summary_durbin_watson": DurbinWatsonSummary,
    "summary_flip_rates": FlipRates,
    "summary_sensitivity": Sensitivity,
    "summary_study_verdicts": StudyVerdicts,
    "summary_pooled_effect": PooledEffect,
    "summary_screening": Screening,
    "summary_notes": SummaryNotes,
}


def validate_summary(name: str, df: pd.DataFrame) -> pd.DataFrame:
    """Validate one summary table lazily (every problem reported at once); unknown names pass."""
    schema = SUMMARY_SCHEMAS.get(name)
    return df if schema is None else schema.validate(df, lazy=True)


def summary_validators() -> dict:
    """Validators for ``ResultsStore(path, validators=...)``: one per summary table name."""
    return {name: (lambda df, _n=name: validate_summary(_n, df)) for name in SUMMARY_SCHEMAS}
