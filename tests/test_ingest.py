"""Readers for every format and encoding, folder search, and whole-file problems."""

from __future__ import annotations

import pandas as pd
import pytest

from audit.config import AuditConfig, parse_config
from audit.ingest import find_input_files, read_input_file
from audit.intake import load_review
from tests.helpers import HEADER, ab_rows, write_csv

CFG = AuditConfig()


def test_comma_csv_keeps_origin(tmp_path):
    f = write_csv(tmp_path / "a.csv", ab_rows())
    read = read_input_file(f, CFG)
    assert read.problems == []
    assert len(read.rows) == 10
    assert read.rows["source_row"].tolist() == list(range(2, 12))  # header is row 1
    assert set(read.rows["source_file"]) == {str(f)}
    assert read.details["encoding"] == "utf-8"


def test_utf8_bom_is_stripped_from_first_header(tmp_path):
    f = tmp_path / "bom.csv"
    f.write_bytes(b"\xef\xbb\xbf" + ("\n".join([HEADER] + ab_rows()) + "\n").encode("utf-8"))
    read = read_input_file(f, CFG)
    assert read.problems == []
    assert read.rows["study"].tolist()[0] == "S1"


def test_latin1_fallback(tmp_path):
    f = write_csv(tmp_path / "latin.csv", ab_rows(study="Étude"), encoding="latin-1")
    read = read_input_file(f, CFG)
    assert read.details["encoding"] == "latin-1"
    assert read.rows["study"].iloc[0] == "Étude"


def test_semicolon_and_decimal_comma(tmp_path):
    lines = [r.replace(",", ";") for r in ab_rows()]
    lines = [ln.replace(";10.0;", ";10.5;").replace(".", ",") for ln in lines]
    f = write_csv(tmp_path / "semi.csv", lines, header=HEADER.replace(",", ";"))
    review = load_review([f], CFG)
    assert review.files[0].details["delimiter"] == ";"
    assert review.files[0].details["decimal"] == ","
    obs = review.prepared.observations
    assert 10.5 in obs["outcome"].tolist()
    assert review.prepared.rows_accepted == 10


def test_tsv_and_txt_tab(tmp_path):
    lines = [r.replace(",", "\t") for r in ab_rows()]
    f = write_csv(tmp_path / "t.tsv", lines, header=HEADER.replace(",", "\t"))
    read = read_input_file(f, CFG)
    assert read.details["delimiter"] == "\t"
    assert len(read.rows) == 10


def test_xlsx_every_sheet(tmp_path):
    f = tmp_path / "book.xlsx"
    a = pd.DataFrame([r.split(",") for r in ab_rows(case="c1")], columns=HEADER.split(","))
    b = pd.DataFrame([r.split(",") for r in ab_rows(case="c2")], columns=HEADER.split(","))
    b["session"] = b["session"].astype(int)
    b["outcome"] = b["outcome"].astype(float)
    with pd.ExcelWriter(f) as xw:
        a.to_excel(xw, sheet_name="first", index=False)
        b.to_excel(xw, sheet_name="second", index=False)
    read = read_input_file(f, CFG)
    assert read.problems == []
    assert sorted(set(read.rows["source_sheet"])) == ["first", "second"]
    assert read.rows.loc[read.rows["source_sheet"] == "second", "source_row"].tolist() == list(range(2, 12))
    review = load_review([f], CFG)
    assert len(review.prepared.cases) == 2


def test_parquet(tmp_path):
    f = tmp_path / "p.parquet"
    df = pd.DataFrame([r.split(",") for r in ab_rows()], columns=HEADER.split(","))
    df["session"] = df["session"].astype(int)
    df["outcome"] = df["outcome"].astype(float)
    df.to_parquet(f)
    review = load_review([f], CFG)
    assert review.prepared.rows_accepted == 10
    assert review.prepared.observations["source_row"].tolist() == list(range(1, 11))


def test_folder_searched_recursively_hidden_skipped(tmp_path):
    write_csv(tmp_path / "a" / "b" / "deep.csv", ab_rows(case="deep"))
    write_csv(tmp_path / ".hidden" / "x.csv", ab_rows(case="hidden"))
    (tmp_path / "notes.md").write_text("not data")
    files, problems = find_input_files([tmp_path])
    assert [f.name for f in files] == ["deep.csv"]
    assert problems == []


def test_missing_path_is_a_problem_not_an_exception(tmp_path):
    files, problems = find_input_files([tmp_path / "nope"])
    assert files == [] and problems[0].rule == "path_not_found"


@pytest.mark.parametrize(
    "content,rule",
    [
        (b"", "empty_file"),
        (HEADER.encode() + b"\n", "empty_file"),
        (b"\x00\x01\x02binary\x00", "not_a_text_table"),
    ],
)
def test_unusable_text_files(tmp_path, content, rule):
    f = tmp_path / "bad.csv"
    f.write_bytes(content)
    read = read_input_file(f, CFG)
    assert [p.rule for p in read.problems] == [rule]
    assert len(read.rows) == 0


def test_damaged_spreadsheet_and_parquet(tmp_path):
    for name, rule in (("x.xlsx", "unreadable_spreadsheet"), ("x.parquet", "unreadable_parquet")):
        f = tmp_path / name
        f.write_bytes(b"this is not that format")
        read = read_input_file(f, CFG)
        assert [p.rule for p in read.problems] == [rule]


def test_missing_required_column_quarantines_file_and_counts_rows(tmp_path):
    f = write_csv(tmp_path / "m.csv", [",".join(r.split(",")[:4]) for r in ab_rows()], header="study,case,session,outcome")
    good = write_csv(tmp_path / "good.csv", ab_rows(case="ok"))
    review = load_review([f, good], CFG)
    prep = review.prepared
    q = prep.quarantine
    entry = q[q["rule"] == "missing_required_column"].iloc[0]
    assert entry["level"] == "file" and entry["n_rows"] == 10
    assert "phase" in entry["message"] and "[columns]" in entry["message"]
    assert prep.rows_read == 20 and prep.rows_accepted == 10 and prep.rows_quarantined == 10


def test_column_and_phase_map_from_config(tmp_path):
    lines = [r.replace(",A", ",Pre").replace(",B", ",Coach") for r in ab_rows()]
    f = write_csv(tmp_path / "m.csv", lines, header="Report,Participant,Day,Score,Stage")
    cfg = parse_config({
        "columns": {"study": "Report", "case": "participant", "session": "Day", "outcome": "Score", "phase": "Stage"},
        "phases": {"Coach": "treatment"},
    })
    review = load_review([f], cfg)
    prep = review.prepared
    assert prep.rows_accepted == 10
    assert set(prep.observations["condition"]) == {"baseline", "treatment"}  # 'Pre' is a baseline word


def test_case_insensitive_column_names(tmp_path):
    f = write_csv(tmp_path / "u.csv", ab_rows(), header="Study,CASE,Session,Outcome,Phase")
    assert load_review([f], CFG).prepared.rows_accepted == 10


def test_ragged_row_is_quarantined(tmp_path):
    rows = ab_rows()
    rows[2] = rows[2] + ",surplus"
    f = write_csv(tmp_path / "r.csv", rows)
    prep = load_review([f], CFG).prepared
    row = prep.quarantine[prep.quarantine["level"] == "row"].iloc[0]
    assert row["rule"] == "extra_fields" and row["rows"] == "4"
