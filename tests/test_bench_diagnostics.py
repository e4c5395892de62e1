"""How benchmarks/bench_diagnostics.py cuts a review into blocks for its worker processes.

Plumbing checks: every row goes to exactly one block, blocks hold whole cases, cuts fall between
case lengths where they can, rows keep their input order, and the engine gives the same rows on
the blocks (with only the columns it reads) as on the whole input.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from audit.config import AuditConfig
from audit.diagnose import diagnose_cases
from audit.intake import load_review

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

import bench_diagnostics as bench  # noqa: E402

FIXTURE = ROOT / "fixtures" / "demo_small"


def _frame(lengths: list[int]) -> pd.DataFrame:
    """Observations of invented cases c0, c1, ... with the given numbers of points, case by case."""
    keys = np.repeat([f"c{i:03d}" for i in range(len(lengths))], lengths)
    session = np.concatenate([np.arange(1.0, n + 1.0) for n in lengths] + [np.zeros(0)])
    return pd.DataFrame({"case_key": keys, "session": session})


def _lengths_of(obs: pd.DataFrame, rows: np.ndarray) -> set[int]:
    return set(obs["case_key"].iloc[rows].value_counts().tolist())


def test_blocks_cover_every_row_once_with_whole_cases_in_input_order():
    rng = np.random.default_rng(3)
    obs = _frame(rng.integers(8, 30, size=300).tolist())
    blocks = bench.case_block_rows(obs, 3)
    assert len(blocks) == 3
    every = np.concatenate(blocks)
    assert np.array_equal(np.sort(every), np.arange(len(obs)))
    keys = obs["case_key"].to_numpy()
    seen = [set(keys[b]) for b in blocks]
    for i in range(3):
        assert all(np.all(np.diff(b) > 0) for b in blocks)  # input order within a block
        for j in range(i + 1, 3):
            assert not (seen[i] & seen[j])  # a case lies in one block only


def test_blocks_hold_cases_in_length_order_and_equal_work():
    rng = np.random.default_rng(4)
    obs = _frame(rng.permutation(np.repeat(np.arange(8, 41), 20)).tolist())
    b0, b1 = bench.case_block_rows(obs, 2)
    short, long_ = _lengths_of(obs, b0), _lengths_of(obs, b1)
    assert max(short) <= min(long_)  # shorter cases first; at most the length cut through is shared
    work = [len(b) for b in (b0, b1)]  # points
    assert abs(work[0] - work[1]) <= 40  # within one case of equal


def test_one_length_only_still_gives_two_blocks():
    obs = _frame([12] * 40)
    blocks = bench.case_block_rows(obs, 2)
    assert [len(b) for b in blocks] == [240, 240]


def test_engine_on_blocks_equals_engine_on_whole_input():
    obs = load_review([FIXTURE / "data"], AuditConfig()).prepared.observations
    whole = diagnose_cases(obs)
    parts = [diagnose_cases(block) for block in bench._case_blocks(obs, 2)]
    assert len(parts) == 2
    for name, keys in (("cases", ["case_key"]), ("phases", ["case_key", "phase_index"]),
                       ("contrasts", ["case_key"])):
        got = pd.concat([p[name] for p in parts], ignore_index=True)
        got = got.sort_values(keys, kind="stable").reset_index(drop=True)
        want = whole[name].sort_values(keys, kind="stable").reset_index(drop=True)
        pd.testing.assert_frame_equal(got, want, check_exact=True)


@pytest.mark.parametrize("parts", [1, 2])
def test_empty_input_gives_no_blocks(parts):
    assert bench.case_block_rows(_frame([]), parts) == []


def test_warm_up_covers_the_shape_of_every_case_model():
    # the workers' Durbin-Watson bounds are filled for every (n, k) the engine will ask for:
    # the shapes are those of audit.design.case_design case by case
    from audit.design import case_design
    from audit.durbin_watson import _critical_bounds_cached

    obs = load_review([FIXTURE], AuditConfig()).prepared.observations
    expected = set()
    for _, part in obs.groupby("case_key", sort=True, observed=True):
        d = case_design(part["session"].to_numpy(float), part["phase_index"].to_numpy(),
                        part["condition"].to_numpy().astype(str), str(part["design"].iloc[0]),
                        part["phase"].to_numpy().astype(str))
        expected.add(d.X.shape)
    shapes = bench.design_shapes(obs)
    assert set(shapes) == expected
    _critical_bounds_cached.cache_clear()
    bench.warm_caches(shapes)
    filled = _critical_bounds_cached.cache_info().currsize
    assert filled == len({(n, k - 1) for n, k in shapes})
