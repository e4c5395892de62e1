"""The run-related commands: run (closing line, exit codes, progress), runs, demo, schedule and server errors.

Exit codes (audit/cli.py): 0 ok, 1 ok with quarantined data, 2 bad invocation or unusable input.
Case counts are checked against the fixture's generating table fixtures/demo_small/truth.csv.
In-process runs use --no-prefect (the flow itself is tested in test_flows.py); one subprocess
runs the real command with Prefect's embedded server and checks its output is clean.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from audit.cli import Progress, main
from audit.store import ResultsStore
from tests.helpers import ab_rows, write_csv

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "demo_small"
CLOSING = re.compile(
    r"^Audited (\d+) case\(s\): (\d+) reused, (\d+) computed; (\d+) quarantined; (\d+|n/a) flip\(s\)\. "
    r"Results: (.+) \(run (\S+)\)"
)


def _truth():
    truth = pd.read_csv(FIXTURE / "truth.csv")
    q = truth["expected_quarantine"].astype(str).str.lower().isin(["true", "1"])
    return int((~q).sum()), int(q.sum())


def _closing(out: str) -> re.Match:
    lines = [m for line in out.splitlines() if (m := CLOSING.match(line))]
    assert len(lines) == 1, out
    return lines[0]


def test_run_closing_line_and_exit_1_with_quarantine(tmp_path, capsys):
    store = tmp_path / "store"
    code = main(["run", str(FIXTURE / "data"), "--store", str(store), "--no-prefect", "--no-report"])
    out, err = capsys.readouterr()
    assert code == 1  # the fixture has one deliberately short case (quarantined)
    m = _closing(out)
    n_ok, n_q = _truth()  # source: fixtures/demo_small/truth.csv
    assert (int(m[1]), int(m[2]), int(m[3]), int(m[4])) == (n_ok, 0, n_ok, n_q)
    assert Path(m[6]) == store and m[7] == ResultsStore(store).latest_run_id()
    cases = ResultsStore(store).table("cases")
    if m[5] != "n/a":
        assert int(m[5]) == int(cases["flip_any"].sum())
    assert "diagnosing cases:" in err and "Traceback" not in err

    # the same inputs again: nothing to do, no new run, the same exit code
    code = main(["run", str(FIXTURE / "data"), "--store", str(store), "--no-prefect", "--no-report"])
    out = capsys.readouterr().out
    assert code == 1 and out.startswith(f"No change since run {m[7]}: same input files")
    assert len(ResultsStore(store).runs()) == 1
    code = main(["run", str(FIXTURE / "data"), "--store", str(store), "--no-report", "--no-prefect", "--force"])
    m2 = _closing(capsys.readouterr().out)
    assert code == 1 and (int(m2[2]), int(m2[3])) == (n_ok, 0)  # forced second run: everything reused

    assert main(["runs", "--store", str(store)]) == 0
    out = capsys.readouterr().out
    assert m[7] in out and m2[7] in out and "2 committed run(s)" in out

    assert main(["summary", "--store", str(store), "--by", "study"]) == 0
    out = capsys.readouterr().out
    assert "pooled AR(1) coefficient" in out and "Caution" in out
    assert main(["summary", "--store", str(store), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["overall"][0]["n_cases"] == n_ok
    report = tmp_path / "r.html"
    assert main(["report", "--store", str(store), "--out", str(report)]) == 0
    assert report.read_text(encoding="utf-8").lstrip().lower().startswith("<!doctype html")
    assert main(["summary", "--store", str(tmp_path / "empty")]) == 2


def test_run_clean_input_exits_0(tmp_path, capsys):
    write_csv(tmp_path / "in" / "a.csv", ab_rows() + ab_rows(case="c2", b_level=12.0))
    code = main(["run", str(tmp_path / "in"), "--store", str(tmp_path / "store"), "--no-prefect", "--no-report",
                 "--alpha", "0.01"])
    out = capsys.readouterr().out
    assert code == 0
    assert _closing(out)[1] == "2"
    assert ResultsStore(tmp_path / "store").run_info()["parameters"]["alpha"] == 0.01


@pytest.mark.parametrize(
    "argv, message",
    [
        (["run", "{tmp}/missing", "--store", "{tmp}/s", "--no-prefect"], "no such file or folder"),
        (["run", "{data}", "--store", "{tmp}/s", "--no-prefect", "--alpha", "2"], "alpha must be"),
        (["run", "{data}", "--store", "{tmp}/s", "--no-prefect", "--batch-size", "0"], "--batch-size"),
        (["run", "{data}", "--store", "{tmp}/s", "--no-prefect", "--task-runner", "dask"], "--task-runner needs"),
        (["run", "{data}", "--store", "{tmp}/s", "--no-prefect", "--config", "{tmp}/none.toml"], "does not exist"),
        (["runs", "--store", "{tmp}/empty"], "no committed run"),
    ],
)
def test_bad_invocations_exit_2_in_one_line(tmp_path, capsys, argv, message):
    argv = [a.format(tmp=tmp_path, data=FIXTURE / "data") for a in argv]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0] and "Traceback" not in err[0]


def test_nothing_usable_exits_2(tmp_path, capsys):
    write_csv(tmp_path / "in" / "a.csv", ab_rows(n_a=2))  # a 2-point phase: the only case is quarantined
    assert main(["run", str(tmp_path / "in"), "--store", str(tmp_path / "s"), "--no-prefect"]) == 2
    assert "nothing usable" in capsys.readouterr().err
    assert not (tmp_path / "s" / "runs.parquet").exists()


def test_schedule_without_a_server_exits_2(tmp_path, capsys, monkeypatch):
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    monkeypatch.setenv("SCED_AUDIT_SERVER_HOME", str(tmp_path / "no-server"))
    code = main(["schedule", str(FIXTURE / "data"), "--store", str(tmp_path / "s"), "--cron", "0 3 * * *"])
    assert code == 2
    assert "sced-audit server start" in capsys.readouterr().err


def test_server_status_when_none_runs(tmp_path, capsys, monkeypatch):
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    assert main(["server", "status", "--home", str(tmp_path / "h")]) == 1
    assert "No Prefect server" in capsys.readouterr().out
    assert main(["server", "stop", "--home", str(tmp_path / "h")]) == 0


def test_demo_writes_a_store_inside_the_demo_folder(tmp_path, capsys):
    folder = tmp_path / "demo"
    assert main(["demo", "--dir", str(folder), "--no-prefect"]) == 0
    out = capsys.readouterr().out
    m = _closing(out)
    assert Path(m[6]) == folder / "store" and (folder / "store" / "runs.parquet").is_file()
    assert "Caution" in out and len(out.splitlines()) < 15  # short: no per-file validation table
    # a second demo in the same folder writes the same (invented) data again: nothing new to run
    assert main(["demo", "--dir", str(folder), "--no-prefect"]) == 0
    out = capsys.readouterr().out
    assert f"No change since run {m[7]}" in out and "Caution" in out
    assert len(ResultsStore(folder / "store").runs()) == 1


def test_progress_lines_when_not_a_terminal(capsys):
    import io

    stream = io.StringIO()
    p = Progress(stream)
    for i in range(0, 9):
        p("diagnose", i, 8)
    p.close()
    lines = stream.getvalue().splitlines()
    assert lines[0] == "diagnosing cases: 0/8 batch(es)" and lines[-1] == "diagnosing cases: 8/8 batch(es)"
    assert len(lines) == 5  # start, each quarter


def test_prefect_run_in_a_subprocess_is_clean(tmp_path):
    """The real command on Prefect's embedded server: closing line, exit 1, no ERROR line, no traceback."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_") and k != "DO_NOT_TRACK"}
    env["SCED_AUDIT_PREFECT_HOME"] = str(tmp_path / "prefect-home")
    store = tmp_path / "store"
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "audit.cli", "run", str(FIXTURE / "data"), "--store", str(store), "--batch-size", "4",
         "--no-report"],
        env=env, capture_output=True, text=True, timeout=300,
    )
    elapsed = time.perf_counter() - t0
    assert proc.returncode == 1, proc.stderr
    m = _closing(proc.stdout)
    assert int(m[1]) == _truth()[0]
    output = proc.stdout + proc.stderr
    assert not [line for line in output.splitlines() if "ERROR" in line or "Traceback" in line], output
    assert (tmp_path / "prefect-home").is_dir()  # the isolated Prefect home was used
    print(f"embedded-server CLI run: {elapsed:.1f} s")
