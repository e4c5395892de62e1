"""Crash safety and concurrency of `sced-audit run` with real subprocesses killed by SIGKILL."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from audit.cli import main
from audit.store import ResultsStore

ROOT = Path(__file__).resolve().parents[1]
FIXTURE = ROOT / "fixtures" / "demo_small" / "data"
HELPER = Path(__file__).with_name("run_crash_helper.py")

pytestmark = pytest.mark.integration


def _start(inputs: Path, store: Path, ready: Path, point: str, lock_timeout: str = "10") -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen([sys.executable, str(HELPER), str(inputs), str(store), str(ready), point, lock_timeout],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, cwd=ROOT)


def _wait_ready(proc: subprocess.Popen, ready: Path, timeout: float = 120) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if ready.exists():
            return
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"helper ended early ({proc.returncode}): {err.decode()[-2000:]}")
        time.sleep(0.1)
    proc.kill()
    raise AssertionError("helper never reached its pause point")


def _kill(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)


def _committed_folders_match_ledger(store: Path) -> None:
    ids = set(ResultsStore(store).runs()["run_id"])
    for table in store.iterdir():
        if table.is_dir() and not table.name.startswith("."):
            for part in table.iterdir():
                if part.name.startswith("run="):
                    assert part.name[4:] in ids, f"orphan folder {part}"
    staging = store / ".staging"
    assert not staging.exists() or not any(staging.iterdir())


@pytest.fixture()
def review(tmp_path):
    inputs = tmp_path / "in"
    shutil.copytree(FIXTURE, inputs)
    store = tmp_path / "store"
    assert main(["run", str(inputs), "--store", str(store), "--no-prefect", "--no-report", "--force"]) == 1
    first = ResultsStore(store)
    return inputs, store, first.latest_run_id(), first.table("cases")


@pytest.mark.parametrize("point", ["diagnose", "row_group", "moved", "ledger_tmp_written"])
def test_kill_during_run_leaves_previous_run_intact(review, tmp_path, point):
    inputs, store, first_id, first_cases = review
    # make the killed run do real work: change one outcome so one case is recomputed
    target = inputs / "f1_on_task.csv"
    frame = pd.read_csv(target, encoding="utf-8-sig")
    frame.loc[0, "outcome"] = frame.loc[0, "outcome"] - 1.0
    frame.to_csv(target, index=False)
    ready = tmp_path / f"ready-{point}"
    proc = _start(inputs, store, ready, point)
    _wait_ready(proc, ready)
    _kill(proc)

    after = ResultsStore(store)
    assert after.latest_run_id() == first_id
    pd.testing.assert_frame_equal(after.table("cases"), first_cases)
    assert main(["run", str(inputs), "--store", str(store), "--no-prefect", "--no-report", "--force"]) == 1
    final = ResultsStore(store)
    assert final.latest_run_id() != first_id and len(final.runs()) == 2
    _committed_folders_match_ledger(store)
    assert len(final.table("cases")) == len(first_cases)


def test_second_writer_is_refused_with_a_clear_message_and_reader_sees_previous_run(review, tmp_path, capsys):
    inputs, store, first_id, first_cases = review
    ready = tmp_path / "ready"
    proc = _start(inputs, store, ready, "moved")  # holds the lock, one table already moved into place
    try:
        _wait_ready(proc, ready)
        # a reader during the write sees the previous complete run
        reader = ResultsStore(store)
        assert reader.latest_run_id() == first_id
        pd.testing.assert_frame_equal(reader.table("cases"), first_cases)
        code = main(["run", str(inputs), "--store", str(store), "--no-prefect", "--no-report", "--force", "--lock-timeout", "1"])
        err = capsys.readouterr().err
        assert code == 2
        assert "lock" in err.lower() and str(store) in err and "Traceback" not in err
    finally:
        _kill(proc)
    assert ResultsStore(store).latest_run_id() == first_id
    assert main(["run", str(inputs), "--store", str(store), "--no-prefect", "--no-report", "--force"]) == 1
    _committed_folders_match_ledger(store)
