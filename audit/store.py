"""Parquet results store: one folder of hive-partitioned tables plus a ledger of committed runs.

Layout::

    store/
      runs.parquet                       one row per committed run (the ledger; commit order)
      <table>/run=<run_id>/part-0.parquet   one folder per table and committed run
      .staging/<run_id>/<table>/...      where a run is written first
      .lock                              writer lock (one writer at a time; readers never lock)

Commit protocol (one writer at a time, under ``.lock``):

1. every table is written to ``.staging/<run_id>/<table>/part-0.parquet`` and fsynced (a table
   prepared beforehand with :meth:`ResultsStore.prepare_table`, validated and written to a
   file of its own, is linked there instead);
2. each staged table folder is renamed to ``<table>/run=<run_id>`` (``os.replace``, same filesystem);
3. the run's row is appended to the ledger: ``runs.parquet.tmp`` is written, fsynced and renamed
   over ``runs.parquet``. This rename is the commit point;
4. the staging folder is removed.

A run exists only once it is in ``runs.parquet``. A crash (even SIGKILL) before step 3 leaves
earlier runs intact; table folders already moved in step 2 are orphans that :class:`ResultsStore`
readers ignore and that the next writer removes ("clears the leftovers"), together with any
``.staging`` and ``runs.parquet.tmp`` leftovers.

``pd.read_parquet(store / "cases")`` reads every ``run=`` folder (hive partition column ``run``).
Used directly like that it can also see an orphan folder of a crashed or in-progress run until
the next writer cleans it; :class:`ResultsStore` is the safe reader (it reads only the folders of
runs listed in ``runs.parquet``). A plain folder read also needs every run's file to share one
schema (pyarrow casts to the first file's schema); ``ResultsStore.table`` reads each run's file
separately and concatenates, so it tolerates columns added or retyped between code versions.
"""

from __future__ import annotations

import datetime as _dt
import fnmatch
import hashlib
import json
import logging
import os
import re
import secrets
import shutil
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from filelock import FileLock, Timeout

__all__ = [
    "COUNT_COLUMNS",
    "PreparedTable",
    "RUNS_COLUMNS",
    "ResultsStore",
    "Run",
    "StoreEmptyError",
    "StoreError",
    "StoreLockedError",
    "content_hash",
    "content_hashes_of_slices",
    "file_sha256",
]

log = logging.getLogger(__name__)

TABLE_NAME = re.compile(r"^[a-z][a-z0-9_]*$")
RUN_ID = re.compile(r"^\d{8}T\d{12}Z-[0-9a-f]{6}$")
COUNT_COLUMNS = (
    "cases_audited",
    "cases_reused",
    "cases_quarantined",
    "rows_read",
    "rows_accepted",
    "rows_quarantined",
)
RUNS_COLUMNS = (
    "run_id",
    "started_at",
    "finished_at",
    "parameters",
    "code_version",
    "input_hashes",
    "counts",
    "tables",
    *COUNT_COLUMNS,
)
PART_FILE = "part-0.parquet"
STAGING = ".staging"
LEDGER = "runs.parquet"
LOCK = ".lock"

Validator = Callable[[pd.DataFrame], "pd.DataFrame | None"]

# Testing seam: a callable invoked with the name of each step of a write ("row_group",
# "commit_begin", "moved", "moves_done", "ledger_tmp_written", "committed"). None in normal use; the crash tests
# set it in a subprocess to pause there and be killed.
_fault_point: Callable[[str], None] | None = None


def _at(point: str) -> None:
    if _fault_point is not None:
        _fault_point(point)


class StoreError(RuntimeError):
    """Base class for results-store errors."""


class StoreEmptyError(StoreError, LookupError):
    """The store has no committed run (or not the one asked for)."""


class StoreLockedError(StoreError, TimeoutError):
    """Another writer holds the store lock."""


# ----------------------------------------------------------------------------------- hashing


def file_sha256(path: str | os.PathLike[str], chunk_size: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file's bytes, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk_size):
            h.update(block)
    return h.hexdigest()


def _frame_bytes(df: pd.DataFrame) -> bytes:
    """Deterministic bytes for a DataFrame: column names, dtypes and row hashes (index ignored)."""
    header = json.dumps([[str(c), str(t)] for c, t in df.dtypes.items()]).encode()
    try:
        rows = pd.util.hash_pandas_object(df, index=False)
    except TypeError:  # unhashable cells (lists, dicts): hash their repr instead
        rows = pd.util.hash_pandas_object(
            df.apply(lambda s: s.map(repr) if s.dtype == object else s), index=False
        )
    return header + b"\0" + np.ascontiguousarray(rows.to_numpy(dtype="<u8")).tobytes()


def _part_bytes(part: Any) -> bytes:
    if isinstance(part, pd.DataFrame):
        return b"D" + _frame_bytes(part)
    if isinstance(part, pd.Series):
        return b"D" + _frame_bytes(part.to_frame())
    if isinstance(part, (bytes, bytearray, memoryview)):
        return b"B" + bytes(part)
    if isinstance(part, str):
        return b"S" + part.encode("utf-8")
    return b"J" + json.dumps(part, sort_keys=True, default=str, allow_nan=True).encode("utf-8")


def content_hashes_of_slices(df: pd.DataFrame, bounds, *parts: Any) -> list[str]:
    """``content_hash(df.iloc[b:e], *parts)`` for each consecutive slice [b, e) of ``bounds``.

    Row hashes are computed once for the whole frame (a row's hash does not depend on the other
    rows), so this costs one pass over the frame plus one SHA-256 per slice; the digests equal
    those of :func:`content_hash` on each slice.
    """
    bounds = np.asarray(bounds, dtype=np.int64)
    header = json.dumps([[str(c), str(t)] for c, t in df.dtypes.items()]).encode()
    try:
        rows = pd.util.hash_pandas_object(df, index=False)
    except TypeError:
        return [content_hash(df.iloc[b:e], *parts) for b, e in zip(bounds[:-1], bounds[1:])]
    row_bytes = np.ascontiguousarray(rows.to_numpy(dtype="<u8")).tobytes()
    head = b"D" + header + b"\0"
    out = []
    for b, e in zip(bounds[:-1].tolist(), bounds[1:].tolist()):
        body = row_bytes[8 * b:8 * e]
        h = hashlib.sha256()
        h.update((len(head) + len(body)).to_bytes(8, "little"))
        h.update(head)
        h.update(body)
        out.append(h)
    suffix = b"".join(
        len(d).to_bytes(8, "little") + d for d in (_part_bytes(item) for item in parts))
    digests = []
    for h in out:
        h.update(suffix)
        digests.append(h.hexdigest())
    return digests


def content_hash(obj: Any, *parts: Any) -> str:
    """SHA-256 hex digest of a DataFrame (values, column names, dtypes, row order) or bytes, plus parts.

    DataFrames are hashed with ``pd.util.hash_pandas_object(df, index=False)`` (fixed key, so
    deterministic across processes) plus column names and dtypes; bytes and str as is; other
    parts as canonical JSON (sorted keys). Each component is length-prefixed. A pandas upgrade
    that changes its hashing only causes recomputation, never a wrong reuse of a different case.
    """
    h = hashlib.sha256()
    for item in (obj, *parts):
        data = _part_bytes(item)
        h.update(len(data).to_bytes(8, "little"))
        h.update(data)
    return h.hexdigest()


# ----------------------------------------------------------------------------------- helpers


def _check_table_name(name: str) -> str:
    if not isinstance(name, str) or not TABLE_NAME.fullmatch(name) or len(name) > 64:
        raise ValueError(
            f"invalid table name {name!r}: use lower-case letters, digits and '_', "
            "starting with a letter (pattern ^[a-z][a-z0-9_]*$, at most 64 characters)"
        )
    return name


def _new_run_id(now: _dt.datetime) -> str:
    return f"{now:%Y%m%dT%H%M%S%f}Z-{secrets.token_hex(3)}"


def _utcnow() -> _dt.datetime:
    return _dt.datetime.now(_dt.timezone.utc)


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:  # platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _json(value: Any) -> str:
    return json.dumps(value, sort_keys=True, default=str)


def _empty_runs() -> pd.DataFrame:
    ts = pd.DatetimeTZDtype("us", "UTC")
    data = {
        "run_id": pd.Series([], dtype=str),
        "started_at": pd.Series([], dtype=ts),
        "finished_at": pd.Series([], dtype=ts),
        "parameters": pd.Series([], dtype=str),
        "code_version": pd.Series([], dtype=str),
        "input_hashes": pd.Series([], dtype=str),
        "counts": pd.Series([], dtype=str),
        "tables": pd.Series([], dtype=str),
    }
    for col in COUNT_COLUMNS:
        data[col] = pd.Series([], dtype="Int64")
    return pd.DataFrame(data)


def _is_text(t: pa.DataType) -> bool:
    return pa.types.is_string(t) or pa.types.is_large_string(t)


def _text_dictionary(t: pa.DataType) -> bool:
    return pa.types.is_dictionary(t) and _is_text(t.value_type)


def _arrow_table(df: pd.DataFrame, categories_as_text: bool) -> tuple[pa.Table, pa.Schema]:
    """``df`` as an Arrow table, and the schema to write it with. With ``categories_as_text``,
    categorical columns of text (text held as codes in memory) are written as plain text, so a
    table's files look the same whatever its in-memory dtypes were, and reading them back gives
    strings."""
    table = pa.Table.from_pandas(df, preserve_index=False)
    if not categories_as_text:
        return table, table.schema
    text = [c for c in df.columns
            if isinstance(df[c].dtype, pd.CategoricalDtype) and _text_dictionary(table.schema.field(c).type)]
    if not text:
        return table, table.schema
    # the text columns' fields and pandas metadata as a text column's; every other column's as is
    plain = pa.Schema.from_pandas(df[text].iloc[:0].astype("str"), preserve_index=False)
    fields = [plain.field(f.name) if f.name in text else f for f in table.schema]
    meta = json.loads(table.schema.metadata[b"pandas"])
    as_text = {c["name"]: c for c in json.loads(plain.metadata[b"pandas"])["columns"]}
    meta["columns"] = [as_text.get(c["name"], c) if c["name"] in text else c for c in meta["columns"]]
    return table, pa.schema(fields, metadata={**table.schema.metadata, b"pandas": json.dumps(meta).encode()})


# Rows per row group of a table whose categoricals are decoded to text while it is written: every
# column of a row group is built before the group is written, so this bounds the decoded text in
# memory (a million rows of a dozen text columns would be about 0.3 GB).
DECODED_ROW_GROUP_ROWS = 131_072


def _write_parquet(df: pd.DataFrame, path: Path, row_group_size: int, categories_as_text: bool = False) -> None:
    table, schema = _arrow_table(df, categories_as_text)
    convert = schema != table.schema  # decoded a row group at a time (memory)
    if convert:
        row_group_size = min(row_group_size, DECODED_ROW_GROUP_ROWS)
    with pq.ParquetWriter(path, schema) as writer:
        if table.num_rows == 0:
            writer.write_table(table.cast(schema) if convert else table)
        for start in range(0, table.num_rows, row_group_size):
            part = table.slice(start, row_group_size)
            writer.write_table(part.cast(schema) if convert else part)
            _at("row_group")
    _fsync_file(path)


# ----------------------------------------------------------------------------------- writer


@dataclass(frozen=True)
class PreparedTable:
    """A table validated and written ahead of its run (:meth:`ResultsStore.prepare_table`): the
    run links the file in instead of holding the frame until it commits."""

    name: str
    path: Path
    store: Path  # the store it was validated for (resolved)
    n_rows: int
    columns: tuple[str, ...]


class Run:
    """One run being written: stage tables with :meth:`write_table`, then :meth:`commit`.

    Use as a context manager; leaving it without a commit (e.g. on an exception) aborts the
    run: its staging folder is removed, nothing is committed, and the lock is released.
    """

    def __init__(
        self,
        store: ResultsStore,
        lock: FileLock,
        run_id: str,
        started_at: _dt.datetime,
        parameters: Mapping[str, Any],
        code_version: str,
        input_hashes: Mapping[str, str],
        cleared: list[str],
    ) -> None:
        self.store = store
        self.run_id = run_id
        self.started_at = started_at
        self.parameters = dict(parameters)
        self.code_version = str(code_version)
        self.input_hashes = dict(input_hashes)
        self.cleared = cleared  # leftovers removed when this run began (paths, relative to store)
        self.staging = store.path / STAGING / run_id
        self._lock = lock
        self._tables: list[str] = []
        self._state = "open"  # open | failed | committed | aborted

    def __repr__(self) -> str:
        return f"Run({self.run_id!r}, state={self._state!r}, tables={self._tables})"

    def __enter__(self) -> Run:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._state != "committed":
            self.abort()

    @property
    def tables(self) -> list[str]:
        """Tables staged so far, in write order."""
        return list(self._tables)

    def _require_open(self) -> None:
        if self._state == "failed":
            raise StoreError(
                f"run {self.run_id} cannot be committed: an earlier write_table failed "
                "(see the previous exception); fix the data and start a new run"
            )
        if self._state != "open":
            raise StoreError(f"run {self.run_id} is already {self._state}; start a new run")

    def write_table(self, name: str, df: pd.DataFrame | PreparedTable) -> None:
        """Validate ``df`` with the store's validator for ``name`` (if any) and stage it.

        The index is kept as columns unless it is a plain unnamed RangeIndex. A column named
        ``run`` is refused (it is the partition column). If the validator raises, the run is
        marked failed and can no longer be committed. A :class:`PreparedTable` of this store
        (validated and written by :meth:`ResultsStore.prepare_table`) is linked into the run (its
        file stays, for the caller to remove).
        """
        self._require_open()
        _check_table_name(name)
        if name in self._tables:
            raise ValueError(f"table {name!r} was already written in run {self.run_id}")
        if isinstance(df, PreparedTable):
            self._stage_prepared(name, df)
            return
        if not isinstance(df, pd.DataFrame):
            raise TypeError(f"table {name!r}: expected a pandas DataFrame, got {type(df).__name__}")
        try:
            df = self.store._checked(name, df)
            folder = self.staging / name
            folder.mkdir(parents=True, exist_ok=False)
            _write_parquet(df, folder / PART_FILE, self.store.row_group_size, self.store.categories_as_text)
            _fsync_dir(folder)
        except BaseException:
            self._state = "failed"
            raise
        self._tables.append(name)

    def _stage_prepared(self, name: str, table: PreparedTable) -> None:
        if table.name != name:
            raise ValueError(f"table {name!r}: the prepared table is {table.name!r}")
        if table.store != self.store.path.resolve():
            raise ValueError(f"table {name!r} was prepared for the store {table.store}, not {self.store.path}")
        try:
            folder = self.staging / name
            folder.mkdir(parents=True, exist_ok=False)
            # linked (same store, same filesystem), or copied where links are not supported; the
            # prepared file stays, so a run that fails can be written again from it
            try:
                os.link(table.path, folder / PART_FILE)
            except OSError:
                if not table.path.exists():
                    raise
                shutil.copyfile(table.path, folder / PART_FILE)
                _fsync_file(folder / PART_FILE)
            _fsync_dir(folder)
        except BaseException:
            self._state = "failed"
            raise
        self._tables.append(name)

    def commit(self, counts: Mapping[str, Any] | None = None) -> str:
        """Move staged tables into place, append the run to ``runs.parquet``; returns the run id.

        ``counts`` is stored as JSON and its numeric entries also as columns (the usual ones
        being :data:`COUNT_COLUMNS`). The lock is released afterwards.
        """
        self._require_open()
        counts = dict(counts or {})
        root = self.store.path
        moved: list[Path] = []
        _at("commit_begin")
        try:
            _fsync_dir(self.staging)
            for name in self._tables:
                parent = root / name
                parent.mkdir(exist_ok=True)
                target = parent / f"run={self.run_id}"
                os.replace(self.staging / name, target)
                moved.append(target)
                _fsync_dir(parent)
                _at("moved")
            _fsync_dir(root)
            _at("moves_done")
            finished_at = _utcnow()
            self.store._append_ledger(self._ledger_row(finished_at, counts))
        except BaseException:
            self._state = "failed"
            for target in moved:  # roll back (a crash leaves them as orphans for the next writer)
                shutil.rmtree(target, ignore_errors=True)
            self.abort()
            raise
        self._state = "committed"
        _fsync_dir(root)
        _at("committed")
        shutil.rmtree(self.staging, ignore_errors=True)
        self._release()
        log.info("committed run %s (%s) to %s", self.run_id, ", ".join(self._tables), root)
        return self.run_id

    def abort(self) -> None:
        """Discard the staged tables and release the lock (no-op after commit)."""
        if self._state == "committed":
            return
        if self._state == "open":
            self._state = "aborted"
        shutil.rmtree(self.staging, ignore_errors=True)
        self._release()

    def _release(self) -> None:
        if self._lock.is_locked:
            self._lock.release()

    def _ledger_row(self, finished_at: _dt.datetime, counts: dict[str, Any]) -> pd.DataFrame:
        ts = pd.DatetimeTZDtype("us", "UTC")
        row: dict[str, Any] = {
            "run_id": pd.Series([self.run_id], dtype=str),
            "started_at": pd.Series([pd.Timestamp(self.started_at)], dtype=ts),
            "finished_at": pd.Series([pd.Timestamp(finished_at)], dtype=ts),
            "parameters": pd.Series([_json(self.parameters)], dtype=str),
            "code_version": pd.Series([self.code_version], dtype=str),
            "input_hashes": pd.Series([_json(self.input_hashes)], dtype=str),
            "counts": pd.Series([_json(counts)], dtype=str),
            "tables": pd.Series([_json(self._tables)], dtype=str),
        }
        for col in COUNT_COLUMNS:
            row[col] = pd.Series([counts.get(col)], dtype="Int64")
        for key, value in counts.items():  # extra numeric counts become columns too
            if key in row or not TABLE_NAME.fullmatch(str(key)):
                continue
            if isinstance(value, (bool, np.bool_)):
                continue
            if isinstance(value, (int, np.integer)):
                row[key] = pd.Series([value], dtype="Int64")
            elif isinstance(value, (float, np.floating)):
                row[key] = pd.Series([value], dtype="Float64")
        return pd.DataFrame(row)


# ----------------------------------------------------------------------------------- store


class ResultsStore:
    """A folder of Parquet tables partitioned by run, with a ledger of committed runs.

    Writers: ``with store.begin_run(parameters, code_version, input_hashes) as run:
    run.write_table("cases", df); run.commit(counts)`` (one writer at a time, file lock).
    Readers (never locked, never see half a run): :meth:`runs`, :meth:`table`,
    :meth:`reusable`. ``pd.read_parquet(path / "cases")`` also works (partition column
    ``run``) but may see an orphan folder from a crashed or in-progress writer until the
    next writer cleans it; this class reads only committed runs.

    validators: table name (or fnmatch pattern such as ``"summary_*"``) -> callable taking the
    frame and returning the (validated) frame, or raising (e.g. a pandera error) to refuse it.
    categories_as_text: write categorical columns of text as plain text columns (decoded a row
    group at a time), so they read back as strings; by default categoricals stay categoricals.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        validators: Mapping[str, Validator] | None = None,
        *,
        row_group_size: int = 1_000_000,
        categories_as_text: bool = False,
    ) -> None:
        self.path = Path(path)
        self.path.mkdir(parents=True, exist_ok=True)
        self.validators = dict(validators or {})
        self.row_group_size = max(int(row_group_size), 1)
        self.categories_as_text = bool(categories_as_text)

    def __repr__(self) -> str:
        return f"ResultsStore({str(self.path)!r})"

    # ---------------------------------------------------------------- writing

    def begin_run(
        self,
        parameters: Mapping[str, Any] | None = None,
        code_version: str = "",
        input_hashes: Mapping[str, str] | None = None,
        lock_timeout: float = 60,
    ) -> Run:
        """Take the writer lock (waiting up to ``lock_timeout`` s), clear leftovers, start a run.

        Leftovers of crashed writers are removed first: the whole ``.staging`` folder,
        ``runs.parquet.tmp`` and table folders ``<table>/run=<id>`` whose id is not in the ledger.
        """
        lock = FileLock(self.path / LOCK)
        try:
            lock.acquire(timeout=lock_timeout)
        except Timeout:
            raise StoreLockedError(
                f"results store {self.path} is locked by another writer (waited {lock_timeout:g} s "
                f"for {self.path / LOCK}); wait for the other run to finish, or pass a longer "
                "lock timeout. Reading the store needs no lock."
            ) from None
        try:
            cleared = self._clear_leftovers()
            started = _utcnow()
            run_id = _new_run_id(started)
            (self.path / STAGING / run_id).mkdir(parents=True)
        except BaseException:
            lock.release()
            raise
        return Run(
            self, lock, run_id, started, parameters or {}, code_version, input_hashes or {}, cleared
        )

    def _validator_for(self, name: str) -> Validator | None:
        if name in self.validators:
            return self.validators[name]
        for pattern, fn in self.validators.items():
            if fnmatch.fnmatchcase(name, pattern):
                return fn
        return None

    def _checked(self, name: str, df: pd.DataFrame) -> pd.DataFrame:
        """``df`` as it is written: validated, index as columns, column names checked."""
        validator = self._validator_for(name)
        if validator is not None:
            out = validator(df)
            df = df if out is None else out
        if not (isinstance(df.index, pd.RangeIndex) and df.index.names == [None]):
            df = df.reset_index()
        if "run" in df.columns:
            raise ValueError(
                f"table {name!r} has a column named 'run', which is reserved for the run "
                "partition; rename or drop it before writing"
            )
        bad = [c for c in df.columns if not isinstance(c, str)]
        if bad:
            raise ValueError(f"table {name!r}: column names must be strings, got {bad!r}")
        return df

    def prepare_table(self, name: str, df: pd.DataFrame, folder: str | os.PathLike[str]) -> PreparedTable:
        """Validate ``df`` as :meth:`Run.write_table` does and write it to a new file in ``folder``
        (inside this store: the run links it in). No lock is taken: the file is not part of the
        store until a run stages it; the file is the caller's to remove (e.g. with its folder)."""
        _check_table_name(name)
        if not isinstance(df, pd.DataFrame):
            raise TypeError(f"table {name!r}: expected a pandas DataFrame, got {type(df).__name__}")
        folder = Path(folder).resolve()
        root = self.path.resolve()
        if root not in folder.parents:
            raise ValueError(f"prepared tables of the store {root} must be written inside it, not in {folder}")
        df = self._checked(name, df)
        path = folder / f"{name}-{secrets.token_hex(4)}.parquet"
        _write_parquet(df, path, self.row_group_size, self.categories_as_text)
        return PreparedTable(name, path, root, int(len(df)), tuple(str(c) for c in df.columns))

    def _clear_leftovers(self) -> list[str]:
        """Remove staging, ledger temp file and orphan run folders (caller holds the lock)."""
        cleared: list[str] = []
        staging = self.path / STAGING
        if staging.exists():
            for child in staging.iterdir():
                if child.is_dir():
                    shutil.rmtree(child)
                else:
                    child.unlink()
                cleared.append(str(child.relative_to(self.path)))
        tmp = self.path / (LEDGER + ".tmp")
        if tmp.exists():
            tmp.unlink()
            cleared.append(tmp.name)
        committed = set(self._read_ledger()["run_id"])
        for table_dir in self._table_dirs():
            for part in table_dir.iterdir():
                if part.is_dir() and part.name.startswith("run="):
                    if part.name[len("run=") :] not in committed:
                        shutil.rmtree(part)
                        cleared.append(str(part.relative_to(self.path)))
            if not any(table_dir.iterdir()):
                table_dir.rmdir()
        if cleared:
            log.warning("cleared leftovers of an unfinished run in %s: %s", self.path, cleared)
        return cleared

    def _table_dirs(self) -> list[Path]:
        return sorted(
            p for p in self.path.iterdir() if p.is_dir() and TABLE_NAME.fullmatch(p.name)
        )

    def _append_ledger(self, row: pd.DataFrame) -> None:
        old = self._read_ledger()
        new = row if old.empty else pd.concat([old, row], ignore_index=True)
        tmp = self.path / (LEDGER + ".tmp")
        new.to_parquet(tmp, index=False)
        _fsync_file(tmp)
        _at("ledger_tmp_written")
        os.replace(tmp, self.path / LEDGER)  # the commit point

    # ---------------------------------------------------------------- reading

    def _read_ledger(self) -> pd.DataFrame:
        ledger = self.path / LEDGER
        if not ledger.exists():
            return _empty_runs()
        return pd.read_parquet(ledger)

    def runs(self) -> pd.DataFrame:
        """Committed runs, one row each, in commit order (empty frame with the columns if none)."""
        return self._read_ledger()

    def latest_run_id(self) -> str | None:
        """Id of the last committed run, or None for an empty store."""
        runs = self._read_ledger()
        return None if runs.empty else str(runs["run_id"].iloc[-1])

    def run_info(self, run: str = "latest") -> dict[str, Any]:
        """One committed run's ledger row with its JSON fields parsed."""
        runs = self._read_ledger()
        run_id = self._resolve_runs(runs, run)[0]
        rec = runs.loc[runs["run_id"] == run_id].iloc[0].to_dict()
        for key in ("parameters", "input_hashes", "counts", "tables"):
            rec[key] = json.loads(rec[key])
        return rec

    def tables(self, run: str = "latest") -> list[str]:
        """Names of the tables written by a committed run."""
        return list(self.run_info(run)["tables"])

    def _empty_error(self) -> StoreEmptyError:
        return StoreEmptyError(
            f"no committed run in {self.path}; run `sced-audit run ... --store {self.path}` first"
        )

    def _resolve_runs(self, runs: pd.DataFrame, run: str | Iterable[str]) -> list[str]:
        if runs.empty:
            raise self._empty_error()
        ids = [str(r) for r in runs["run_id"]]
        if isinstance(run, str):
            if run == "latest":
                return [ids[-1]]
            if run == "all":
                return ids
            wanted = [run]
        else:
            wanted = [str(r) for r in run]
        unknown = [r for r in wanted if r not in ids]
        if unknown:
            raise StoreEmptyError(
                f"run(s) {unknown} not committed in {self.path}; committed runs: "
                f"{ids[-5:]}{' ...' if len(ids) > 5 else ''} (see ResultsStore.runs())"
            )
        return wanted

    def _read_partition(self, name: str, run_id: str, filters: Mapping[str, Any] | None = None) -> pd.DataFrame | None:
        folder = self.path / name / f"run={run_id}"
        files = sorted(folder.glob("part-*.parquet")) if folder.is_dir() else []
        if not files:
            return None
        frames = [_read_part(f, filters) for f in files]
        df = frames[0] if len(frames) == 1 else pd.concat(frames, ignore_index=True)
        df["run"] = pd.Series(run_id, index=df.index, dtype=str)
        return df

    def table(
        self, name: str, run: str | Iterable[str] = "latest", **filters: Any
    ) -> pd.DataFrame:
        """Rows of table ``name`` from committed runs, with a ``run`` column.

        run: "latest" (last committed run), "all", one run id, or a list of ids.
        filters: column=value keeps rows equal to value; a list, tuple or set keeps rows whose
        value is in it.
        """
        _check_table_name(name)
        runs = self._read_ledger()
        run_ids = self._resolve_runs(runs, run)
        frames = [f for r in run_ids if (f := self._read_partition(name, r, filters)) is not None]
        if not frames:
            where = f"run {run_ids[0]}" if len(run_ids) == 1 else f"any of {len(run_ids)} runs"
            raise KeyError(
                f"table {name!r} was not written by {where} in {self.path}; "
                f"tables of the latest run: {self.tables('latest')}"
            )
        df = frames[0] if len(frames) == 1 else pd.concat(frames, ignore_index=True)
        df = df[[c for c in df.columns if c != "run"] + ["run"]]
        return _apply_filters(df, filters, name)

    def reusable(self, table: str, hashes: Iterable[str], key: str = "case_hash") -> pd.DataFrame:
        """Rows of ``table`` in the latest committed run whose ``key`` is in ``hashes``.

        Returned without the ``run`` column (ready to be written into the new run); the source
        run id is in ``df.attrs["source_run"]``. Empty frame when there is no committed run, the
        latest run has no such table, or nothing matches.
        """
        _check_table_name(table)
        wanted = set(hashes)
        runs = self._read_ledger()
        if runs.empty or not wanted:
            return pd.DataFrame()
        run_id = str(runs["run_id"].iloc[-1])
        df = self._read_partition(table, run_id, {key: list(wanted)})  # matching rows only, when text
        if df is None:
            return pd.DataFrame()
        if key not in df.columns:
            raise KeyError(
                f"table {table!r} of run {run_id} has no key column {key!r}; "
                f"columns: {list(df.columns)}"
            )
        keep = df[key].isin(wanted).to_numpy(dtype=bool)
        out = (df if keep.all() else df.loc[keep]).drop(columns="run").reset_index(drop=True)
        out.attrs["source_run"] = run_id
        return out


def _text_filters(schema: pa.Schema, filters: Mapping[str, Any] | None) -> list[tuple[str, str, list[str]]]:
    """The filters that can be applied while reading: text values on text columns. The callers
    apply every filter again afterwards (:func:`_apply_filters`, the key check of ``reusable``),
    so a filter left out here only costs memory."""
    out = []
    for column, value in (filters or {}).items():
        values = list(value) if isinstance(value, (list, tuple, set, frozenset)) else [value]
        field = schema.field(column) if column in schema.names else None
        if field is not None and _is_text(field.type) and values and all(isinstance(v, str) for v in values):
            out.append((column, "in", values))
    return out


def _read_part(path: Path, filters: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """One part file as a frame. With text filters, only the matching rows are built: the text
    columns are read as dictionaries (row group by row group) and decoded after filtering, so a
    few cases of a large table cost memory for a few cases."""
    schema = pq.read_schema(path)
    pushed = _text_filters(schema, filters)
    if not pushed:
        return pd.read_parquet(path)
    text = [f.name for f in schema if _is_text(f.type)]
    table = pq.read_table(path, filters=pushed, read_dictionary=text)
    table = table.cast(pa.schema([schema.field(c) for c in table.column_names], metadata=table.schema.metadata))
    return table.to_pandas()


def _apply_filters(df: pd.DataFrame, filters: Mapping[str, Any], name: str) -> pd.DataFrame:
    if not filters:
        return df
    mask = pd.Series(True, index=df.index)
    for column, value in filters.items():
        if column not in df.columns:
            raise KeyError(
                f"filter column {column!r} is not in table {name!r}; columns: {list(df.columns)}"
            )
        if isinstance(value, (list, tuple, set, frozenset)):
            mask &= df[column].isin(list(value))
        else:
            mask &= df[column] == value
    return df.loc[mask.to_numpy(dtype=bool)].reset_index(drop=True)
