"""From input paths to validated, repaired observations: find files, read each, prepare the rows."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from audit.config import AuditConfig
from audit.ingest import FileProblem, FileRead, InputError, find_input_files, read_input_file
from audit.validation import PreparedInput, prepare_rows


@dataclass
class ReviewInput:
    """Everything intake produced: the prepared tables plus what each file gave."""

    prepared: PreparedInput
    files: list[FileRead] = field(default_factory=list)
    path_problems: list[FileProblem] = field(default_factory=list)

    def per_file(self) -> pd.DataFrame:
        """One row per input file: rows read, accepted, quarantined, problems and what was detected."""
        q = self.prepared.quarantine
        obs = self.prepared.observations
        adj = self.prepared.adjustments
        records = []
        for f in self.files:
            name = str(f.path)
            qf = q[q["source_file"] == name]
            records.append({
                "file": name,
                "rows_read": f.rows_read,
                # own rows, plus own rows collapsed into an identical point (possibly of another file)
                "rows_accepted": int((obs["source_file"] == name).sum())
                + int(((adj["source_file"] == name) & (adj["rule"] == "duplicate_collapsed")).sum()),
                "rows_quarantined": int(qf["n_rows"].sum()),
                "problems": len(qf),
                "adjustments": int((adj["source_file"] == name).sum()),
                "detected": ", ".join(f"{k}={_show(v)}" for k, v in f.details.items() if v),
            })
        return pd.DataFrame(records, columns=["file", "rows_read", "rows_accepted", "rows_quarantined",
                                              "problems", "adjustments", "detected"])


def _show(value: str) -> str:
    return {"\t": "tab", ",": "comma", ";": "semicolon", "|": "pipe", ".": "point"}.get(value, value)


def read_files(paths: list[str | Path]) -> tuple[list[Path], list[FileProblem]]:
    """Find input files; raise InputError when there is nothing to read at all."""
    files, problems = find_input_files(list(paths))
    if not files:
        reasons = "; ".join(p.message for p in problems) or "no input paths given"
        raise InputError(f"nothing to read: {reasons}")
    return files, problems


def combine(reads: list[FileRead], path_problems: list[FileProblem], config: AuditConfig) -> ReviewInput:
    """Prepare the rows of all files together (a case may span files).

    Each FileRead's raw rows are released once they are concatenated (``FileRead.release_rows``):
    only the prepared tables stay in memory.
    """
    if not reads:
        raise InputError("nothing to read")
    raw = _concat_releasing(reads)  # each file's rows are dropped as they are copied (counts are kept)
    problems = [p for r in reads for p in r.problems]
    handed = [raw]  # prepare_rows gets the only reference: raw columns are freed as they are cleaned
    del raw
    prepared = prepare_rows(handed.pop(), problems, config)
    return ReviewInput(prepared=prepared, files=reads, path_problems=path_problems)


def _concat_releasing(reads: list[FileRead]) -> pd.DataFrame:
    """The rows of all files in one frame, built column by column: each file's copy of a column is
    dropped once that column is joined, so the peak is one column above the files' rows."""
    frames = [r.rows for r in reads if len(r.rows)]
    empty = reads[0].rows.iloc[0:0].copy()  # (a view would keep the first file's columns alive)
    columns = list(frames[0].columns) if frames else []
    same = all(list(f.columns) == columns and (f.dtypes == frames[0].dtypes).all() for f in frames)
    for r in reads:
        r.release_rows()
    if not frames:
        return empty
    if not same or any(isinstance(t, pd.CategoricalDtype) or not isinstance(t, np.dtype) for t in frames[0].dtypes):
        raw = pd.concat(frames, ignore_index=True)
        del frames
        return raw
    n = sum(len(f) for f in frames)
    data = {}
    for col in columns:
        values = np.concatenate([f[col].to_numpy() for f in frames])
        data[col] = pd.Series(values, dtype=values.dtype, index=pd.RangeIndex(n), copy=False)  # no inference
        frames = [f.drop(columns=col) for f in frames]
    del frames
    return pd.DataFrame(data, copy=False)


def load_review(paths: list[str | Path], config: AuditConfig) -> ReviewInput:
    """Find, read and prepare every input file (the sequential path; flows run files as tasks)."""
    files, path_problems = read_files(paths)
    reads = [read_input_file(f, config) for f in files]
    return combine(reads, path_problems, config)
