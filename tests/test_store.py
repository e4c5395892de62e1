"""Tests of the Parquet results store (audit/store.py): round trip, readers, lock, reuse, crashes."""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pandera.pandas as pa
import pytest

from audit.store import (
    COUNT_COLUMNS,
    RUNS_COLUMNS,
    ResultsStore,
    StoreEmptyError,
    StoreError,
    StoreLockedError,
    content_hash,
    content_hashes_of_slices,
    file_sha256,
)

HELPER = Path(__file__).with_name("store_crash_helper.py")
REPO = Path(__file__).resolve().parents[1]


def cases_frame(tag: str, n: int = 30) -> pd.DataFrame:
    # same shape as store_crash_helper.frame
    return pd.DataFrame(
        {
            "case": [f"{tag}-{i}" for i in range(n)],
            "case_hash": [f"h{i}" for i in range(n)],
            "value": [float(i) for i in range(n)],
        }
    )


def rich_frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "study": ["S1", "S1", "S2", "S3"],
            "case": ["a", "b", "a", "c"],
            "n": pd.array([5, 7, 12, None], dtype="Int64"),
            "r1": [0.1, -0.25, float("nan"), 0.5],
            "flip": [True, False, False, True],
            "when": pd.to_datetime(["2026-01-01", "2026-01-02", "2026-01-03", None], utc=True),
            "scale": pd.Categorical(["percent", "count", "percent", "rate"]),
        }
    )


def write_run(store: ResultsStore, tables: dict[str, pd.DataFrame], **counts) -> str:
    with store.begin_run({"alpha": 0.05}, "test", {"in.csv": "0" * 64}, lock_timeout=5) as run:
        for name, df in tables.items():
            run.write_table(name, df)
        return run.commit(counts)


def committed_folders(root: Path, table: str) -> set[str]:
    d = root / table
    return {p.name.removeprefix("run=") for p in d.iterdir()} if d.exists() else set()


# --------------------------------------------------------------------------- basic round trip


def test_categories_as_text_writes_the_same_files_as_strings(tmp_path):
    """A categorical text column is stored as the text column it stands for (pyarrow reads the
    file schema), in several row groups, with missing values kept; other categoricals are untouched."""
    import pyarrow.parquet as pq

    labels = ["S1", None, "S2", "S1", "S3"] * 3
    plain = pd.DataFrame({"study": pd.Series(labels, dtype="str"), "x": range(15),
                          "level": pd.Categorical([1, 2, 3] * 5),
                          "flag": pd.Series([True, None, False] * 5, dtype=object),
                          "empty": pd.Series([None] * 15, dtype=object)})
    coded = plain.assign(study=plain["study"].astype("category"))
    files = {}
    for name, df in (("plain", plain), ("coded", coded)):
        store = ResultsStore(tmp_path / name, categories_as_text=True, row_group_size=4)
        write_run(store, {"t": df})
        files[name] = next((tmp_path / name / "t").rglob("*.parquet"))
        got = store.table("t").drop(columns="run")
        assert str(got["study"].dtype) == "str"
        assert got["level"].astype(int).tolist() == [1, 2, 3] * 5
        assert got["study"].isna().tolist() == [v is None for v in labels]
        assert got["study"].dropna().tolist() == [v for v in labels if v is not None]
    a, b = (pq.read_schema(files[n]) for n in ("plain", "coded"))
    assert a == b and a.pandas_metadata == b.pandas_metadata
    pd.testing.assert_frame_equal(pd.read_parquet(files["plain"]), pd.read_parquet(files["coded"]))
    assert pq.ParquetFile(files["coded"]).num_row_groups == 4




def test_round_trip_and_ledger(tmp_path):
    store = ResultsStore(tmp_path / "store")
    df = rich_frame()
    before = pd.Timestamp.now(tz="UTC")
    run_id = write_run(
        store,
        {"cases": df, "phases": cases_frame("p")},
        cases_audited=4,
        cases_reused=0,
        rows_read=40,
        rows_accepted=38,
        rows_quarantined=2,
        cases_quarantined=1,
        extra_metric=7,
    )
    got = store.table("cases")
    assert (got["run"] == run_id).all()
    pd.testing.assert_frame_equal(got.drop(columns="run"), df)

    runs = store.runs()
    assert list(runs.columns[: len(RUNS_COLUMNS)]) == list(RUNS_COLUMNS)
    assert len(runs) == 1
    row = runs.iloc[0]
    assert row["run_id"] == run_id
    assert before <= row["started_at"] <= row["finished_at"] <= pd.Timestamp.now(tz="UTC")
    assert str(runs["started_at"].dt.tz) == "UTC"
    assert json.loads(row["parameters"]) == {"alpha": 0.05}
    assert json.loads(row["input_hashes"]) == {"in.csv": "0" * 64}
    assert json.loads(row["tables"]) == ["cases", "phases"]
    assert json.loads(row["counts"])["rows_read"] == 40
    assert row["rows_read"] == 40 and row["rows_accepted"] + row["rows_quarantined"] == 40
    assert row["extra_metric"] == 7
    assert store.run_info()["counts"]["cases_quarantined"] == 1
    assert store.tables() == ["cases", "phases"]
    # nothing left behind
    assert list((store.path / ".staging").iterdir()) == []
    assert not (store.path / "runs.parquet.tmp").exists()


def test_run_ids_sortable_and_safe(tmp_path):
    store = ResultsStore(tmp_path)
    ids = [write_run(store, {"cases": cases_frame(str(i))}) for i in range(3)]
    assert ids == sorted(ids) and len(set(ids)) == 3
    assert all(set(i) <= set("0123456789TZ-abcdef") for i in ids)
    assert list(store.runs()["run_id"]) == ids


def test_plain_pandas_reads_the_table_folder(tmp_path):
    root = tmp_path / "store"
    store = ResultsStore(root)
    r1 = write_run(store, {"cases": cases_frame("one", 4)})
    r2 = write_run(store, {"cases": cases_frame("two", 6)})
    raw = pd.read_parquet(root / "cases")  # source: pandas/pyarrow hive partition discovery
    assert "run" in raw.columns
    assert len(raw) == 10
    assert raw.groupby(raw["run"].astype(str), observed=True).size().to_dict() == {r1: 4, r2: 6}


def test_text_filters_read_only_matching_rows_and_agree_with_filtering_after(tmp_path):
    """Filters on text columns are applied while reading (row groups of dictionaries); the rows,
    dtypes and order are those of reading everything and filtering with pandas."""
    n = 50
    df = pd.DataFrame({
        "case_key": [f"k{i % 7}" for i in range(n)],
        "study": pd.Series([None if i % 5 == 0 else f"S{i % 3}" for i in range(n)], dtype="str"),
        "x": np.arange(n, dtype=float),
        "flag": [i % 2 == 0 for i in range(n)],
    })
    store = ResultsStore(tmp_path / "store", row_group_size=8)
    write_run(store, {"t": df})
    everything = store.table("t")
    for filters in ({"case_key": ["k1", "k3", "absent"]}, {"case_key": "k2"}, {"study": ["S1"], "case_key": ["k1", "k2"]},
                    {"case_key": ["k1"], "flag": True}, {"case_key": []}, {"study": ["S0", 1]}):
        want = everything
        for column, value in filters.items():
            values = list(value) if isinstance(value, list) else [value]
            want = want[want[column].isin(values)]
        got = store.table("t", **filters)
        pd.testing.assert_frame_equal(got, want.reset_index(drop=True))


def test_latest_all_specific_and_filters(tmp_path):
    store = ResultsStore(tmp_path)
    r1 = write_run(store, {"cases": rich_frame()})
    changed = rich_frame().assign(r1=[0.9, 0.8, 0.7, 0.6])
    r2 = write_run(store, {"cases": changed})

    latest = store.table("cases")
    assert set(latest["run"]) == {r2}
    assert latest["r1"].tolist() == [0.9, 0.8, 0.7, 0.6]
    assert set(store.table("cases", run=r1)["run"]) == {r1}
    everything = store.table("cases", run="all")
    assert len(everything) == 8 and set(everything["run"]) == {r1, r2}
    assert len(store.table("cases", run=[r1])) == 4
    assert list(everything.columns) == [*rich_frame().columns, "run"]

    assert store.table("cases", study="S1")["case"].tolist() == ["a", "b"]
    assert store.table("cases", study=["S2", "S3"])["case"].tolist() == ["a", "c"]
    assert store.table("cases", study=("S1",), case="b")["r1"].tolist() == [0.8]
    assert store.table("cases", flip=True)["case"].tolist() == ["a", "c"]
    both = store.table("cases", run="all", study="S2")
    assert sorted(both["run"]) == sorted([r1, r2])
    assert store.table("cases", study="nope").empty
    with pytest.raises(KeyError, match="no_such_column"):
        store.table("cases", no_such_column=1)
    with pytest.raises(StoreEmptyError, match="not committed"):
        store.table("cases", run="20000101T000000000000Z-000000")
    with pytest.raises(KeyError, match="was not written"):
        store.table("phases")


def test_empty_store(tmp_path):
    root = tmp_path / "new" / "store"
    store = ResultsStore(root)
    assert root.is_dir()
    runs = store.runs()
    assert runs.empty and list(runs.columns) == list(RUNS_COLUMNS)
    assert all(runs[c].dtype == "Int64" for c in COUNT_COLUMNS)
    assert store.latest_run_id() is None
    with pytest.raises(StoreEmptyError) as err:
        store.table("cases")
    assert str(root) in str(err.value) and "sced-audit run" in str(err.value)
    assert store.reusable("cases", ["h1"]).empty


def test_hostile_names_rejected(tmp_path):
    store = ResultsStore(tmp_path / "store")
    bad = ["../escape", "Cases", "a/b", "", ".staging", "run=1", "x y", "_x", "1abc", "c\x00"]
    with store.begin_run(lock_timeout=5) as run:
        for name in bad:
            with pytest.raises(ValueError, match="invalid table name"):
                run.write_table(name, cases_frame("x"))
        run.abort()
    for name in bad:
        with pytest.raises(ValueError, match="invalid table name"):
            store.table(name)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["store"]
    assert sorted(p.name for p in store.path.iterdir()) == [".lock", ".staging"]


def test_index_and_reserved_column(tmp_path):
    store = ResultsStore(tmp_path)
    indexed = cases_frame("i", 3).set_index("case")
    with store.begin_run(lock_timeout=5) as run:
        run.write_table("cases", indexed)
        with pytest.raises(ValueError, match="reserved"):
            run.write_table("phases", cases_frame("x").assign(run=1))
    # the failed write poisons the run: nothing committed
    assert store.runs().empty
    run_id = write_run(store, {"cases": indexed})
    assert store.table("cases", run=run_id)["case"].tolist() == ["i-0", "i-1", "i-2"]


# --------------------------------------------------------------------------- abort / validators


def test_exception_aborts_and_leaves_nothing(tmp_path):
    store = ResultsStore(tmp_path)
    r1 = write_run(store, {"cases": cases_frame("one")})
    with pytest.raises(RuntimeError, match="boom"):
        with store.begin_run(lock_timeout=5) as run:
            run.write_table("cases", cases_frame("two"))
            run.write_table("phases", cases_frame("two"))
            raise RuntimeError("boom")
    assert list(store.runs()["run_id"]) == [r1]
    assert committed_folders(store.path, "cases") == {r1}
    assert not (store.path / "phases").exists()
    assert list((store.path / ".staging").iterdir()) == []
    # lock was released
    with store.begin_run(lock_timeout=0.2) as run:
        run.abort()


def test_validator_failure_commits_nothing(tmp_path):
    # pandera schema as the validator, as the pipeline does
    schema = pa.DataFrameSchema(
        {"case": pa.Column(str), "value": pa.Column(float, pa.Check.ge(0))}, coerce=True
    )
    seen = []

    def summary_validator(df):
        seen.append(len(df))
        return df

    store = ResultsStore(
        tmp_path, validators={"cases": schema.validate, "summary_*": summary_validator}
    )
    bad = pd.DataFrame({"case": ["a", "b"], "value": [1.0, -2.0]})
    with pytest.raises(pa.errors.SchemaError):
        with store.begin_run(lock_timeout=5) as run:
            run.write_table("summary_pooled", pd.DataFrame({"x": [1, 2, 3]}))
            run.write_table("cases", bad)
            run.commit({})
    assert store.runs().empty
    assert not (store.path / "cases").exists() and not (store.path / "summary_pooled").exists()
    assert seen == [3]

    # catching the validator error does not allow committing the rest
    with store.begin_run(lock_timeout=5) as run:
        with pytest.raises(pa.errors.SchemaError):
            run.write_table("cases", bad)
        with pytest.raises(StoreError, match="earlier write_table failed"):
            run.commit({})
    assert store.runs().empty

    # the validator's output (coerced) is what is stored
    good = pd.DataFrame({"case": ["a"], "value": [3]})  # int, coerced to float by the schema
    write_run(store, {"cases": good})
    assert store.table("cases")["value"].dtype == "float64"


def test_prepared_table_is_validated_ahead_and_moved_into_the_run(tmp_path):
    """A table prepared ahead of its run (validated, written to a file inside the store) is moved
    into the run: it reads back as the same frame written directly would, and its file is gone."""
    schema = pa.DataFrameSchema({"case": pa.Column(str), "value": pa.Column(float, pa.Check.ge(0))}, coerce=True)
    store = ResultsStore(tmp_path / "store", validators={"phases": schema.validate}, categories_as_text=True)
    ahead = store.path / ".batches" / "run-1"
    ahead.mkdir(parents=True)
    frame = pd.DataFrame({"case": pd.Categorical(["a", "b", "a"]), "value": [1, 2, 3]})  # coerced to float
    prepared = store.prepare_table("phases", frame, ahead)
    assert prepared.path.exists() and prepared.n_rows == 3 and prepared.columns == ("case", "value")
    with pytest.raises(pa.errors.SchemaError):  # validated when prepared, before any run
        store.prepare_table("phases", frame.assign(value=[1, -2, 3]), ahead)
    with pytest.raises(ValueError, match="inside it"):
        store.prepare_table("phases", frame, tmp_path)
    with store.begin_run(lock_timeout=5) as run:
        run.write_table("cases", cases_frame("one"))
        with pytest.raises(ValueError, match="prepared table is 'phases'"):
            run.write_table("contrasts", prepared)
        run.write_table("phases", prepared)
        run_id = run.commit({})
    assert prepared.path.exists()  # linked, not moved: the caller removes it
    direct = ResultsStore(tmp_path / "direct", validators={"phases": schema.validate}, categories_as_text=True)
    write_run(direct, {"phases": frame})
    pd.testing.assert_frame_equal(store.table("phases", run=run_id).drop(columns="run"),
                                  direct.table("phases").drop(columns="run"))
    assert store.table("phases")["value"].dtype == "float64"

    other = ResultsStore(tmp_path / "other")
    (other.path / "x").mkdir()
    foreign = other.prepare_table("phases", frame, other.path / "x")
    with store.begin_run(lock_timeout=5) as run:
        with pytest.raises(ValueError, match="prepared for the store"):
            run.write_table("phases", foreign)
    assert foreign.path.exists()  # not taken


def test_a_run_that_fails_can_be_written_again_from_its_prepared_tables(tmp_path, monkeypatch):
    """The prepared file stays when a run links it in: after a failed commit (here the ledger
    cannot be written) the same prepared table is written again by the next run. Where links
    are not supported, it is copied."""
    store = ResultsStore(tmp_path / "store")
    ahead = store.path / ".batches" / "run-1"
    ahead.mkdir(parents=True)
    frame = cases_frame("one")
    prepared = store.prepare_table("phases", frame, ahead)

    def no_ledger(row):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(store, "_append_ledger", no_ledger)
    with pytest.raises(OSError):
        write_run(store, {"phases": prepared})
    assert store.runs().empty and prepared.path.exists()
    monkeypatch.undo()

    def no_links(src, dst):
        raise OSError(1, "Operation not permitted")

    monkeypatch.setattr(os, "link", no_links)
    write_run(store, {"phases": prepared})
    pd.testing.assert_frame_equal(store.table("phases").drop(columns="run"), frame)


# --------------------------------------------------------------------------- lock


def test_second_writer_times_out_while_first_holds_lock(tmp_path):
    store = ResultsStore(tmp_path / "store")
    r1 = write_run(store, {"cases": cases_frame("one")})
    errors: list[BaseException] = []
    elapsed: list[float] = []

    def second_writer():
        t0 = time.perf_counter()
        try:
            ResultsStore(tmp_path / "store").begin_run(lock_timeout=0.3)
        except BaseException as exc:  # noqa: BLE001 - collected for the assertion
            errors.append(exc)
        elapsed.append(time.perf_counter() - t0)

    with store.begin_run(lock_timeout=5) as run:
        run.write_table("cases", cases_frame("two"))
        t = threading.Thread(target=second_writer)
        t.start()
        t.join(10)
        # readers are not blocked and do not see the run in progress
        assert store.latest_run_id() == r1
        assert set(store.table("cases")["run"]) == {r1}
        r2 = run.commit({})
    assert len(errors) == 1 and isinstance(errors[0], StoreLockedError)
    msg = str(errors[0])
    assert str(tmp_path / "store") in msg and "0.3 s" in msg and "wait" in msg
    assert 0.25 <= elapsed[0] < 5
    assert store.latest_run_id() == r2
    with store.begin_run(lock_timeout=0.2) as run:  # free again after commit
        run.abort()


# --------------------------------------------------------------------------- hashing and reuse


def test_file_sha256_matches_hashlib(tmp_path):
    data = os.urandom(3 * (1 << 20) + 17)
    p = tmp_path / "f.bin"
    p.write_bytes(data)
    assert file_sha256(p) == hashlib.sha256(data).hexdigest()  # source: hashlib
    assert file_sha256(p, chunk_size=1000) == hashlib.sha256(data).hexdigest()


def test_content_hash_properties():
    df = rich_frame()
    h = content_hash(df, {"alpha": 0.05})
    assert len(h) == 64
    assert content_hash(df.copy(), {"alpha": 0.05}) == h
    assert content_hash(df.set_index("study"), {"alpha": 0.05}) != h  # column set differs
    assert content_hash(df.rename(index=lambda i: i + 10), {"alpha": 0.05}) == h  # index ignored
    assert content_hash(df, {"alpha": 0.01}) != h
    assert content_hash(df) != h
    changed = df.copy()
    changed.loc[1, "r1"] = -0.2500001
    assert content_hash(changed, {"alpha": 0.05}) != h
    assert content_hash(df.rename(columns={"r1": "r2"}), {"alpha": 0.05}) != h
    assert content_hash(df.iloc[::-1].reset_index(drop=True), {"alpha": 0.05}) != h
    assert content_hash(df.astype({"r1": "float32"}), {"alpha": 0.05}) != h
    assert content_hash(b"ab", b"c") != content_hash(b"a", b"bc")  # length-prefixed parts
    assert content_hash(pd.DataFrame({"x": [[1, 2], [3]]})) == content_hash(
        pd.DataFrame({"x": [[1, 2], [3]]})
    )


def test_content_hashes_of_slices_equal_content_hash_of_each_slice():
    df = rich_frame()
    n = len(df)
    bounds = [0, 1, 1, n - 1, n]  # includes an empty slice
    got = content_hashes_of_slices(df, bounds, {"alpha": 0.05}, "v1")
    want = [content_hash(df.iloc[b:e].reset_index(drop=True), {"alpha": 0.05}, "v1")
            for b, e in zip(bounds[:-1], bounds[1:])]
    assert got == want
    assert got[0] != got[3] and got[1] != got[0]  # different rows (or none), different digests
    ragged = pd.DataFrame({"x": [[1, 2], [3], [4]]})  # unhashable cells: the per-slice fallback
    assert content_hashes_of_slices(ragged, [0, 2, 3]) == [content_hash(ragged.iloc[:2]),
                                                           content_hash(ragged.iloc[2:].reset_index(drop=True))]


def test_content_hash_same_in_another_process():
    code = (
        "import sys; sys.path.insert(0, %r); from tests.test_store import rich_frame; "
        "from audit.store import content_hash; print(content_hash(rich_frame(), 'v1', {'a': 1}))"
        % str(REPO)
    )
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        env={**os.environ, "PYTHONHASHSEED": "12345"},
        cwd=REPO,
    )
    assert out.stdout.strip() == content_hash(rich_frame(), "v1", {"a": 1})


def test_reusable_rows_of_latest_run(tmp_path):
    store = ResultsStore(tmp_path)
    write_run(store, {"cases": cases_frame("old", 5)})
    r2 = write_run(store, {"cases": cases_frame("new", 5)})
    got = store.reusable("cases", {"h1", "h3", "missing"})
    assert got["case"].tolist() == ["new-1", "new-3"]
    assert "run" not in got.columns and got.attrs["source_run"] == r2
    assert store.reusable("cases", []).empty
    assert store.reusable("phases", ["h1"]).empty
    assert store.reusable("cases", ["nothing"]).empty
    every = store.reusable("cases", {f"h{i}" for i in range(5)} | {"missing"})
    pd.testing.assert_frame_equal(every, cases_frame("new", 5))  # all rows, in stored order
    with pytest.raises(KeyError, match="no key column"):
        store.reusable("cases", ["h1"], key="nope")
    # reused rows can be written straight into the next run
    r3 = write_run(store, {"cases": got})
    assert store.table("cases", run=r3)["case"].tolist() == ["new-1", "new-3"]


# --------------------------------------------------------------------------- crash safety

CRASH_POINTS = [
    # (point, whether the killed run was already committed, whether orphan folders exist)
    ("row_group:4", False, False),  # 2nd table half-written in staging (truncated parquet file)
    ("commit_begin", False, False),  # all tables staged, nothing moved
    ("moved:1", False, True),  # one table moved into place, the other still staged
    ("moves_done", False, True),  # all moved, ledger not written
    ("ledger_tmp_written", False, True),  # runs.parquet.tmp written and fsynced, not renamed
    ("committed", True, False),  # ledger renamed (committed), staging not yet removed
]


@pytest.mark.integration
@pytest.mark.parametrize("point,committed,orphans", CRASH_POINTS)
def test_sigkill_at_any_point_keeps_store_consistent(tmp_path, point, committed, orphans):
    root = tmp_path / "store"
    store = ResultsStore(root)
    r1 = write_run(store, {"cases": cases_frame("one"), "phases": cases_frame("one")})
    ready = tmp_path / "ready"
    proc = subprocess.Popen(
        [sys.executable, str(HELPER), str(root), str(ready)],
        env={**os.environ, "SCED_STORE_CRASH_POINT": point},
        cwd=REPO,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 15
        while not ready.exists():
            if proc.poll() is not None:
                pytest.fail(f"helper exited early: {proc.communicate()[1].decode()[-2000:]}")
            if time.monotonic() > deadline:
                pytest.fail("helper did not reach the crash point in 15 s")
            time.sleep(0.02)
        crashed = ready.read_text()
        # while the writer is paused: readers work and see only committed runs; writers wait
        expect_latest = crashed if committed else r1
        assert store.latest_run_id() == expect_latest
        with pytest.raises(StoreLockedError):
            store.begin_run(lock_timeout=0.1)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=10)
    assert proc.returncode == -signal.SIGKILL

    # after the crash: earlier runs intact and readable
    assert store.latest_run_id() == expect_latest
    want = cases_frame("one")
    if committed:
        want = want.assign(case=[f"crash-{i}" for i in range(30)], value=want["value"] + 0.5)
    pd.testing.assert_frame_equal(store.table("cases").drop(columns="run"), want)
    assert set(store.table("cases", run="all")["run"]) == set(store.runs()["run_id"])
    assert (root / ".staging" / crashed).exists()  # leftovers are really there
    if point.startswith("row_group"):
        half = root / ".staging" / crashed / "phases" / "part-0.parquet"
        with pytest.raises(Exception):  # really half-written: no parquet footer yet
            pd.read_parquet(half)
    if orphans:
        assert crashed in committed_folders(root, "cases")
        raw = pd.read_parquet(root / "cases")  # documented caveat: raw reads see the orphan
        assert crashed in set(raw["run"].astype(str))

    # the next writer clears the leftovers and commits
    nxt = ResultsStore(root)
    with nxt.begin_run(lock_timeout=5) as run:  # lock was freed by the kernel at SIGKILL
        assert run.cleared, "expected leftovers to be cleared"
        assert [p.name for p in (root / ".staging").iterdir()] == [run.run_id]
        run.write_table("cases", cases_frame("three"))
        r3 = run.commit({"cases_audited": 30})
    ledger = list(nxt.runs()["run_id"])
    assert ledger == ([r1, crashed, r3] if committed else [r1, r3])
    assert nxt.latest_run_id() == r3
    assert list((root / ".staging").iterdir()) == []
    assert not (root / "runs.parquet.tmp").exists()
    assert committed_folders(root, "cases") == set(ledger)
    assert committed_folders(root, "phases") == set(ledger[:-1])
    raw = pd.read_parquet(root / "cases")
    assert set(raw["run"].astype(str)) == set(ledger) and len(raw) == 30 * len(ledger)


def test_failure_inside_commit_rolls_back(tmp_path, monkeypatch):
    import audit.store as store_mod

    store = ResultsStore(tmp_path)
    r1 = write_run(store, {"cases": cases_frame("one")})

    def fail(point):
        if point == "moves_done":
            raise OSError("disk full (simulated)")

    monkeypatch.setattr(store_mod, "_fault_point", fail)
    with pytest.raises(OSError, match="disk full"):
        with store.begin_run(lock_timeout=5) as run:
            run.write_table("cases", cases_frame("two"))
            run.write_table("phases", cases_frame("two"))
            run.commit({})
    monkeypatch.setattr(store_mod, "_fault_point", None)
    assert list(store.runs()["run_id"]) == [r1]
    assert committed_folders(store.path, "cases") == {r1}
    assert committed_folders(store.path, "phases") == set()
    assert list((store.path / ".staging").iterdir()) == []
    with store.begin_run(lock_timeout=0.2) as run:  # lock released
        assert run.cleared == []
        run.abort()


def test_columns_may_change_between_runs(tmp_path):
    store = ResultsStore(tmp_path)
    r1 = write_run(store, {"cases": pd.DataFrame({"a": [1, 2]})})
    r2 = write_run(store, {"cases": pd.DataFrame({"a": [1.5, None], "b": ["x", "y"]})})
    both = store.table("cases", run="all")
    assert list(both.columns) == ["a", "b", "run"]
    assert both["a"].tolist()[:3] == [1.0, 2.0, 1.5] and both["run"].tolist() == [r1, r1, r2, r2]
    assert both["b"].isna().tolist() == [True, True, False, False]
