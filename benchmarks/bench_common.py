"""Shared helpers for the benchmark scripts: load a review once, take a subset of cases, build designs."""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np
import pandas as pd

from audit.config import AuditConfig
from audit.design import case_design
from audit.intake import load_review


def load_observations(path: str | Path) -> pd.DataFrame:
    """Clean observations of an input folder or file (ingest, repairs, validation; not timed)."""
    review = load_review([path], AuditConfig())
    return review.prepared.observations


def take_cases(obs: pd.DataFrame, n_cases: int | None) -> pd.DataFrame:
    """Observations of the first ``n_cases`` case keys in sorted order (all when None or 0)."""
    if not n_cases:
        return obs
    keys = np.sort(obs["case_key"].unique())[:n_cases]
    return obs[obs["case_key"].isin(keys)]


def split_designs(obs: pd.DataFrame):
    """Outcome series and case designs per case, sorted by case key (as ``diagnose_cases`` does)."""
    obs = obs.sort_values(["case_key", "session"], kind="stable")
    keys = obs["case_key"].to_numpy()
    bounds = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1], True])
    sess = obs["session"].to_numpy(dtype=float)
    yv = obs["outcome"].to_numpy(dtype=float)
    ph = obs["phase_index"].to_numpy()
    cond = obs["condition"].to_numpy().astype(str)
    label = obs["phase"].to_numpy().astype(str)
    design = obs["design"].to_numpy().astype(str)
    series, designs = [], []
    for b, e in zip(bounds[:-1], bounds[1:]):
        series.append(yv[b:e])
        designs.append(case_design(sess[b:e], ph[b:e], cond[b:e], design[b], label[b:e]))
    return series, designs


def flat_arrays(obs: pd.DataFrame) -> dict:
    """Observation arrays sorted by case then session, and the first row of each case."""
    obs = obs.sort_values(["case_key", "session"], kind="stable")
    keys = obs["case_key"].to_numpy()
    return {
        "session": obs["session"].to_numpy(dtype=float),
        "outcome": obs["outcome"].to_numpy(dtype=float),
        "phase_index": obs["phase_index"].to_numpy(),
        "condition": obs["condition"].to_numpy().astype(str),
        "design": obs["design"].to_numpy().astype(str),
        "phase_label": obs["phase"].to_numpy().astype(str),
        "case_starts": np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]]),
    }


def load_text() -> str:
    """1, 5 and 15 minute load averages of the machine, with the core count."""
    one, five, fifteen = os.getloadavg()
    return f"load {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"


class Timer:
    def __enter__(self):
        self.t0 = time.perf_counter()
        return self

    def __exit__(self, *exc):
        self.seconds = time.perf_counter() - self.t0
