"""Batch results kept on disk while a run diagnoses its other batches.

A large run holds every batch's tables until they are joined (100,000 cases: about 340 MB of
tables). With a spill folder, each batch's tables are written where they are computed (in the
worker process) as Arrow IPC files, and only a small handle (:class:`SpilledTables`) comes back;
the tables are read back one at a time when they are joined. The tables read back are equal to
the ones written, dtypes included (nullable integers and booleans), except that categorical
columns come back as text (their values are the same; :meth:`SpilledTables.categorical` names
them, and the run makes them categoricals again once the batches are joined).

The folder lives inside the results store (the user's chosen disk, not a temporary file system
that may be memory) under ``.batches/`` and is removed when the run ends; folders left by a run
that was killed are removed by the next run.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import uuid
from collections.abc import Iterator, Mapping, MutableMapping
from contextlib import contextmanager
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.ipc as ipc

SPILL_FOLDER = ".batches"
_COMPRESSION = "lz4"  # fast; the files are read back once


class SpilledTables(MutableMapping):
    """The tables of one batch, as files: ``handle[name]`` reads one back, ``pop`` deletes it."""

    def __init__(self, folder: str | Path, names: list[str], categorical: Mapping[str, list[str]] | None = None):
        self.folder = Path(folder)
        self._names = list(names)
        self._categorical = {k: list(v) for k, v in (categorical or {}).items()}

    def categorical(self, name: str) -> list[str]:
        """The columns of table ``name`` that were categorical (they are read back as text)."""
        return self._categorical.get(name, [])

    def _path(self, name: str) -> Path:
        return self.folder / f"{self._names.index(name)}.arrow"

    def __getitem__(self, name: str) -> pd.DataFrame:
        if name not in self._names:
            raise KeyError(name)
        # the C allocator, not Arrow's pool: the decoded buffers go back to the system once the
        # frame is built (Arrow's pool would keep them for reuse, and the run's peak with them)
        pool = pa.system_memory_pool()
        with pa.memory_map(str(self._path(name))) as source:
            table = ipc.open_file(source, memory_pool=pool).read_all()
        return table.to_pandas(memory_pool=pool)

    def __setitem__(self, name: str, frame: pd.DataFrame) -> None:
        raise TypeError("spilled tables are read-only")

    def __delitem__(self, name: str) -> None:
        if name not in self._names:
            raise KeyError(name)
        self._path(name).unlink(missing_ok=True)
        self._names[self._names.index(name)] = None  # keeps the other names' file numbers

    def __iter__(self) -> Iterator[str]:
        return (n for n in self._names if n is not None)

    def __len__(self) -> int:
        return sum(n is not None for n in self._names)

    def __repr__(self) -> str:
        return f"SpilledTables({str(self.folder)!r}, {list(self)})"


def spill_tables(tables: Mapping[str, pd.DataFrame], folder: str | Path) -> SpilledTables:
    """Write ``tables`` to a new subfolder of ``folder``; the handle to read them back."""
    target = Path(folder) / uuid.uuid4().hex
    target.mkdir(parents=True)
    names = list(tables)
    categorical = {name: [str(c) for c, t in tables[name].dtypes.items() if isinstance(t, pd.CategoricalDtype)]
                   for name in names}
    options = ipc.IpcWriteOptions(compression=_COMPRESSION)
    for i, name in enumerate(names):
        table = _text_as_text(pa.Table.from_pandas(tables[name]))
        with ipc.new_file(str(target / f"{i}.arrow"), table.schema, options=options) as writer:
            writer.write_table(table)
    return SpilledTables(target, names, categorical)


def _text_as_text(table: pa.Table) -> pa.Table:
    """Categorical columns as plain text. A batch's categoricals carry the categories of the whole
    run's observations (every case key, study ...): written as such, every batch file would hold
    them all, and every batch read back would build them again."""
    for i, field in enumerate(table.schema):
        if pa.types.is_dictionary(field.type):
            plain = field.type.value_type
            table = table.set_column(i, field.with_type(plain), table.column(i).cast(plain))
    return table


def _owner_alive(folder: Path) -> bool:
    try:
        pid = int(folder.name.split("-")[1])
    except (IndexError, ValueError):
        return False
    if pid == os.getpid() or os.name != "posix":  # (on Windows, os.kill would stop the process)
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's live process
        return True
    return True


@contextmanager
def spill_folder(store_path: str | Path) -> Iterator[Path]:
    """A new folder for one run's batch results under ``<store>/.batches``, removed afterwards
    (with the folders of runs whose process is gone)."""
    root = Path(store_path) / SPILL_FOLDER
    root.mkdir(parents=True, exist_ok=True)
    for old in root.iterdir():
        if old.is_dir() and not _owner_alive(old):
            shutil.rmtree(old, ignore_errors=True)
    folder = Path(tempfile.mkdtemp(prefix=f"run-{os.getpid()}-", dir=root))
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)
        try:
            root.rmdir()  # only when no other run uses it
        except OSError:
            pass
