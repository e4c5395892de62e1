"""Schemas of the clean tables: observations, accepted cases, adjustments and quarantine."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pandera.pandas as pa
from pandera.typing import Series

from audit.config import CONDITIONS, DIRECTIONS, OUTCOME_SCALES

QUARANTINE_LEVELS = ["file", "row", "case"]


# Text of the observations repeats on every point of a case (ids, labels, file names): held in
# memory as categoricals (one code per row), a fraction of the size of one string per row. The
# results store writes them as plain text (audit.store), so reading the store gives strings.
Text = pd.CategoricalDtype


class Observations(pa.DataFrameModel):
    """Clean observations: one row per accepted point, sorted by case and session."""

    case_key: Series[Text] = pa.Field(str_length={"min_value": 1})
    study: Series[Text]
    case: Series[Text]
    series: Series[Text]
    session: Series[float]
    outcome: Series[float]
    phase: Series[Text]
    phase_index: Series[int] = pa.Field(ge=1)
    condition: Series[Text] = pa.Field(isin=list(CONDITIONS))
    design: Series[Text]
    outcome_scale: Series[Text] = pa.Field(nullable=True, isin=list(OUTCOME_SCALES))
    desired_direction: Series[Text] = pa.Field(nullable=True, isin=list(DIRECTIONS))
    tier: Series[Text] = pa.Field(nullable=True)
    source_file: Series[Text]
    source_sheet: Series[Text]
    source_row: Series[int]
    n_source_rows: Series[int] = pa.Field(ge=1)
    adjusted: Series[bool]

    @pa.check("session", "outcome", name="finite_number")
    def _finite(cls, s: pd.Series) -> pd.Series:
        return pd.Series(np.isfinite(s.to_numpy(dtype=float)), index=s.index)

    @pa.dataframe_check(name="unique_increasing_sessions")
    def _sessions(cls, df: pd.DataFrame) -> bool:
        if df.empty:
            return True
        same = df["case_key"].to_numpy()[1:] == df["case_key"].to_numpy()[:-1]
        step = np.diff(df["session"].to_numpy(dtype=float))
        return bool(np.all(step[same] > 0))

    @pa.dataframe_check(name="baseline_and_treatment_in_every_case")
    def _both_conditions(cls, df: pd.DataFrame) -> bool:
        if df.empty:
            return True
        return bool((df.groupby("case_key", sort=False)["condition"].nunique() == 2).all())

    class Config:
        strict = False
        coerce = True


class AcceptedCases(pa.DataFrameModel):
    """One row per accepted case with its shape and quality flags."""

    case_key: Series[str] = pa.Field(unique=True)
    study: Series[str]
    case: Series[str]
    series: Series[str]
    design: Series[str]
    design_source: Series[str] = pa.Field(isin=["given", "inferred"])
    outcome_scale: Series[str] = pa.Field(nullable=True)
    desired_direction: Series[str] = pa.Field(nullable=True)
    n_points: Series[int] = pa.Field(ge=6)
    n_phases: Series[int] = pa.Field(ge=2)
    min_phase_points: Series[int] = pa.Field(ge=1)
    below_five_point_standard: Series[bool]
    n_adjustments: Series[int] = pa.Field(ge=0)

    class Config:
        strict = False
        coerce = True


class Adjustments(pa.DataFrameModel):
    """Every repair made to the input: where, what, and by which rule."""

    source_file: Series[str]
    source_sheet: Series[str]
    source_row: Series[int]
    study: Series[str]
    case: Series[str]
    series: Series[str]
    column: Series[str]
    old_value: Series[str]
    new_value: Series[str]
    rule: Series[str] = pa.Field(isin=["session_snapped", "percent_clipped", "duplicate_collapsed"])

    class Config:
        strict = False
        coerce = True


class Quarantine(pa.DataFrameModel):
    """Rejected files, rows and cases, each problem with a readable reason.

    ``n_rows`` counts the input rows this entry removes that no earlier entry removed, so the
    column sums to the number of quarantined rows (rows read = accepted + quarantined).
    """

    level: Series[str] = pa.Field(isin=QUARANTINE_LEVELS)
    source_file: Series[str]
    source_sheet: Series[str]
    rows: Series[str]
    n_rows: Series[int] = pa.Field(ge=0)
    study: Series[str] = pa.Field(nullable=True)
    case: Series[str] = pa.Field(nullable=True)
    series: Series[str] = pa.Field(nullable=True)
    column: Series[str] = pa.Field(nullable=True)
    value: Series[str] = pa.Field(nullable=True)
    rule: Series[str]
    message: Series[str]

    class Config:
        strict = False
        coerce = True
