"""Input limits and hostile names.

Limits ([limits] in the config): a file above max_file_bytes and a case above
max_points_per_case are quarantined with a message that says what was exceeded and how to raise
it; the command exits 1 when other input is usable and 2 when nothing is.

Hostile names: study and case ids with path separators, '..', control characters, right-to-left
marks or 10,000 characters never create a file outside the folder it belongs in: validation
writes nothing at all, and a results store (written directly through ``ResultsStore`` and by
``sced-audit run``) writes only under its own folder, with file names made from table names and
run ids alone.  The case key is always 16 hexadecimal digits, whatever the ids.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from audit.cli import main
from audit.config import AuditConfig, ConfigError, parse_config
from audit.ingest import read_input_file
from audit.intake import load_review
from audit.store import ResultsStore
from audit.validation import case_key
from tests.helpers import ab_rows, write_csv

HOSTILE_IDS = [
    "../../etc/passwd",
    "..",
    "../outside",
    "a/b/c",
    "/absolute/path",
    "C:\\Windows\\system32",
    "..\\..\\evil",
    "nul",
    "CON",
    "x\x01\x02\x1f\x7fy",
    "tab\there",
    "\u202eexe.txt",
    "emoji 😀👩‍👩‍👧",
    "~",
    "$HOME",
    "*?<>|\"'",
    "run=20200101T000000000000Z-abcdef",
    ".staging",
    "runs.parquet",
    "<script>alert(1)</script>",
    "=HYPERLINK(\"http://x\")",
    "L" * 10_000,
    "../" * 3000,
]


def _tree(root: Path) -> set[Path]:
    """Every file and folder under root (resolved paths)."""
    return {p.resolve() for p in root.rglob("*")}


def _is_under(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
        return True
    except ValueError:
        return False


def _hostile_review_rows() -> list[str]:
    """CSV lines (quoted) of one clean AB case per hostile id, as study and as case."""
    lines = []
    for i, name in enumerate(HOSTILE_IDS):
        quoted = '"' + name.replace('"', '""') + '"'
        for row in ab_rows(study="S", case=f"c{i}"):
            lines.append(row.replace("S,", f"{quoted},", 1))
        for row in ab_rows(study="T", case=f"c{i}"):
            lines.append(row.replace(f",c{i},", f",{quoted},", 1))
    return lines


# --------------------------------------------------------------------------- limits


def test_file_above_max_file_bytes_is_quarantined_with_a_clear_message(tmp_path, capsys):
    big = write_csv(tmp_path / "data" / "big.csv", ab_rows(case="big") * 20)
    small = write_csv(tmp_path / "data" / "small.csv", ab_rows(case="small"))
    limit = small.stat().st_size + 10
    assert big.stat().st_size > limit
    cfg = parse_config({"limits": {"max_file_bytes": limit}})
    read = read_input_file(big, cfg)
    assert [p.rule for p in read.problems] == ["file_too_large"] and len(read.rows) == 0
    message = read.problems[0].message
    assert str(big) in message and f"{big.stat().st_size:,} bytes" in message and f"{limit:,}" in message
    assert "max_file_bytes" in message  # says how to raise it

    prep = load_review([tmp_path / "data"], cfg).prepared
    q = prep.quarantine
    entry = q[q["rule"] == "file_too_large"].iloc[0]
    assert entry["level"] == "file" and entry["source_file"] == str(big)
    assert prep.rows_accepted == 10 and prep.rows_read == prep.rows_accepted + prep.rows_quarantined

    config_file = tmp_path / "limits.toml"
    config_file.write_text(f"[limits]\nmax_file_bytes = {limit}\n")
    assert main(["validate", str(tmp_path / "data"), "--config", str(config_file)]) == 1  # the small file is usable
    assert "file_too_large" not in capsys.readouterr().err
    assert main(["validate", str(big), "--config", str(config_file)]) == 2  # nothing usable
    out = capsys.readouterr().out
    assert "above the limit" in out and "max_file_bytes" in out


def test_case_above_max_points_per_case_is_quarantined_with_a_clear_message(tmp_path, capsys):
    f = write_csv(tmp_path / "a.csv", ab_rows(case="long", n_a=30, n_b=30) + ab_rows(case="short"))
    cfg = parse_config({"limits": {"max_points_per_case": 50}})
    prep = load_review([f], cfg).prepared
    q = prep.quarantine
    entry = q[q["rule"] == "too_many_points"]
    assert len(entry) == 1
    entry = entry.iloc[0]
    assert entry["level"] == "case" and entry["case"] == "long" and entry["source_file"] == str(f)
    assert entry["n_rows"] == 60 and entry["rows"] == "2-61"
    assert "60 points" in entry["message"] and "limit of 50" in entry["message"]
    assert "max_points_per_case" in entry["message"]
    assert set(prep.cases["case"]) == {"short"}
    assert prep.rows_read == 70 == prep.rows_accepted + prep.rows_quarantined

    config_file = tmp_path / "limits.toml"
    config_file.write_text("[limits]\nmax_points_per_case = 50\n")
    assert main(["validate", str(f), "--config", str(config_file), "--json"]) == 1
    doc = json.loads(capsys.readouterr().out)
    assert doc["quarantined_cases"][0]["rule"] == "too_many_points"
    only_long = write_csv(tmp_path / "b.csv", ab_rows(case="long", n_a=30, n_b=30))
    assert main(["validate", str(only_long), "--config", str(config_file)]) == 2


def test_limits_at_the_boundary_are_inclusive(tmp_path):
    f = write_csv(tmp_path / "a.csv", ab_rows(n_a=5, n_b=5))
    exact = parse_config({"limits": {"max_file_bytes": f.stat().st_size, "max_points_per_case": 10}})
    prep = load_review([f], exact).prepared
    assert prep.rows_accepted == 10 and len(prep.quarantine) == 0


def test_default_limits_are_generous_and_documented():
    limits = AuditConfig().limits
    assert limits.max_file_bytes >= 100_000_000 and limits.max_points_per_case >= 1_000


@pytest.mark.parametrize("limits", [
    {"max_file_bytes": "a lot"},
    {"max_points_per_case": [1, 2]},
    {"max_file_bytes": 0},
    {"max_points_per_case": -1},
    {"max_points_per_case": 0},
])
def test_unusable_limits_are_config_errors(limits, tmp_path, capsys):
    with pytest.raises(ConfigError, match=r"\[limits\]"):
        parse_config({"limits": limits})
    config_file = tmp_path / "bad.toml"
    value = limits[next(iter(limits))]
    config_file.write_text(f"[limits]\n{next(iter(limits))} = {json.dumps(value)}\n")
    f = write_csv(tmp_path / "a.csv", ab_rows())
    assert main(["validate", str(f), "--config", str(config_file)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "[limits]" in err[0]


def test_field_longer_than_the_csv_field_limit_is_a_file_problem_not_a_crash(tmp_path):
    f = tmp_path / "huge_field.csv"
    f.write_text("study,case,session,outcome,phase\n" + "S," + "x" * 200_000 + ",1,2,A\n")
    prep = load_review([f], AuditConfig()).prepared
    assert prep.rows_read == prep.rows_accepted + prep.rows_quarantined
    assert len(prep.quarantine) >= 1 and (prep.quarantine["source_file"] == str(f)).all()


# --------------------------------------------------------------------------- hostile names


@pytest.fixture
def hostile_input(tmp_path):
    data = tmp_path / "work" / "data"
    f = write_csv(data / "hostile.csv", _hostile_review_rows())
    return f


def test_hostile_ids_are_read_exactly_and_validation_writes_nothing(hostile_input, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(hostile_input.parent)
    before = _tree(tmp_path)
    review = load_review([hostile_input], AuditConfig())
    prep = review.prepared
    assert prep.rows_read == 20 * len(HOSTILE_IDS)
    studies = set(prep.cases["study"])
    cases = set(prep.cases["case"])
    for name in HOSTILE_IDS:
        expected = name.strip()
        assert expected in studies and expected in cases, repr(name[:40])
    assert prep.rows_accepted == prep.rows_read  # hostile names are not a reason to refuse data
    assert main(["validate", str(hostile_input)]) == 0
    assert main(["validate", str(hostile_input), "--json"]) == 0
    capsys.readouterr()
    assert _tree(tmp_path) == before, "validation created files"


def test_results_store_writes_only_under_its_folder(hostile_input, tmp_path, monkeypatch):
    monkeypatch.chdir(hostile_input.parent)
    review = load_review([hostile_input], AuditConfig())
    prep = review.prepared
    store_dir = tmp_path / "work" / "store"
    sentinel = tmp_path / "outside.txt"
    sentinel.write_text("untouched")
    before = _tree(tmp_path)
    store = ResultsStore(store_dir)
    hostile = {name[:200]: name for name in HOSTILE_IDS}
    with store.begin_run(parameters={"note": HOSTILE_IDS, **{k: 1 for k in hostile}}, code_version="../../x",
                         input_hashes={name: "0" * 64 for name in HOSTILE_IDS}) as run:
        run.write_table("observations", prep.observations)
        run.write_table("cases", prep.cases)
        run.write_table("quarantine", prep.quarantine)
        for bad in ("../evil", "..", "a/b", "/tmp/evil", "cases/../../x", "", "Cases", "x" * 65, "t\x00"):
            with pytest.raises(ValueError, match="invalid table name"):
                run.write_table(bad, prep.cases)
        run_id = run.commit(counts={"rows_read": prep.rows_read, **{k: 1 for k in hostile}})
    created = _tree(tmp_path) - before
    assert created, "the store wrote nothing"
    outside = [p for p in created if not _is_under(p, store_dir)]
    assert outside == []
    assert sentinel.read_text() == "untouched"
    for p in created:  # file names come from table names and run ids only
        rel = p.relative_to(store_dir.resolve())
        for part in rel.parts:
            assert part in {"runs.parquet", ".lock", "part-0.parquet", ".staging"} or \
                part in {"observations", "cases", "quarantine"} or part == f"run={run_id}", part
    # read back: every id exactly as written, through the safe reader and a plain folder read
    back = store.table("cases", run=run_id)
    assert sorted(back["case"]) == sorted(prep.cases["case"])
    assert set(pd.read_parquet(store_dir / "cases")["study"]) == set(prep.cases["study"])
    info = store.run_info(run_id)
    assert set(json.loads(info["input_hashes"]) if isinstance(info["input_hashes"], str)
               else info["input_hashes"]) == set(HOSTILE_IDS)
    # filters with hostile values are plain comparisons
    one = store.table("cases", run=run_id, case="../../etc/passwd")
    assert len(one) == 1 and one["case"].iloc[0] == "../../etc/passwd"


@pytest.mark.filterwarnings("ignore:Glyph .* missing from font:UserWarning")  # control characters in figure labels
def test_run_command_with_hostile_ids_writes_only_into_its_store(hostile_input, tmp_path, monkeypatch, capsys):
    """The whole pipeline (sequential path) with its HTML report: files only under --store."""
    monkeypatch.chdir(hostile_input.parent)
    store_dir = tmp_path / "work" / "store"
    before = _tree(tmp_path)
    code = main(["run", str(hostile_input), "--store", str(store_dir), "--no-prefect"])
    out = capsys.readouterr()
    assert code in (0, 1), out.err
    created = _tree(tmp_path) - before
    outside = [p for p in created if not _is_under(p, store_dir)]
    assert outside == [], outside
    reports = list(store_dir.glob("*.html"))
    for report in reports:
        html = report.read_text(encoding="utf-8")
        assert "<script>alert(1)</script>" not in html  # ids are escaped in the report


# --------------------------------------------------------------------------- case_key


@settings(max_examples=200, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(study=st.text(), case=st.text(), series=st.text())
def test_case_key_is_always_16_hex_digits(study, case, series):
    key = case_key(pd.Series([study]), pd.Series([case]), pd.Series([series])).iloc[0]
    assert isinstance(key, str) and len(key) == 16 and all(ch in "0123456789abcdef" for ch in key)


def test_case_key_of_hostile_ids_through_validation(hostile_input):
    prep = load_review([hostile_input], AuditConfig()).prepared
    keys = prep.cases["case_key"]
    assert keys.str.fullmatch(r"[0-9a-f]{16}").all() and keys.is_unique
    assert prep.observations["case_key"].str.fullmatch(r"[0-9a-f]{16}").all()


def test_case_key_separates_ids_that_only_differ_in_where_a_separator_falls():
    a = case_key(pd.Series(["a/b"]), pd.Series(["c"]), pd.Series([""])).iloc[0]
    b = case_key(pd.Series(["a"]), pd.Series(["b/c"]), pd.Series([""])).iloc[0]
    c = case_key(pd.Series(["a\x1fb"]), pd.Series(["c"]), pd.Series([""])).iloc[0]
    d = case_key(pd.Series(["a"]), pd.Series(["b\x1fc"]), pd.Series([""])).iloc[0]
    assert len({a, b}) == 2
    assert c != d or pytest.fail("the unit separator inside an id makes two different cases share a key")


def test_case_key_does_not_depend_on_numpy_or_object_dtype():
    s = pd.Series(np.array(["x", "y"], dtype=object))
    k1 = case_key(s, s, pd.Series(["", ""]))
    k2 = case_key(pd.Series(["x", "y"], dtype="string"), pd.Series(["x", "y"], dtype="string"),
                  pd.Series(["", ""], dtype="string"))
    assert k1.tolist() == k2.tolist()


def test_no_environment_variables_are_expanded_in_names(tmp_path, monkeypatch):
    monkeypatch.setenv("HOME", str(tmp_path / "fake-home"))
    f = write_csv(tmp_path / "a.csv", [r.replace("S1,", "$HOME,", 1) for r in ab_rows()])
    prep = load_review([f], AuditConfig()).prepared
    assert set(prep.cases["study"]) == {"$HOME"}
    assert not (tmp_path / "fake-home").exists()
    assert os.environ["HOME"] == str(tmp_path / "fake-home")
