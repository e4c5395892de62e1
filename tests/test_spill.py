"""Batch results kept on disk during a run (audit.spill) and the run-level wiring around them.

Plumbing checks: the in-memory batch tables are the reference for the spilled ones (the
statistics themselves are checked against outside references in the engine's own tests).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from audit import rerun, spill
from audit.config import AuditConfig
from audit.intake import load_review
from audit.parallel import DiagnosePool
from audit.spill import SpilledTables, spill_folder, spill_tables

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "demo_small"


@pytest.fixture(scope="module")
def review():
    return load_review([FIXTURE / "data"], AuditConfig())


@pytest.fixture(scope="module")
def batch_tables(review):
    batches = rerun.case_batches(review.prepared.observations, 5)
    return [rerun.diagnose_batch(b, 0.05) for b in batches]


def _as_text(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame.copy()
    for col, dtype in out.dtypes.items():
        if isinstance(dtype, pd.CategoricalDtype):
            out[col] = out[col].astype("str")
    return out


def test_spilled_tables_read_back_equal(batch_tables, tmp_path):
    tables = batch_tables[0]
    assert any(isinstance(t, pd.CategoricalDtype) for df in tables.values() for t in df.dtypes)
    handle = spill_tables(tables, tmp_path)
    assert list(handle) == list(tables) and len(handle) == len(tables)
    for name, frame in tables.items():
        got = handle[name]
        # every column equal, dtypes included; categoricals come back as their text
        pd.testing.assert_frame_equal(got, _as_text(frame), check_exact=True)
        assert handle.categorical(name) == [c for c, t in frame.dtypes.items() if isinstance(t, pd.CategoricalDtype)]


def test_spilled_tables_pop_deletes_the_file_and_pickle_small(batch_tables, tmp_path):
    import pickle

    handle = spill_tables(batch_tables[0], tmp_path)
    files_before = sorted(handle.folder.iterdir())
    first = next(iter(handle))
    frame = handle.pop(first)
    assert len(frame) == len(batch_tables[0][first])
    assert first not in handle and len(handle) == len(batch_tables[0]) - 1
    assert len(sorted(handle.folder.iterdir())) == len(files_before) - 1
    with pytest.raises(KeyError):
        handle[first]
    with pytest.raises(TypeError):
        handle["cases"] = frame
    # what a worker process sends back is the handle, not the tables
    assert len(pickle.dumps(handle)) < 2_000
    other = next(iter(handle))
    pd.testing.assert_frame_equal(pickle.loads(pickle.dumps(handle))[other], handle[other])


def test_assemble_tables_same_from_spilled_and_in_memory_batches(review, batch_tables, tmp_path):
    plan = rerun.plan_run(review, None, AuditConfig())
    in_memory = rerun.assemble_tables(review, plan, [dict(t) for t in batch_tables])
    handles = [spill_tables(t, tmp_path) for t in batch_tables]
    spilled = rerun.assemble_tables(review, plan, handles)
    assert set(spilled) == set(in_memory)
    for name in in_memory:
        pd.testing.assert_frame_equal(spilled[name], in_memory[name], check_exact=True)
    assert all(len(h) == 0 for h in handles)  # each table's files go once it is joined


def test_spill_folder_is_removed_and_stale_folders_with_it(tmp_path):
    root = tmp_path / spill.SPILL_FOLDER
    root.mkdir()
    # a folder of a finished process (its pid no longer runs) and one of this live process
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    stale = root / f"run-{int(gone.stdout)}-abc"
    stale.mkdir()
    (stale / "0.arrow").write_bytes(b"x")
    live = root / f"run-{os.getpid()}-def"
    live.mkdir()
    with spill_folder(tmp_path) as folder:
        assert folder.parent == root and folder.is_dir()
        assert not stale.exists() and live.exists()
        spill_tables({"t": pd.DataFrame({"a": [1.0]})}, folder)
    assert not folder.exists()
    assert live.exists()  # another run (here: this process) may still use it
    live.rmdir()
    with spill_folder(tmp_path):
        pass
    assert not root.exists()  # the last run out removes .batches


def test_run_leaves_no_spill_folder_and_starts_workers_only_with_work(tmp_path, monkeypatch):
    started: list[bool] = []
    real_start = DiagnosePool.start

    def start(self):
        started.append(True)
        return real_start(self)

    monkeypatch.setattr(DiagnosePool, "start", start)
    store = tmp_path / "store"
    rerun.run_audit([FIXTURE / "data"], store, with_report=False, workers=1)
    assert started == [True]
    assert not (store / spill.SPILL_FOLDER).exists()
    started.clear()
    forced = rerun.run_audit([FIXTURE / "data"], store, with_report=False, workers=1, force=True)
    assert forced.cases_reused > 0 and forced.cases_computed == 0
    assert started == []  # every case reused: no worker processes


def test_spilled_handle_type_is_what_batches_return(review, tmp_path):
    batch = rerun.case_batches(review.prepared.observations, 5)[0]
    out = rerun.diagnose_batch(batch, 0.05, spill_to=tmp_path)
    assert isinstance(out, SpilledTables)
    plain = rerun.diagnose_batch(batch, 0.05)
    for name in plain:
        pd.testing.assert_frame_equal(out[name], _as_text(plain[name]), check_exact=True)


def test_tables_the_summary_does_not_read_wait_on_disk(review, batch_tables, tmp_path, monkeypatch):
    """With a stage function, the joined tables the summary does not read are validated and
    written at once (audit.store.PreparedTable): the summary sees only its inputs as frames, and
    the stored run equals the run written from frames."""
    from audit.store import PreparedTable

    config = AuditConfig()
    store = rerun.open_store(tmp_path / "store")
    plan = rerun.plan_run(review, None, config)
    in_memory = rerun.assemble_tables(review, plan, [dict(t) for t in batch_tables])
    with spill_folder(store.path) as folder:
        plan = rerun.plan_run(review, None, config)
        staged = rerun.assemble_tables(review, plan, [dict(t) for t in batch_tables],
                                       rerun.table_stager(store, folder))
        assert plan.reused == {}
        assert list(staged) == list(in_memory)
        for name, table in staged.items():
            assert isinstance(table, pd.DataFrame) == (name in rerun.SUMMARY_INPUTS), name
        assert {"phases", "contrasts"} <= {n for n, t in staged.items() if isinstance(t, PreparedTable)}
        first = rerun.write_run(store, review, plan, staged, config, {})
    second = rerun.write_run(store, review, plan, in_memory, config, {})
    for name in in_memory:
        pd.testing.assert_frame_equal(store.table(name, run=first.run_id).drop(columns="run"),
                                      store.table(name, run=second.run_id).drop(columns="run"), check_exact=True)

    # in a whole run, the summary gets frames for its inputs and no others
    seen: dict[str, type] = {}
    real = rerun.summary_tables

    def summary_spy(tables, *a, **kw):
        seen.update({n: type(t) for n, t in tables.items()})
        return real(tables, *a, **kw)

    monkeypatch.setattr(rerun, "summary_tables", summary_spy)
    done = rerun.run_audit([FIXTURE / "data"], tmp_path / "whole", with_report=False, workers=1)
    assert seen["phases"] is PreparedTable and seen["cases"] is pd.DataFrame
    assert set(done.tables) >= {"observations", "cases", "phases", "contrasts"}


def test_reuse_plan_keeps_its_count_once_the_reused_tables_are_joined(review, tmp_path):
    store_path = tmp_path / "store"
    rerun.run_audit([FIXTURE / "data"], store_path, with_report=False, workers=1)
    plan = rerun.plan_run(review, rerun.open_store(store_path), AuditConfig())
    n = plan.n_reused
    assert n == review.prepared.cases["case_key"].nunique()
    # the other tables are read when they are joined, not when the plan is made
    assert isinstance(plan.reused["cases"], pd.DataFrame)
    assert {name: type(t) for name, t in plan.reused.items() if name != "cases"} == {
        "phases": rerun.ReusedRows, "contrasts": rerun.ReusedRows}
    phases = plan.reused["phases"]()
    assert len(phases) and set(phases["case_hash"]) == set(plan.reused["cases"]["case_hash"])
    tables = rerun.assemble_tables(review, plan, [])
    assert plan.reused == {} and plan.n_reused == n and len(tables["cases"]) == n
