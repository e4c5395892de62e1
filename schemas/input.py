"""Schema of raw rows after column mapping and number parsing (one row per digitized point).

Validated lazily so that every problem of a file is reported at once; the failure cases
become row-level quarantine entries.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pandera.pandas as pa
from pandera.typing import Series

from audit.config import CONDITIONS, DIRECTIONS, OUTCOME_SCALES


class RawRows(pa.DataFrameModel):
    """Raw rows: ids present, session and outcome finite numbers, optional labels from known sets."""

    study: Series[str] = pa.Field(str_length={"min_value": 1})
    case: Series[str] = pa.Field(str_length={"min_value": 1})
    series: Series[str] = pa.Field(nullable=True)
    session: Series[float]
    outcome: Series[float]
    phase: Series[str] = pa.Field(str_length={"min_value": 1})
    condition: Series[str] = pa.Field(nullable=True, isin=list(CONDITIONS))
    outcome_scale: Series[str] = pa.Field(nullable=True, isin=list(OUTCOME_SCALES))
    desired_direction: Series[str] = pa.Field(nullable=True, isin=list(DIRECTIONS))
    extra_fields: Series[str] = pa.Field(nullable=True)
    source_file: Series[str]
    source_row: Series[int]

    @pa.check("session", name="finite_number")
    def _session_finite(cls, s: pd.Series) -> pd.Series:
        return pd.Series(np.isfinite(s.to_numpy(dtype=float)), index=s.index)

    @pa.check("outcome", name="finite_number")
    def _outcome_finite(cls, s: pd.Series) -> pd.Series:
        return pd.Series(np.isfinite(s.to_numpy(dtype=float)), index=s.index)

    @pa.check("extra_fields", name="no_extra_fields")
    def _no_extra(cls, s: pd.Series) -> pd.Series:
        return s.isna() | (s == "")

    class Config:
        strict = False
        coerce = False
