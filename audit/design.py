"""Case design matrices: piecewise level-and-trend, level-only and alternating-treatment models.

Level-and-trend (Huitema & McKean 2000, generalised to several phase changes):
    y_t = b0 + b1 t + sum_p [ g_p S_pt + h_p (t - t_p) S_pt ] + e_t,
with t the session measured from the first session, S_pt = 1 from the first session t_p of
phase p on. Level-only drops the slope-change terms; it is used when a phase has fewer than
3 points or the level-and-trend model would leave fewer than ``MIN_RESIDUAL_DF`` residual df.
Alternating treatments: condition means plus a common trend, y_t = b0 + b1 t + sum_j d_j T_jt,
with T_jt = 1 at sessions of treatment label j.

The case effect is the contrast c'beta: the average of the immediate level changes g_p, with
baseline-to-treatment transitions counted +1 and treatment-to-baseline -1 (transitions within
one condition are in the model but not in the effect). For alternating designs it is the
average of the treatment-minus-baseline differences d_j.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

MIN_RESIDUAL_DF = 5
MIN_POINTS_FOR_SLOPE = 3

LEVEL_AND_TREND = "level_and_trend"
LEVEL_ONLY = "level_only"
ALTERNATING = "alternating"


@dataclass(frozen=True)
class CaseDesign:
    """Design matrix, effect contrast and bookkeeping of one case."""

    X: np.ndarray  # n x k, intercept first, then trend
    contrast: np.ndarray  # length k
    columns: tuple[str, ...]
    model: str
    n_transitions: int  # baseline<->treatment transitions that enter the effect
    signature: bytes  # equal for cases whose X and contrast are equal (batch key)

    @property
    def n_obs(self) -> int:
        return self.X.shape[0]

    @property
    def n_params(self) -> int:
        return self.X.shape[1]

    @property
    def df_resid(self) -> int:
        return self.X.shape[0] - self.X.shape[1]


def case_design(session: np.ndarray, phase_index: np.ndarray, condition: np.ndarray, design: str,
                phase_label: np.ndarray | None = None) -> CaseDesign:
    """Build the case design from sorted sessions, phase numbers and conditions.

    ``condition`` holds "baseline"/"treatment" per point; ``phase_label`` (per point) is used by
    alternating designs to tell several treatments apart.
    """
    t = np.asarray(session, dtype=float)
    t = t - t[0]
    phase_index = np.asarray(phase_index)
    condition = np.asarray(condition).astype(str)
    n = t.shape[0]
    if design == ALTERNATING:
        return _alternating(t, condition, phase_label)

    starts = np.flatnonzero(np.r_[True, phase_index[1:] != phase_index[:-1]])
    lengths = np.diff(np.r_[starts, n])
    phase_cond = condition[starts]
    cols = [np.ones(n), t]
    names = ["intercept", "trend"]
    level_cols: list[int] = []
    signs: list[float] = []
    for p in range(1, len(starts)):
        s = (np.arange(n) >= starts[p]).astype(float)
        cols.append(s)
        names.append(f"level_change_{p + 1}")
        level_cols.append(len(cols) - 1)
        before, after = phase_cond[p - 1], phase_cond[p]
        signs.append(1.0 if (before, after) == ("baseline", "treatment")
                     else -1.0 if (before, after) == ("treatment", "baseline") else 0.0)
    slope_cols = []
    for p in range(1, len(starts)):
        tp = t[starts[p]]
        slope_cols.append(((t - tp) * (np.arange(n) >= starts[p]), f"slope_change_{p + 1}"))
    full_k = len(cols) + len(slope_cols)
    use_slopes = lengths.min() >= MIN_POINTS_FOR_SLOPE and n - full_k >= MIN_RESIDUAL_DF
    if use_slopes:
        for col, name in slope_cols:
            cols.append(col)
            names.append(name)
    X = np.column_stack(cols)
    contrast = np.zeros(X.shape[1])
    n_trans = int(sum(1 for s in signs if s != 0.0))
    if n_trans:
        for j, s in zip(level_cols, signs):
            contrast[j] = s / n_trans
    model = LEVEL_AND_TREND if use_slopes else LEVEL_ONLY
    return CaseDesign(X=X, contrast=contrast, columns=tuple(names), model=model, n_transitions=n_trans,
                      signature=_signature(X, contrast, model))


def _alternating(t: np.ndarray, condition: np.ndarray, phase_label: np.ndarray | None) -> CaseDesign:
    n = t.shape[0]
    labels = np.asarray(phase_label).astype(str) if phase_label is not None else np.where(condition == "treatment", "B", "A")
    treat_labels = sorted(set(labels[condition == "treatment"]))
    cols = [np.ones(n), t]
    names = ["intercept", "trend"]
    for lab in treat_labels:
        cols.append(((condition == "treatment") & (labels == lab)).astype(float))
        names.append(f"treatment_{lab}")
    X = np.column_stack(cols)
    contrast = np.zeros(X.shape[1])
    if treat_labels:
        contrast[2:] = 1.0 / len(treat_labels)
    return CaseDesign(X=X, contrast=contrast, columns=tuple(names), model=ALTERNATING,
                      n_transitions=len(treat_labels), signature=_signature(X, contrast, ALTERNATING))


def session_only_design(session: np.ndarray) -> np.ndarray:
    """Intercept and session: the regression that published DW values usually refer to."""
    t = np.asarray(session, dtype=float)
    return np.column_stack([np.ones_like(t), t - t[0]])


def _signature(X: np.ndarray, contrast: np.ndarray, model: str) -> bytes:
    return model.encode() + b"|" + np.ascontiguousarray(X).tobytes() + b"|" + contrast.tobytes()
