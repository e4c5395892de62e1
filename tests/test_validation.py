"""Every repair with its log, every validation rule with a failing example, and row accounting."""

from __future__ import annotations

import pandas as pd
import pytest

from audit.config import AuditConfig, parse_config
from audit.intake import load_review
from schemas.tables import Observations
from tests.helpers import ab_rows, write_csv

CFG = AuditConfig()
HEADER6 = "study,case,session,outcome,phase,outcome_scale"


def prepared(tmp_path, lines, header="study,case,session,outcome,phase", config=CFG, name="in.csv"):
    return load_review([write_csv(tmp_path / name, lines, header=header)], config).prepared


def rules(prep):
    return set(prep.quarantine["rule"])


def assert_accounting(prep):
    assert prep.rows_read == prep.rows_accepted + prep.rows_quarantined


# ------------------------------------------------------------------ repairs

def test_sessions_near_whole_numbers_snap_and_are_logged(tmp_path):
    lines = ab_rows()
    lines[1] = lines[1].replace(",2,", ",2.12,")
    lines[6] = lines[6].replace(",7,", ",6.9,")
    prep = prepared(tmp_path, lines)
    assert prep.observations["session"].tolist() == [float(i) for i in range(1, 11)]
    adj = prep.adjustments
    assert list(adj["rule"]) == ["session_snapped", "session_snapped"]
    assert list(adj["source_row"]) == [3, 8]
    assert list(adj["old_value"]) == ["2.12", "6.9"] and list(adj["new_value"]) == ["2.0", "7.0"]
    assert prep.observations["adjusted"].sum() == 2
    assert_accounting(prep)


def test_snap_that_would_merge_sessions_quarantines_the_case(tmp_path):
    lines = ab_rows()
    lines[1] = lines[1].replace(",2,", ",1.9,")
    lines[2] = lines[2].replace(",3,", ",2.1,")  # 1.9 and 2.1 both snap to 2
    lines[0] = lines[0].replace(",1,", ",1.1,")
    prep = prepared(tmp_path, lines)
    assert "session_snap_conflict" in rules(prep)
    assert prep.rows_accepted == 0
    assert_accounting(prep)


def test_sessions_far_from_whole_numbers_are_left_alone(tmp_path):
    lines = ab_rows()
    lines[3] = lines[3].replace(",4,", ",4.5,")
    prep = prepared(tmp_path, lines)
    assert 4.5 in prep.observations["session"].tolist()
    assert len(prep.adjustments) == 0


def test_percent_slightly_out_of_range_clips_and_is_logged(tmp_path):
    lines = [r + ",percent" for r in ab_rows(a_level=0.0, b_level=98.0)]
    lines[0] = lines[0].replace(",0.0,", ",-0.6,")
    lines[9] = lines[9].replace(",99.0,", ",100.8,")
    prep = prepared(tmp_path, lines, header=HEADER6)
    adj = prep.adjustments
    assert sorted(adj["new_value"]) == ["0.0", "100.0"]
    assert set(adj["rule"]) == {"percent_clipped"}
    assert prep.observations["outcome"].between(0, 100).all()


def test_percent_far_out_of_range_quarantines(tmp_path):
    lines = [r + ",percent" for r in ab_rows(b_level=98.0)]
    lines[9] = lines[9].replace(",99.0,", ",140,")
    prep = prepared(tmp_path, lines, header=HEADER6)
    assert "out_of_range" in rules(prep)
    assert prep.rows_accepted == 0


def test_negative_count_quarantines(tmp_path):
    lines = [r + ",count" for r in ab_rows()]
    lines[0] = lines[0].replace(",10.0,", ",-3,")
    assert "negative_value" in rules(prepared(tmp_path, lines, header=HEADER6))


def test_exact_duplicate_collapses_and_counts_both_rows(tmp_path):
    lines = ab_rows()
    lines.insert(3, lines[2])
    prep = prepared(tmp_path, lines)
    assert len(prep.observations) == 10
    assert prep.rows_accepted == 11  # the collapsed row is represented by the kept point
    adj = prep.adjustments
    assert list(adj["rule"]) == ["duplicate_collapsed"]
    assert adj["old_value"].iloc[0] == "exact duplicate of row 4"
    assert_accounting(prep)


def test_same_session_different_outcome_quarantines(tmp_path):
    lines = ab_rows()
    lines.insert(3, lines[2].replace(",12.0,", ",13.0,"))
    prep = prepared(tmp_path, lines)
    assert "duplicate_session" in rules(prep)
    assert_accounting(prep)


# ------------------------------------------------------------------ rules

def test_phase_with_two_points_quarantines_case(tmp_path):
    prep = prepared(tmp_path, ab_rows(n_a=2) + ab_rows(case="ok"))
    q = prep.quarantine
    assert "phase_too_short" in rules(prep)
    assert q.loc[q["rule"] == "phase_too_short", "case"].iloc[0] == "c1"
    assert list(prep.cases["case"]) == ["ok"]
    assert_accounting(prep)


def test_three_or_four_points_flag_below_standard(tmp_path):
    prep = prepared(tmp_path, ab_rows(n_a=3) + ab_rows(case="five"))
    flags = dict(zip(prep.cases["case"], prep.cases["below_five_point_standard"]))
    assert flags == {"c1": True, "five": False}


def test_case_needs_baseline_and_treatment(tmp_path):
    lines = [r.replace(",B", ",A") for r in ab_rows()]
    assert "missing_treatment_phase" in rules(prepared(tmp_path, lines))


def test_ambiguous_phase_label_asks_for_a_map(tmp_path):
    lines = [r.replace(",B", ",Maintenance-ish") for r in ab_rows()]
    prep = prepared(tmp_path, lines)
    q = prep.quarantine
    msg = q.loc[q["rule"] == "ambiguous_phase_label", "message"].iloc[0]
    assert "[phases]" in msg and "Maintenance-ish" in msg
    ok = prepared(tmp_path, lines, config=parse_config({"phases": {"maintenance-ish": "treatment"}}), name="b.csv")
    assert ok.rows_accepted == 10


@pytest.mark.parametrize("bad,rule", [("abc", "not_a_number"), ("inf", "not_finite"), ("", "not_a_number"), ("nan", "not_a_number")])
def test_non_finite_outcome_quarantines_row_and_its_case(tmp_path, bad, rule):
    lines = ab_rows() + ab_rows(case="ok")
    lines[4] = lines[4].replace(",11.0,", f",{bad},")
    prep = prepared(tmp_path, lines)
    q = prep.quarantine
    row = q[q["level"] == "row"].iloc[0]
    assert row["rule"] == rule and row["rows"] == "6" and row["column"] == "outcome"
    assert "row 6" in row["message"]
    assert "case_has_invalid_rows" in rules(prep)
    assert list(prep.cases["case"]) == ["ok"]
    assert prep.rows_quarantined == 10
    assert_accounting(prep)


def test_missing_ids_and_unknown_labels_are_row_problems(tmp_path):
    lines = [r + ",percent" for r in ab_rows()]
    lines[0] = lines[0].replace("S1,", ",", 1)
    lines[1] = lines[1].replace(",percent", ",furlongs")
    prep = prepared(tmp_path, lines, header=HEADER6)
    row_rules = set(prep.quarantine.loc[prep.quarantine["level"] == "row", "rule"])
    assert row_rules == {"missing_id", "unknown_value"}
    assert_accounting(prep)


def test_inconsistent_design_within_case(tmp_path):
    lines = [r + (",AB" if i < 5 else ",ABAB") for i, r in enumerate(ab_rows())]
    prep = prepared(tmp_path, lines, header="study,case,session,outcome,phase,design")
    assert "inconsistent_case_attribute" in rules(prep)


def test_alternating_design_counts_points_per_condition(tmp_path):
    conds = ["A", "A", "A", "B", "A", "B", "A", "B", "B"]
    lines = [f"S1,alt,{i + 1},{5 + i},{c},alternating" for i, c in enumerate(conds)]
    prep = prepared(tmp_path, lines, header="study,case,session,outcome,phase,design")
    assert prep.rows_accepted == 9
    lines_short = [f"S1,alt,{i + 1},{5 + i},{c},alternating" for i, c in enumerate(["A", "A", "A", "B", "A", "B"])]
    prep2 = prepared(tmp_path, lines_short, header="study,case,session,outcome,phase,design", name="b.csv")
    assert "condition_too_short" in rules(prep2)


def test_unsorted_input_is_ordered_by_session_and_phases_are_numbered(tmp_path):
    lines = ab_rows(n_a=3, n_b=3) + [r.replace(",A", ",A2").replace(",B", ",B2") for r in ab_rows(n_a=3, n_b=3, start=7)]
    prep = prepared(tmp_path, list(reversed(lines)))
    obs = prep.observations
    assert obs["session"].is_monotonic_increasing
    assert obs["phase_index"].tolist() == [1] * 3 + [2] * 3 + [3] * 3 + [4] * 3
    assert prep.cases["design"].iloc[0] == "ABAB" and prep.cases["design_source"].iloc[0] == "inferred"
    Observations.validate(obs)


def test_case_spanning_two_files(tmp_path):
    rows = ab_rows()
    f1 = write_csv(tmp_path / "one.csv", rows[:5])
    f2 = write_csv(tmp_path / "two.csv", rows[5:])
    prep = load_review([f1, f2], CFG).prepared
    assert len(prep.cases) == 1 and prep.rows_accepted == 10


def test_accounting_invariant_on_mixed_input(tmp_path):
    lines = ab_rows(case="good") + ab_rows(case="short", n_b=2) + ab_rows(case="badrow")
    lines[-1] = lines[-1].replace(",21.0,", ",oops,")
    lines.append(lines[0])  # exact duplicate
    write_csv(tmp_path / "in" / "a.csv", lines)
    (tmp_path / "in" / "b.csv").write_bytes(b"\x00\x00")
    write_csv(tmp_path / "in" / "c.csv", ["x,y"], header="foo,bar")
    prep = load_review([tmp_path / "in"], CFG).prepared
    assert prep.rows_read == len(lines) + 1
    assert_accounting(prep)
    assert prep.rows_accepted == 11 and len(prep.cases) == 1


def test_outgoing_tables_validated_in_slices_of_whole_cases(tmp_path, monkeypatch):
    import pandera.pandas as pa

    import audit.validation as V

    rows = []
    for i in range(6):
        rows += ab_rows(study="S", case=f"P{i}")
    write_csv(tmp_path / "a.csv", rows)
    whole = load_review([tmp_path], AuditConfig()).prepared
    monkeypatch.setattr(V, "_VALIDATE_CHUNK_ROWS", 15)  # several slices, each of whole cases
    sliced = load_review([tmp_path], AuditConfig()).prepared
    pd.testing.assert_frame_equal(sliced.observations, whole.observations)
    pd.testing.assert_frame_equal(sliced.cases, whole.cases)
    # a per-case rule broken in a later slice is still found
    bad = whole.observations.copy()
    last = bad["case_key"].iloc[-1]
    bad.loc[bad.index[-1], "session"] = bad.loc[bad["case_key"] == last, "session"].iloc[0]
    with pytest.raises(pa.errors.SchemaErrors):
        V.validate_in_slices(bad, Observations)
    # slices only when every case is in one place; a case whose rows are in two places is
    # validated whole (its per-case rules need all its rows in one call)
    calls = []

    class Recording:
        @staticmethod
        def validate(df, lazy):
            calls.append(len(df))
            return df

        @staticmethod
        def to_schema():
            return Observations.to_schema()

    obs = whole.observations
    V.validate_in_slices(obs, Recording)
    assert len(calls) > 1 and sum(calls) == len(obs)
    calls.clear()
    first = obs["case_key"].iloc[0]
    split = pd.concat([obs, obs[obs["case_key"] == first].iloc[[-1]]], ignore_index=True)
    V.validate_in_slices(split, Recording)
    assert calls == [len(split)]
