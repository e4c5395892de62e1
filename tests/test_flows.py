"""The Prefect flow: end to end on the fixture review, same store as the plain path, reuse,
the Dask task runner, the schedule definition, and (integration) a real local Prefect server.

Prefect is configured before it is imported (isolated home in a temporary folder), and
Prefect's test harness runs once for the whole session.
"""

from __future__ import annotations

import atexit
import datetime as dt
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path

import pandas as pd
import pytest

_HOME = tempfile.mkdtemp(prefix="sced-audit-prefect-test-")
atexit.register(shutil.rmtree, _HOME, True)
os.environ["SCED_AUDIT_PREFECT_HOME"] = _HOME

from flows.settings import EPHEMERAL_SERVER, configure  # noqa: E402

configure(home=_HOME)

from prefect.testing.utilities import prefect_test_harness  # noqa: E402

import audit.diagnose  # noqa: E402
from audit import rerun  # noqa: E402
from audit.store import ResultsStore  # noqa: E402
from flows import review as review_flow  # noqa: E402

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "demo_small"
DIAGNOSTIC_TABLES = ("cases", "phases", "contrasts")


@pytest.fixture(scope="session")
def prefect_harness():
    with prefect_test_harness(server_startup_timeout=120):
        yield


@pytest.fixture(scope="session")
def flow_run(prefect_harness, tmp_path_factory):
    """One flow run of the fixture review into a fresh store (batches of 4 cases)."""
    store = tmp_path_factory.mktemp("flow") / "store"
    progress: list[tuple] = []
    t0 = time.perf_counter()
    summary = review_flow.run_review([FIXTURE / "data"], store, batch_size=4, with_report=False,
                                     progress=lambda *a: progress.append(a))
    elapsed = time.perf_counter() - t0
    return store, summary, progress, elapsed


class Counting:
    def __init__(self):
        self.real = audit.diagnose.diagnose_cases
        self.calls: list[list[str]] = []
        self.threads: list[str] = []

    def __call__(self, observations, alpha=0.05, **kw):
        self.calls.append(sorted(observations["case_key"].unique()))
        self.threads.append(threading.current_thread().name)
        return self.real(observations, alpha=alpha, **kw)


def _tables(store: Path, run_id: str) -> dict[str, pd.DataFrame]:
    s = ResultsStore(store)
    return {t: s.table(t, run=run_id).drop(columns="run") for t in s.tables(run_id)}


# ----------------------------------------------------------------------------------- flow


def test_flow_end_to_end_on_the_fixture(flow_run):
    store, summary, progress, _ = flow_run
    truth = pd.read_csv(FIXTURE / "truth.csv")
    quarantined = truth["expected_quarantine"].astype(str).str.lower().isin(["true", "1"])
    # source: fixtures/demo_small/truth.csv (13 generated cases, 1 deliberately too short)
    assert summary.cases_audited == int((~quarantined).sum())
    assert summary.cases_quarantined == int(quarantined.sum())
    assert summary.cases_reused == 0 and summary.cases_computed == summary.cases_audited
    assert summary.rows_read == summary.rows_accepted + summary.rows_quarantined  # DESIGN.md section 4
    info = ResultsStore(store).run_info(summary.run_id)
    assert info["counts"]["cases_audited"] == summary.cases_audited
    n_batches = -(-summary.cases_audited // 4)
    assert ("read", 4, 4) in progress and ("diagnose", n_batches, n_batches) in progress


def test_flow_and_plain_path_write_the_same_store(flow_run, tmp_path):
    store, summary, _, _ = flow_run
    plain = rerun.run_audit([FIXTURE / "data"], tmp_path / "plain", batch_size=4, with_report=False)
    a, b = _tables(store, summary.run_id), _tables(tmp_path / "plain", plain.run_id)
    assert set(a) == set(b) and set(DIAGNOSTIC_TABLES[:2]) <= set(a)
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], obj=name)
    ia, ib = ResultsStore(store).run_info(summary.run_id), ResultsStore(tmp_path / "plain").run_info(plain.run_id)
    for key in ("parameters", "code_version", "input_hashes", "counts", "tables"):
        assert ia[key] == ib[key], key


def test_flow_rerun_reuses_every_case(flow_run, monkeypatch):
    store, first, _, _ = flow_run
    counting = Counting()
    monkeypatch.setattr(audit.diagnose, "diagnose_cases", counting)
    same = review_flow.run_review([FIXTURE / "data"], store, batch_size=4, with_summary=False, with_report=False)
    assert same.unchanged and same.run_id == first.run_id  # nothing new: the flow stops after hashing
    second = review_flow.run_review([FIXTURE / "data"], store, batch_size=4, with_summary=False, with_report=False,
                                    force=True)
    assert counting.calls == []  # nothing recomputed
    assert (second.cases_reused, second.cases_computed) == (first.cases_audited, 0)
    a, b = _tables(store, first.run_id), _tables(store, second.run_id)
    for name in DIAGNOSTIC_TABLES:
        if name in a:
            pd.testing.assert_frame_equal(a[name], b[name], obj=name)


def test_worker_processes_give_the_same_store(flow_run, tmp_path):
    store, first, _, _ = flow_run
    out = review_flow.run_review([FIXTURE / "data"], tmp_path / "procs", batch_size=4, with_report=False, workers=2)
    assert out.cases_computed == first.cases_computed
    a, b = _tables(store, first.run_id), _tables(tmp_path / "procs", out.run_id)
    assert set(a) == set(b)
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], obj=name)
    from flows import workers

    assert workers._pool is None  # the run's pool is gone with the run


def test_dask_runner_gives_the_same_results(flow_run, tmp_path, monkeypatch):
    pytest.importorskip("prefect_dask")
    from prefect_dask import DaskTaskRunner

    store, first, _, _ = flow_run
    counting = Counting()
    monkeypatch.setattr(audit.diagnose, "diagnose_cases", counting)
    runner = DaskTaskRunner(cluster_kwargs={"n_workers": 1, "threads_per_worker": 2, "processes": False,
                                            "dashboard_address": None})
    out = review_flow.run_review([FIXTURE / "data"], tmp_path / "dask", batch_size=4, task_runner=runner,
                                 with_summary=False, with_report=False)
    assert len(counting.calls) == -(-first.cases_audited // 4)  # one call per batch
    assert all("Dask" in name or "dask" in name for name in counting.threads), counting.threads
    a, b = _tables(store, first.run_id), _tables(tmp_path / "dask", out.run_id)
    for name in DIAGNOSTIC_TABLES:
        if name in a:
            pd.testing.assert_frame_equal(a[name], b[name], obj=name)


def test_task_runner_from_spec():
    assert review_flow.task_runner_from_spec(None) is None
    with pytest.raises(ValueError, match="unknown task runner"):
        review_flow.task_runner_from_spec("celery")
    if pytest.importorskip("prefect_dask"):  # the optional 'dask' extra
        runner = review_flow.task_runner_from_spec("dask=tcp://127.0.0.1:8786")
        assert runner.address == "tcp://127.0.0.1:8786"
        local = review_flow.task_runner_from_spec("dask")
        kw = local.cluster_kwargs
        assert local.address is None and kw["processes"] and kw["threads_per_worker"] == 1
        assert kw["host"] == "127.0.0.1" and kw["dashboard_address"] == "127.0.0.1:0"  # loopback only


# ----------------------------------------------------------------------------------- schedule


def test_schedule_definition(tmp_path):
    from cronsim import CronSim

    dep = review_flow.build_deployment([FIXTURE / "data"], tmp_path / "store", "0 3 * * 1", alpha=0.01, batch_size=7)
    (sched,) = dep.schedules
    assert sched.schedule.cron == "0 3 * * 1"
    assert dep.entrypoint == "flows.review.audit_review"
    assert dep.name == review_flow.deployment_name(tmp_path / "store")
    assert dep.parameters == {"inputs": [str((FIXTURE / "data").resolve())], "store": str((tmp_path / "store").resolve()),
                              "alpha": 0.01, "config_file": None, "batch_size": 7, "workers": None}
    two = review_flow.build_deployment([FIXTURE / "data"], tmp_path / "store", "0 3 * * 1", workers=2)
    assert two.parameters["workers"] == 2
    # source: crontab(5) semantics via the cronsim library: minute 0, hour 3, day-of-week 1 = Mondays 03:00
    start = dt.datetime(2026, 1, 1)
    nxt = [d for _, d in zip(range(3), CronSim(sched.schedule.cron, start))]
    assert all(d.weekday() == 0 and (d.hour, d.minute) == (3, 0) for d in nxt)
    with pytest.raises(ValueError, match="invalid cron"):
        review_flow.build_deployment([FIXTURE / "data"], tmp_path / "store", "every monday")


# ----------------------------------------------------------------------------------- server


def _open(req, timeout: float, tries: int = 8):
    """Open a request on the local server. Retries 429/502/503 with backoff, as Prefect's own client does:
    the SQLite-backed server answers 503 while its database is briefly locked by the runner's polling."""
    from flows.server import LOCAL_OPENER

    for attempt in range(tries):
        try:
            with LOCAL_OPENER.open(req, timeout=timeout) as resp:
                return json.loads(resp.read())
        except urllib.error.HTTPError as exc:
            if exc.code not in (429, 502, 503) or attempt == tries - 1:
                raise
            time.sleep(min(0.5 * 2**attempt, 8.0))


def _get(url: str, timeout: float = 5.0):
    return _open(url, timeout)


def _post(url: str, body: dict, timeout: float = 10.0):
    req = urllib.request.Request(url, data=json.dumps(body).encode(), method="POST",
                                 headers={"Content-Type": "application/json"})
    return _open(req, timeout)


def _wait(what: str, check, timeout: float, every: float = 0.5):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            value = check()
        except Exception:  # not there yet (HTTP 404, file missing ...)
            value = None
        if value:
            return value
        time.sleep(every)
    raise AssertionError(f"timed out after {timeout:g} s waiting for {what}")


@pytest.mark.integration
def test_scheduled_deployment_runs_on_a_real_server(tmp_path):
    from audit.cli import main
    from flows.server import free_port, server_status

    home, port = tmp_path / "server-home", free_port()
    api = f"http://127.0.0.1:{port}/api"
    store = tmp_path / "store"
    serve = None
    assert main(["server", "start", "--home", str(home), "--port", str(port)]) == 0
    try:
        assert server_status(home) is not None
        env = {k: v for k, v in os.environ.items() if k not in EPHEMERAL_SERVER and k != "PREFECT_HOME"}
        env.update({"PREFECT_API_URL": api, "SCED_AUDIT_PREFECT_HOME": str(tmp_path / "client-home"),
                    "PREFECT_RUNNER_POLL_FREQUENCY": "1"})
        serve = subprocess.Popen(
            [sys.executable, "-m", "audit.cli", "schedule", str(FIXTURE / "data"), "--store", str(store),
             "--cron", "0 3 * * *", "--name", "itest", "--batch-size", "4"],
            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, start_new_session=True,
        )
        dep = _wait("the deployment", lambda: _get(f"{api}/deployments/name/{review_flow.FLOW_NAME}/itest"), 90)
        crons = [s["schedule"].get("cron") for s in dep.get("schedules", [])]
        assert crons == ["0 3 * * *"]
        run = _post(f"{api}/deployments/{dep['id']}/create_flow_run", {})
        _wait("the run to be committed", lambda: (store / "runs.parquet").is_file(), 150)
        runs = ResultsStore(store).runs()
        assert len(runs) == 1 and int(runs["cases_audited"].iloc[0]) == 12  # fixtures/demo_small/truth.csv
        state = _wait("the flow run to complete",
                      lambda: _get(f"{api}/flow_runs/{run['id']}")["state"]["type"] == "COMPLETED", 30)
        assert state
    finally:
        output = ""
        if serve is not None:
            serve.send_signal(signal.SIGINT)
            try:
                output, _ = serve.communicate(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(serve.pid, signal.SIGKILL)
                output, _ = serve.communicate()
        main(["server", "stop", "--home", str(home)])
    assert server_status(home) is None
    assert "Serving deployment" in output
    assert not [line for line in output.splitlines() if "ERROR" in line or "Traceback" in line], output


def test_summarize_task_gets_the_flows_own_batch_results(prefect_harness, tmp_path, monkeypatch):
    """The summarize task receives the very batch tables the flow collected (not copies of the list
    and its dicts), so the tables it drops as it joins them are freed (memory)."""
    collected, given = [], []
    real_results, real_assemble = rerun.bounded_results, rerun.assemble_tables

    def results_spy(*args, **kw):
        for item in real_results(*args, **kw):
            collected.append(item)
            yield item

    def assemble_spy(review, plan, batch_results, stage=None):
        given.append(batch_results)
        given.append(list(batch_results))
        return real_assemble(review, plan, batch_results, stage)

    monkeypatch.setattr(rerun, "bounded_results", results_spy)
    monkeypatch.setattr(rerun, "assemble_tables", assemble_spy)
    review_flow.run_review([FIXTURE / "data"], tmp_path / "store", batch_size=4, with_report=False)
    assert len(collected) > 1
    assert len(given[1]) == len(collected) and all(a is b for a, b in zip(given[1], collected))
    assert given[0] == []  # emptied by the task: the flow holds no batch tables afterwards
    assert all(len(d) == 0 for d in collected)
