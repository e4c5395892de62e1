"""Content-hash reuse and the plain sequential run (no Prefect).

Checks are behavioural: the store invariants of DESIGN.md sections 4 and 6 (rows read =
accepted + quarantined; a rerun with unchanged data and parameters reuses every case; changing
one file recomputes only the cases it holds), the fixture's generating truth table
(fixtures/demo_small/truth.csv) for the case counts, and equality of batched and unbatched runs.
"""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from audit import rerun
from audit.config import AuditConfig
from audit.ingest import InputError
from audit.intake import load_review
from audit.store import ResultsStore, content_hash
from tests.helpers import ab_rows, write_csv

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "demo_small"


@pytest.fixture(scope="module")
def review():
    return load_review([FIXTURE / "data"], AuditConfig())


@pytest.fixture()
def data_copy(tmp_path):
    """A private copy of the fixture's input files (tests may edit it)."""
    dest = tmp_path / "data"
    shutil.copytree(FIXTURE / "data", dest)
    return dest


class Counting:
    """The real diagnostics, counting calls and the cases each call received."""

    def __init__(self):
        from audit.diagnose import diagnose_cases

        self.real = diagnose_cases
        self.calls: list[list[str]] = []

    def __call__(self, observations, alpha=0.05, **kw):
        self.calls.append(sorted(observations["case_key"].unique()))
        return self.real(observations, alpha=alpha, **kw)

    @property
    def cases(self) -> set[str]:
        return {k for call in self.calls for k in call}


def _run(paths, store, config=None, **kw):
    """run_audit without the summary and report hooks (tested once, in the last test)."""
    kw.setdefault("with_summary", False)
    kw.setdefault("with_report", False)
    return rerun.run_audit(paths, store, config, **kw)


def _truth_counts() -> tuple[int, int]:
    truth = pd.read_csv(FIXTURE / "truth.csv")
    quarantined = truth["expected_quarantine"].astype(str).str.lower().isin(["true", "1"])
    return int((~quarantined).sum()), int(quarantined.sum())


# ----------------------------------------------------------------------------------- hashes


def test_case_hash_is_the_store_content_hash_of_the_case_rows(review):
    obs = review.prepared.observations
    params = AuditConfig().as_parameters()
    hashes = rerun.case_hashes(obs, params, "v1")
    assert hashes.index.is_unique and set(hashes.index) == set(obs["case_key"])
    key = hashes.index[0]
    part = obs[obs["case_key"] == key].sort_values("session", kind="stable").reset_index(drop=True)
    expected = content_hash(rerun._canonical(part), params, "v1")
    assert hashes[key] == expected
    # SHA-256 hex digests (source: hashlib, 64 hex characters)
    assert all(len(h) == len(hashlib.sha256().hexdigest()) for h in hashes)


def test_case_hash_changes_only_for_the_changed_case(review):
    obs = review.prepared.observations
    params = AuditConfig().as_parameters()
    before = rerun.case_hashes(obs, params, "v1")
    changed = obs.copy()
    key = before.index[3]
    row = changed.index[changed["case_key"] == key][2]
    changed.loc[row, "outcome"] += 0.5
    after = rerun.case_hashes(changed, params, "v1")
    assert (before != after).sum() == 1 and before[key] != after[key]


def test_case_hash_ignores_provenance_other_cases_and_dtype_drift(review):
    obs = review.prepared.observations
    params = AuditConfig().as_parameters()
    before = rerun.case_hashes(obs, params, "v1")
    moved = obs.assign(source_file="elsewhere/renamed.csv", source_row=obs["source_row"] + 100)
    pd.testing.assert_series_equal(rerun.case_hashes(moved, params, "v1"), before)
    some = before.index[:4]
    subset = obs[obs["case_key"].isin(some)].astype({"tier": object})
    pd.testing.assert_series_equal(rerun.case_hashes(subset, params, "v1"), before[some], check_index=False,
                                   check_names=False)
    # a different order of the rows of the review (cases interleaved) gives the same hashes
    shuffled = obs.sample(frac=1.0, random_state=1)
    assert rerun.case_hashes(shuffled, params, "v1").sort_index().equals(before.sort_index())


def test_case_hash_depends_on_parameters_and_code_version(review):
    obs = review.prepared.observations
    params = AuditConfig().as_parameters()
    base = rerun.case_hashes(obs, params, "v1")
    assert (rerun.case_hashes(obs, {**params, "alpha": 0.01}, "v1") != base).all()
    assert (rerun.case_hashes(obs, params, "v2") != base).all()


def test_code_version_names_the_package_version():
    from audit import __version__

    version = rerun.code_version()
    assert version.startswith(__version__ + "+src.") and version == rerun.code_version()


# ----------------------------------------------------------------------------------- batches


def test_case_batches_keep_whole_cases(review):
    obs = review.prepared.observations
    batches = rerun.case_batches(obs, 5)
    n_cases = obs["case_key"].nunique()
    assert len(batches) == int(np.ceil(n_cases / 5))
    keys = [set(b["case_key"]) for b in batches]
    assert all(len(k) <= 5 for k in keys)
    assert sum(len(k) for k in keys) == n_cases  # no case split over two batches
    assert sum(len(b) for b in batches) == len(obs)
    with pytest.raises(ValueError):
        rerun.case_batches(obs, 0)


def test_batched_run_equals_one_batch_run(tmp_path):
    one = _run([FIXTURE / "data"], tmp_path / "one", batch_size=1000)
    many = _run([FIXTURE / "data"], tmp_path / "many", batch_size=1)
    a, b = ResultsStore(tmp_path / "one"), ResultsStore(tmp_path / "many")
    for table in ("cases", "phases"):
        pd.testing.assert_frame_equal(a.table(table).drop(columns="run"), b.table(table).drop(columns="run"))
    assert one.cases_computed == many.cases_computed


def test_case_batches_group_cases_of_similar_length(review):
    obs = review.prepared.observations
    rows = rerun.case_batch_rows(obs, 3)
    sizes = obs.groupby("case_key", sort=False).size()
    longest_before = 0
    for batch_rows in rows:
        part = obs.iloc[batch_rows]
        lengths = sizes[part["case_key"].unique()]
        assert lengths.min() >= longest_before  # batches follow the number of points
        longest_before = lengths.max()
        for _, case in part.groupby("case_key", sort=False):  # rows keep their order within a case
            assert case.index.is_monotonic_increasing
    assert sorted(np.concatenate(rows).tolist()) == list(range(len(obs)))


def test_bounded_results_keeps_few_batches_in_flight(review):
    obs = review.prepared.observations
    rows = rerun.case_batch_rows(obs, 2)
    live, peak = [], []

    class Done:
        def __init__(self, value):
            self.value = value

        def result(self):
            live.pop()
            return self.value

    def submit(batch, number):
        live.append(number)
        peak.append(len(live))
        return Done((number, len(batch)))

    out = list(rerun.bounded_results(submit, obs, rows, 3))
    assert [n for n, _ in out] == list(range(1, len(rows) + 1))
    assert sum(k for _, k in out) == len(obs)
    assert max(peak) == 3


def test_assemble_tables_joins_batches_in_case_order_and_empties_them(review):
    """Batches (cut by length, so out of case order) joined equal one batch of every case; each
    batch's tables are dropped from its mapping once joined."""
    from audit.diagnose import diagnose_cases

    obs = review.prepared.observations
    plan = rerun.plan_run(review, None, AuditConfig(), version="test")
    whole = rerun.assemble_tables(review, plan, [diagnose_cases(obs)])
    batches = [diagnose_cases(rerun.take_rows(obs, rows)) for rows in rerun.case_batch_rows(obs, 4)]
    assert len(batches) > 2
    joined = rerun.assemble_tables(review, plan, batches)
    assert all(len(b) == 0 for b in batches)
    for name in ("cases", "phases", "contrasts"):
        a, b = whole[name], joined[name]
        for col in a.columns:  # categorical labels join as text when batches differ in categories
            if isinstance(a[col].dtype, pd.CategoricalDtype) or isinstance(b[col].dtype, pd.CategoricalDtype):
                a[col], b[col] = a[col].astype(str), b[col].astype(str)
        pd.testing.assert_frame_equal(a, b)
    assert joined["cases"]["case_key"].astype(str).tolist() == review.prepared.cases["case_key"].astype(str).tolist()
    assert joined["cases"]["case_hash"].notna().all()


# ----------------------------------------------------------------------------------- runs


def test_run_audit_writes_a_complete_run(tmp_path):
    counting = Counting()
    progress = []
    summary = _run([FIXTURE / "data"], tmp_path / "store", AuditConfig(), batch_size=5,
                              diagnose=counting, progress=lambda *a: progress.append(a))
    n_ok, n_quarantined = _truth_counts()
    # source: fixtures/demo_small/truth.csv (13 generated cases, 1 deliberately too short)
    assert (summary.cases_audited, summary.cases_quarantined) == (n_ok, n_quarantined)
    assert summary.cases_computed == n_ok and summary.cases_reused == 0
    # invariant of DESIGN.md section 4: rows read = rows accepted + rows quarantined
    assert summary.rows_read == summary.rows_accepted + summary.rows_quarantined
    assert len(counting.calls) == int(np.ceil(n_ok / 5)) and all(len(c) <= 5 for c in counting.calls)
    assert ("diagnose", len(counting.calls), len(counting.calls)) in progress
    store = ResultsStore(tmp_path / "store")
    info = store.run_info()
    assert info["counts"]["cases_audited"] == n_ok and info["code_version"] == rerun.code_version()
    assert set(info["input_hashes"]) == {str(p) for p in sorted((FIXTURE / "data").rglob("*")) if p.is_file()}
    for name, digest in info["input_hashes"].items():
        assert digest == hashlib.sha256(Path(name).read_bytes()).hexdigest()  # source: hashlib
    cases = store.table("cases")
    assert len(cases) == n_ok and cases["case_hash"].notna().all()
    assert {"observations", "quarantine", "adjustments", "cases", "phases"} <= set(store.tables())
    if "flip_any" in cases.columns:
        assert summary.flips == int(cases["flip_any"].sum())
    # the accepted-case columns are on every case row
    assert {"n_points", "below_five_point_standard"} <= set(cases.columns)


def test_second_run_reuses_every_case(tmp_path):
    first = _run([FIXTURE / "data"], tmp_path / "store")
    counting = Counting()
    second = _run([FIXTURE / "data"], tmp_path / "store", diagnose=counting, force=True)
    assert counting.calls == []  # no statistics at all
    assert (second.cases_reused, second.cases_computed) == (first.cases_audited, 0)
    store = ResultsStore(tmp_path / "store")
    for table in store.tables():
        if table.startswith("summary"):
            continue
        a = store.table(table, run=first.run_id).drop(columns="run")
        b = store.table(table, run=second.run_id).drop(columns="run")
        pd.testing.assert_frame_equal(a, b)


def test_unchanged_inputs_run_nothing_until_something_changes(tmp_path, data_copy, monkeypatch):
    store = tmp_path / "store"
    first = _run([data_copy], store)
    counting = Counting()
    same = _run([data_copy], store, diagnose=counting)
    assert same.unchanged and same.run_id == first.run_id and counting.calls == []
    assert (same.cases_audited, same.cases_computed, same.cases_quarantined) == \
        (first.cases_audited, 0, first.cases_quarantined)
    assert same.closing_line().startswith(f"No change since run {first.run_id}")
    assert len(ResultsStore(store).runs()) == 1  # nothing written
    # any change makes a real run: parameters, the code (pipeline version), a file's bytes
    assert not _run([data_copy], store, AuditConfig(alpha=0.01)).unchanged
    _run([data_copy], store)  # back to alpha 0.05: a run (the latest differs), then unchanged again
    assert _run([data_copy], store).unchanged
    monkeypatch.setattr(rerun, "pipeline_version", lambda: "edited")
    assert not _run([data_copy], store).unchanged
    monkeypatch.undo()
    _run([data_copy], store)
    target = data_copy / "f1_more.tsv"
    target.write_text(target.read_text(encoding="utf-8") + "\n", encoding="utf-8")  # one more byte
    assert not _run([data_copy], store).unchanged
    assert _run([data_copy], store, force=False).unchanged
    assert not _run([data_copy], store, force=True).unchanged


def test_changing_one_file_recomputes_only_its_cases(tmp_path, data_copy):
    _run([data_copy], tmp_path / "store")
    store = ResultsStore(tmp_path / "store")
    obs = store.table("observations")
    target = data_copy / "f1_more.tsv"
    its_cases = set(obs.loc[obs["source_file"] == str(target), "case_key"])
    assert its_cases and len(its_cases) < obs["case_key"].nunique()
    lines = target.read_text(encoding="utf-8").splitlines()
    header = lines[0].split("\t")
    col = header.index("outcome")
    seen = set()
    for i, line in enumerate(lines[1:], start=1):  # change the first point of every case in the file
        cells = line.split("\t")
        if cells[1] not in seen:
            seen.add(cells[1])
            cells[col] = f"{float(cells[col]) + 1.0:.1f}"
            lines[i] = "\t".join(cells)
    target.write_text("\n".join(lines) + "\n", encoding="utf-8")
    counting = Counting()
    summary = _run([data_copy], tmp_path / "store", diagnose=counting)
    new_obs = store.table("observations")
    accepted_there = set(new_obs.loc[new_obs["source_file"] == str(target), "case_key"])
    assert counting.cases == accepted_there and accepted_there <= its_cases | accepted_there
    assert summary.cases_computed == len(accepted_there)
    assert summary.cases_reused == summary.cases_audited - len(accepted_there)


def test_parameter_change_recomputes_everything(tmp_path):
    _run([FIXTURE / "data"], tmp_path / "store")
    counting = Counting()
    summary = _run([FIXTURE / "data"], tmp_path / "store", AuditConfig(alpha=0.01),
                             diagnose=counting)
    assert summary.cases_reused == 0 and summary.cases_computed == summary.cases_audited


def test_split_for_reuse_without_store_or_history(review, tmp_path):
    obs = review.prepared.observations
    hashes = rerun.case_hashes(obs, {}, "v")
    todo, reused = rerun.split_for_reuse(obs, hashes, None)
    assert todo is obs and reused == {}
    todo, reused = rerun.split_for_reuse(obs, hashes, ResultsStore(tmp_path / "empty"))
    assert len(todo) == len(obs) and reused == {}


def test_nothing_usable_raises_input_error(tmp_path):
    write_csv(tmp_path / "in" / "a.csv", ab_rows(n_a=2))  # a phase of 2 points: quarantined
    with pytest.raises(InputError, match="nothing usable"):
        _run([tmp_path / "in"], tmp_path / "store")
    assert not (tmp_path / "store" / "runs.parquet").exists()


def test_closing_line_and_quarantine_flag():
    s = rerun.RunSummary(run_id="r1", store=Path("/s"), cases_audited=10, cases_reused=7, cases_computed=3,
                         cases_quarantined=1, rows_read=100, rows_accepted=90, rows_quarantined=10, flips=2,
                         input_problems=0, tables=("cases",))
    line = s.closing_line()
    assert "10 case(s)" in line and "7 reused" in line and "1 quarantined" in line and "2 flip(s)" in line
    assert "/s" in line and s.has_quarantine


def test_summary_and_report_hooks(tmp_path):
    pytest.importorskip("audit.summary")
    summary = rerun.run_audit([FIXTURE / "data"], tmp_path / "store")
    store = ResultsStore(tmp_path / "store")
    assert any(t.startswith("summary") for t in store.tables())
    try:
        import audit.report  # noqa: F401
    except ModuleNotFoundError:
        assert summary.report is None
    else:
        assert summary.report is not None and summary.report.is_file()
        assert str(summary.report) in summary.closing_line()
