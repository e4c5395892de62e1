"""The command line: validate output, JSON document and exit codes (0 usable, 1 quarantine, 2 unusable)."""

from __future__ import annotations

import json
import subprocess
import sys

from audit.cli import main
from tests.helpers import ab_rows, write_csv


def test_validate_clean_input_exits_0(tmp_path, capsys):
    write_csv(tmp_path / "a.csv", ab_rows())
    assert main(["validate", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "10 read = 10 accepted + 0 quarantined" in out


def test_validate_with_quarantine_exits_1_and_lists_problems(tmp_path, capsys):
    write_csv(tmp_path / "a.csv", ab_rows() + ab_rows(case="short", n_a=2))
    assert main(["validate", str(tmp_path / "a.csv")]) == 1
    out = capsys.readouterr().out
    assert "phase 'A'" in out and "has 2 point(s)" in out


def test_validate_json_document(tmp_path, capsys):
    lines = ab_rows() + ab_rows(case="short", n_a=2)
    lines[1] = lines[1].replace(",2,", ",2.1,")
    write_csv(tmp_path / "a.csv", lines)
    assert main(["validate", str(tmp_path), "--json"]) == 1
    doc = json.loads(capsys.readouterr().out)
    assert doc["rows_read"] == 17 and doc["rows_accepted"] == 10 and doc["rows_quarantined"] == 7
    assert doc["cases_accepted"] == 1 and doc["cases_quarantined"] == 1
    assert doc["quarantined_cases"][0]["rule"] == "phase_too_short"
    assert doc["adjustments"][0]["rule"] == "session_snapped"


def test_no_such_path_exits_2_with_one_line(tmp_path, capsys):
    assert main(["validate", str(tmp_path / "missing")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no such file or folder" in err[0]


def test_nothing_readable_exits_2(tmp_path, capsys):
    (tmp_path / "x.csv").write_bytes(b"\x00\x01")
    assert main(["validate", str(tmp_path)]) == 2


def test_bad_config_exits_2(tmp_path, capsys):
    write_csv(tmp_path / "a.csv", ab_rows())
    cfg = tmp_path / "c.toml"
    cfg.write_text('[phases]\n"X" = "sometimes"\n')
    assert main(["validate", str(tmp_path / "a.csv"), "--config", str(cfg)]) == 2
    assert "must be 'baseline' or 'treatment'" in capsys.readouterr().err


def test_console_script_runs_without_traceback(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "audit.cli", "validate", str(tmp_path / "nope")],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
