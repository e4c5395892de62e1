"""Diagnose batches in worker processes (audit.parallel): the same tables as in-process, errors
handed on, a dead worker costs nothing, and the run-level wiring (plain path and CLI options).

These are plumbing checks: the statistics themselves are checked against outside references in
the engine's own tests; here the in-process path is the reference for the process path.
"""

from __future__ import annotations

import os
import signal
from pathlib import Path

import pandas as pd
import pytest

from audit import parallel, rerun
from audit.config import AuditConfig
from audit.intake import load_review
from audit.parallel import DiagnosePool, workers_for_input
from audit.store import ResultsStore

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "demo_small"


@pytest.fixture(scope="module")
def batches():
    obs = load_review([FIXTURE / "data"], AuditConfig()).prepared.observations
    return rerun.case_batches(obs, 4)


def _assert_same_tables(got: dict, want: dict) -> None:
    assert set(got) == set(want)
    for name in want:
        pd.testing.assert_frame_equal(got[name], want[name], check_exact=True)


def test_workers_for_input_rules():
    assert workers_for_input(3, 0) == 3
    assert workers_for_input(1, 10**12) == 1
    assert workers_for_input(None, parallel.MIN_INPUT_BYTES_FOR_WORKERS - 1) == 1
    assert workers_for_input(None, parallel.MIN_INPUT_BYTES_FOR_WORKERS) == parallel.default_workers()
    assert 1 <= parallel.default_workers() <= parallel.MAX_DEFAULT_WORKERS
    with pytest.raises(ValueError, match="at least 1"):
        workers_for_input(0, 0)
    with pytest.raises(ValueError, match="at least 1"):
        DiagnosePool(0)


def test_one_worker_runs_in_process(batches):
    pool = DiagnosePool(1)
    assert not pool.uses_processes
    with pool:
        got = pool.run(batches[0], 0.05)
    assert pool._executor is None
    _assert_same_tables(got, rerun.diagnose_batch(batches[0], 0.05))


@pytest.mark.integration
def test_process_pool_gives_the_in_process_tables(batches):
    with DiagnosePool(2).start() as pool:
        futures = [pool.submit(b, 0.05) for b in batches]
        got = [f.result() for f in futures]
        assert pool.uses_processes and pool.fallback_reason is None
    for g, b in zip(got, batches):
        _assert_same_tables(g, rerun.diagnose_batch(b, 0.05))


@pytest.mark.integration
def test_an_error_in_a_batch_reaches_the_caller(batches):
    broken = batches[0].drop(columns=["outcome"])
    with pytest.raises(Exception) as inline:
        rerun.diagnose_batch(broken, 0.05)
    with DiagnosePool(2) as pool, pytest.raises(type(inline.value)):
        pool.run(broken, 0.05)
    assert pool.fallback_reason is None  # an error of the batch is not a dead worker


@pytest.mark.integration
def test_a_killed_worker_falls_back_to_in_process(batches):
    with DiagnosePool(2).start() as pool:
        pool.run(batches[0], 0.05)
        pids = list(pool._executor._processes)  # every worker process of the pool
        os.kill(pids[0], signal.SIGKILL)  # one dies; the other is still alive when the pool closes
        got = pool.run(batches[1], 0.05)
        assert "worker process stopped" in (pool.fallback_reason or "")
        assert not pool.uses_processes
        again = pool.run(batches[2], 0.05)  # later batches run in-process
    _assert_same_tables(got, rerun.diagnose_batch(batches[1], 0.05))
    _assert_same_tables(again, rerun.diagnose_batch(batches[2], 0.05))


@pytest.mark.integration
def test_run_with_worker_processes_writes_the_same_store(tmp_path):
    kw = {"with_summary": True, "with_report": False, "batch_size": 10}
    one = rerun.run_audit([FIXTURE / "data"], tmp_path / "one", workers=1, **kw)
    two = rerun.run_audit([FIXTURE / "data"], tmp_path / "two", workers=2, **kw)
    assert one.cases_computed == two.cases_computed > 10
    a, b = ResultsStore(tmp_path / "one"), ResultsStore(tmp_path / "two")
    assert a.tables() == b.tables()
    for table in a.tables():
        x, y = a.table(table), b.table(table)
        drop = [c for c in ("run",) if c in x.columns]
        pd.testing.assert_frame_equal(x.drop(columns=drop), y.drop(columns=drop), check_exact=True)


def test_cli_rejects_zero_workers(tmp_path, capsys):
    from audit.cli import main

    code = main(["run", str(FIXTURE / "data"), "--store", str(tmp_path / "s"), "--no-prefect", "--workers", "0"])
    assert code == 2
    assert "--workers must be at least 1" in capsys.readouterr().err
