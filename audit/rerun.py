"""Whole audit runs with content-hash reuse: the plain sequential path and the steps flows reuse.

A case's hash is the SHA-256 of its clean observation values, the run parameters and the code
version (:func:`case_hashes`). A rerun looks the hashes up in the latest committed run
(:meth:`audit.store.ResultsStore.reusable`) and diagnoses only the cases it does not find; the
reused rows are copied into the new run, so every run is complete on its own.

Reuse assumes a case's diagnostics depend only on its own rows, the parameters and the code:
``diagnose_cases`` of a batch must give, for each case, what it gives for that case alone.

The steps (:func:`find_inputs`, :func:`read_input_file`, :func:`combine_reads`, :func:`plan_run`,
:func:`diagnose_batch`, :func:`summary_tables`, :func:`write_run`, :func:`write_report`) are
plain functions; :func:`run_audit` chains them sequentially and ``flows.review`` runs the same
functions as Prefect tasks, so both paths write the same store content.
"""

from __future__ import annotations

import ast
import dataclasses
import hashlib
import importlib
import inspect
import json
import logging
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Mapping, MutableMapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from audit import __version__
from audit.config import AuditConfig
from audit.ingest import FileProblem, FileRead, InputError, read_input_file
from audit.intake import ReviewInput, combine, read_files
from audit.validation import CaseOrder, validate_in_slices
from audit.memory import release_freed_memory
from audit.parallel import DiagnosePool, input_bytes, workers_for_input
from audit.spill import SpilledTables, spill_folder, spill_tables
from audit.store import ResultsStore, content_hashes_of_slices, file_sha256

__all__ = [
    "DEFAULT_BATCH_SIZE",
    "ReusePlan",
    "RunSummary",
    "case_batch_rows",
    "case_batches",
    "case_hashes",
    "code_version",
    "combine_reads",
    "diagnose_batch",
    "find_inputs",
    "input_hashes",
    "open_store",
    "plan_run",
    "read_and_hash",
    "read_input_file",
    "run_audit",
    "split_for_reuse",
    "summary_tables",
    "write_report",
    "write_run",
]

log = logging.getLogger(__name__)

DEFAULT_BATCH_SIZE = 2000
HASH_KEY = "case_hash"
# Provenance only: where a point came from does not change its diagnostics, so renaming or
# moving a file (or re-ordering its rows) does not force a recomputation.
HASH_EXCLUDED_COLUMNS = ("source_file", "source_sheet", "source_row")
# Tables written by every run that are not per-case diagnostics (never reused).
INPUT_TABLES = ("observations", "quarantine", "adjustments")

Diagnose = Callable[..., Mapping[str, pd.DataFrame]]
Progress = Callable[[str, int, int], None]  # (stage, done, total); stages "read", "diagnose"


# ----------------------------------------------------------------------------------- results


@dataclass(frozen=True)
class RunSummary:
    """What one committed run did: its id, where it is, and its counts."""

    run_id: str
    store: Path
    cases_audited: int
    cases_reused: int
    cases_computed: int
    cases_quarantined: int
    rows_read: int
    rows_accepted: int
    rows_quarantined: int
    flips: int | None
    input_problems: int
    tables: tuple[str, ...]
    report: Path | None = None
    unchanged: bool = False  # nothing was run: the latest run already used these inputs (unchanged_run)

    @property
    def has_quarantine(self) -> bool:
        """True when some input was left out (quarantined rows or cases, unusable paths)."""
        return bool(self.rows_quarantined or self.cases_quarantined or self.input_problems)

    def closing_line(self) -> str:
        """One line for people: cases audited, reused, quarantined, flips and where the results are."""
        flips = "n/a" if self.flips is None else str(self.flips)
        if self.unchanged:
            text = (f"No change since run {self.run_id}: same input files (byte for byte), parameters and code "
                    f"version, so nothing was recomputed (--force recomputes). That run audited "
                    f"{self.cases_audited} case(s); {self.cases_quarantined} quarantined; {flips} flip(s). "
                    f"Results: {self.store}")
            return text + (f"; report: {self.report}" if self.report is not None else "")
        text = (
            f"Audited {self.cases_audited} case(s): {self.cases_reused} reused, "
            f"{self.cases_computed} computed; {self.cases_quarantined} quarantined; "
            f"{flips} flip(s). Results: {self.store} (run {self.run_id})"
        )
        if self.report is not None:
            text += f"; report: {self.report}"
        return text

    def as_dict(self) -> dict[str, Any]:
        """Plain-data view (paths as strings)."""
        return {
            "run_id": self.run_id,
            "store": str(self.store),
            "cases_audited": self.cases_audited,
            "cases_reused": self.cases_reused,
            "cases_computed": self.cases_computed,
            "cases_quarantined": self.cases_quarantined,
            "rows_read": self.rows_read,
            "rows_accepted": self.rows_accepted,
            "rows_quarantined": self.rows_quarantined,
            "flips": self.flips,
            "unchanged": self.unchanged,
            "input_problems": self.input_problems,
            "tables": list(self.tables),
            "report": None if self.report is None else str(self.report),
        }


@dataclass
class ReusePlan:
    """Which cases a run diagnoses and which it copies from the latest committed run."""

    code_version: str
    hashes: pd.Series  # case_key -> case_hash, every accepted case
    to_compute: pd.DataFrame  # observations of the cases to diagnose
    # table -> rows copied: ``cases`` as a frame, the other tables as ReusedRows (read when joined)
    reused: dict[str, Any] = field(default_factory=dict)
    source_run: str | None = None
    # cases copied (``reused`` is emptied as its tables are joined: ``assemble_tables``)
    n_reused: int = field(init=False)

    def __post_init__(self) -> None:
        cases = self.reused.get("cases")
        self.n_reused = 0 if cases is None else int(len(cases))

    @property
    def n_to_compute(self) -> int:
        return int(self.to_compute["case_key"].nunique()) if len(self.to_compute) else 0


# ----------------------------------------------------------------------------------- hashing


def pipeline_version() -> str:
    """Digest of every source file of the packages audit and schemas (and audit's data files).

    Unlike :func:`code_version` (per-case statistics only), any edit to ingest, validation, the
    summary or the report changes it; :func:`unchanged_run` uses it to decide that a whole run
    would come out the same.
    """
    base = Path(__file__).resolve().parent.parent
    h = hashlib.sha256(__version__.encode())
    for package in ("audit", "schemas"):
        root = base / package
        for path in sorted(p for p in root.rglob("*") if p.is_file() and "__pycache__" not in p.parts
                           and p.suffix != ".pyc"):
            h.update(str(path.relative_to(base)).encode())
            h.update(b"\0")
            h.update(path.read_bytes())
            h.update(b"\0")
    return h.hexdigest()[:16]


def _audit_imports(path: Path) -> set[str]:
    """Names of the audit modules a source file imports (anywhere in it, relative imports too)."""
    tree = ast.parse(path.read_bytes(), filename=str(path))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("audit."):
                    found.add(alias.name.split(".")[1])
        elif isinstance(node, ast.ImportFrom):
            module = node.module or ""
            if node.level == 1 or module == "audit":  # from . import x / from audit import x
                if module and node.level == 1:
                    found.add(module.split(".")[0])
                else:
                    found.update(alias.name for alias in node.names)
            elif module.startswith("audit."):
                found.add(module.split(".")[1])
    return found


def code_version(entry: str = "diagnose") -> str:
    """Package version plus a digest of the source of ``audit.<entry>`` and every audit module it imports.

    Any edit to the per-case statistics (or to the package data files) changes it, so a rerun
    after such a change recomputes every case; edits elsewhere (CLI, summary, report) do not.
    """
    root = Path(__file__).resolve().parent
    todo, seen = [entry], set()
    while todo:
        name = todo.pop()
        if name in seen or not (root / f"{name}.py").is_file():
            continue
        seen.add(name)
        todo.extend(_audit_imports(root / f"{name}.py") - seen)
    files = [root / f"{name}.py" for name in sorted(seen)]
    data = root / "data"
    if data.is_dir():
        files += sorted(p for p in data.rglob("*") if p.is_file() and "__pycache__" not in p.parts)
    h = hashlib.sha256()
    for path in files:
        h.update(str(path.relative_to(root)).encode())
        h.update(b"\0")
        h.update(path.read_bytes())
        h.update(b"\0")
    return f"{__version__}+src.{h.hexdigest()[:12]}"


def _canonical(observations: pd.DataFrame) -> pd.DataFrame:
    """Observation columns that matter for results, with dtypes fixed (numbers float64, the rest text).

    Fixing dtypes keeps a case's hash stable when the review around it changes (e.g. a column
    that was all empty becomes text once another file fills it).
    """
    cols = sorted(c for c in observations.columns if c not in HASH_EXCLUDED_COLUMNS)
    out = {}
    for col in cols:
        s = observations[col]
        if pd.api.types.is_bool_dtype(s) or pd.api.types.is_numeric_dtype(s):
            out[col] = pd.Series(s.to_numpy(dtype=float, na_value=np.nan), dtype="float64")
        else:
            arr = s.to_numpy(dtype=object)
            missing = pd.isna(arr)
            if pd.api.types.infer_dtype(arr, skipna=True) in ("string", "empty"):  # text: str(v) is v
                values = arr.copy()
                values[missing] = "\0NA"
            else:
                values = [("\0NA" if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NA else str(v))
                          for v in arr]
            out[col] = pd.Series(values, dtype=object)
    return pd.DataFrame(out)


HASH_CHUNK_ROWS = 250_000  # rows of whole cases hashed at a time (bounds the canonical text copy)


def case_hashes(observations: pd.DataFrame, parameters: Mapping[str, Any], code_version: str) -> pd.Series:
    """case_key -> SHA-256 of the case's observation values, the parameters and the code version.

    Equals :func:`audit.store.content_hash` of each case's rows (in session order, provenance
    columns source_file/source_sheet/source_row left out, dtypes fixed), computed by
    :func:`audit.store.content_hashes_of_slices` over chunks of whole cases (about
    ``HASH_CHUNK_ROWS`` rows each), so that the canonical copy of the text stays chunk-sized.
    """
    if observations.empty:
        return pd.Series([], index=pd.Index([], name="case_key", dtype=object), name=HASH_KEY, dtype=object)
    case_order = CaseOrder.of(observations)
    order, bounds = case_order.rows, case_order.starts
    columns = [c for c in observations.columns if c not in HASH_EXCLUDED_COLUMNS]
    digests: list[str] = []
    first = 0  # index into bounds of the chunk's first case
    while first < len(bounds) - 1:
        last = int(np.searchsorted(bounds, bounds[first] + HASH_CHUNK_ROWS, side="right")) - 1
        last = min(max(last, first + 1), len(bounds) - 1)
        lo, hi = int(bounds[first]), int(bounds[last])
        chunk = observations[columns].take(order[lo:hi]).reset_index(drop=True)
        canon = _canonical(chunk)
        del chunk
        digests.extend(content_hashes_of_slices(canon, bounds[first:last + 1] - lo, dict(parameters), str(code_version)))
        del canon
        first = last
    keys = [str(k) for k in case_order.keys]
    series = pd.Series(digests, index=keys, name=HASH_KEY, dtype=object)
    series.index.name = "case_key"
    return series


def input_hashes(files: Iterable[FileRead | str | Path]) -> dict[str, str]:
    """Input file -> SHA-256 of its bytes (the run record's input_hashes)."""
    out: dict[str, str] = {}
    for f in files:
        path = f.path if isinstance(f, FileRead) else Path(f)
        try:
            out[str(path)] = file_sha256(path)
        except OSError:
            out[str(path)] = ""
    return out


# ----------------------------------------------------------------------------------- store


def _optional(module: str, name: str) -> Any | None:
    """``module.name`` when the module exists, else None (errors inside the module still raise)."""
    try:
        mod = importlib.import_module(module)
    except ModuleNotFoundError as exc:
        if exc.name == module:
            return None
        raise
    return getattr(mod, name, None)


def _validators() -> dict[str, Callable[[pd.DataFrame], pd.DataFrame]]:
    """Table name -> pandera validation for every table that has a schema."""
    from schemas.tables import Adjustments, Observations, Quarantine

    models: dict[str, Any] = {
        "observations": Observations,
        "quarantine": Quarantine,
        "adjustments": Adjustments,
    }
    try:
        results = importlib.import_module("schemas.results")
    except ModuleNotFoundError as exc:
        if exc.name != "schemas.results":
            raise
        results = None
    if results is not None:
        declared = getattr(results, "TABLE_SCHEMAS", None)
        if isinstance(declared, Mapping):
            models.update(declared)
        else:
            for table, cls_name in (("cases", "CaseResults"), ("phases", "PhaseResults"),
                                    ("contrasts", "ContrastResults")):
                model = getattr(results, cls_name, None)
                if model is not None:
                    models[table] = model
    # whole cases at a time for long tables: pandera's working copies stay slice-sized (a whole
    # observations table would be copied, its text checked as one string object per row)
    validators = {name: (lambda df, m=model: validate_in_slices(df, m)) for name, model in models.items()}
    from schemas.summary import summary_validators

    validators.update(summary_validators())
    return validators


def open_store(path: str | Path) -> ResultsStore:
    """The results store at ``path`` with the pandera schema of every table as its validators."""
    return ResultsStore(path, validators=_validators(), categories_as_text=True)


def _diagnostic_tables(store: ResultsStore) -> list[str]:
    """Per-case result tables of the latest committed run (every table but the input-side ones)."""
    try:
        tables = store.tables("latest")
    except LookupError:
        return []
    return [t for t in tables if t not in INPUT_TABLES and not t.startswith("summary")]


@dataclass(frozen=True, eq=False)
class ReusedRows:
    """The rows of one table of the latest run that belong to reused cases, read when called
    (None when there are none): a large table is read only when it is joined."""

    store: ResultsStore
    table: str
    hashes: np.ndarray

    def __call__(self) -> pd.DataFrame | None:
        try:
            rows = self.store.reusable(self.table, self.hashes)
        except KeyError:  # that table of the latest run carries no case_hash
            return None
        return rows.reset_index(drop=True) if len(rows) else None


def split_for_reuse(
    observations: pd.DataFrame, hashes: pd.Series, store: ResultsStore | None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Observations of the cases to diagnose, and the rows reused from the latest run, per table.

    A case is reused when its hash is in the latest run's ``cases`` table; its rows of every
    other diagnostics table of that run come along (matched by ``case_hash``). Those other
    tables are given as :class:`ReusedRows`, read when called.
    """
    if store is None or hashes.empty:
        return observations, {}
    tables = _diagnostic_tables(store)
    if "cases" not in tables:
        return observations, {}
    try:
        previous = store.reusable("cases", hashes.to_numpy())
    except KeyError:  # the latest run's cases carry no case_hash: nothing to match
        return observations, {}
    if previous.empty:
        return observations, {}
    found = set(previous[HASH_KEY])
    reuse_keys = set(hashes.index[hashes.isin(found)])
    reused: dict[str, Any] = {"cases": previous}
    wanted = hashes[hashes.index.isin(reuse_keys)].to_numpy()
    for table in tables:
        if table != "cases":  # read when the table is joined (``assemble_tables``), not all at once here
            reused[table] = ReusedRows(store, table, wanted)
    to_compute = observations.loc[~observations["case_key"].isin(reuse_keys)].reset_index(drop=True)
    return to_compute, reused


# ----------------------------------------------------------------------------------- steps


def find_inputs(paths: Sequence[str | Path]) -> tuple[list[Path], list[FileProblem]]:
    """Input files under ``paths`` and problems with paths; InputError when nothing is readable."""
    return read_files(list(paths))


def read_and_hash(path: str | Path, config: AuditConfig) -> tuple[FileRead, str]:
    """Read one input file (never raises for bad content) and the SHA-256 of its bytes."""
    read = read_input_file(Path(path), config)
    try:
        digest = file_sha256(path)
    except OSError:
        digest = ""
    return read, digest


def unchanged_run(store_path: str | Path, files: Sequence[str | Path], path_problems: Sequence[FileProblem],
                  config: AuditConfig, version: str | None = None, with_report: bool = True) -> RunSummary | None:
    """The latest committed run, as a RunSummary with ``unchanged`` set, when it used exactly these
    input files (same paths and bytes), the same parameters and the same code (``code_version``
    and ``pipeline_version``), and no path problems now; else None.  Then a new run would reproduce it, so nothing needs computing.
    When ``with_report`` and the run's report file is missing, it is written."""
    if path_problems or not (Path(store_path) / "runs.parquet").is_file():
        return None
    store = ResultsStore(store_path)
    try:
        info = store.run_info("latest")
    except (LookupError, OSError, ValueError):
        return None
    version = code_version() if version is None else version
    counts = info.get("counts") or {}
    if str(info.get("code_version")) != version or counts.get("pipeline_version") != pipeline_version():
        return None
    if info.get("parameters") != json.loads(json.dumps(config.as_parameters(), sort_keys=True, default=str)):
        return None
    digests = input_hashes(files)
    if "" in digests.values() or info.get("input_hashes") != digests:
        return None
    run_id = str(info["run_id"])
    report = Path(store_path) / f"sced-audit-report-{run_id}.html"
    if not report.is_file():
        report = None
        if with_report:
            fn = _optional("audit.report", "write_report")
            report = Path(fn(store.path, run=run_id)) if fn is not None else None
    flips = counts.get("flips")
    return RunSummary(
        run_id=run_id, store=store.path, cases_audited=int(counts.get("cases_audited", 0)),
        cases_reused=int(counts.get("cases_audited", 0)), cases_computed=0,
        cases_quarantined=int(counts.get("cases_quarantined", 0)), rows_read=int(counts.get("rows_read", 0)),
        rows_accepted=int(counts.get("rows_accepted", 0)), rows_quarantined=int(counts.get("rows_quarantined", 0)),
        flips=None if flips is None else int(flips), input_problems=int(counts.get("input_problems", 0)),
        tables=tuple(info.get("tables") or ()), report=report, unchanged=True,
    )


def combine_reads(reads: list[FileRead], path_problems: list[FileProblem], config: AuditConfig) -> ReviewInput:
    """Prepare the rows of all files together; InputError when no case passed validation."""
    review = combine(reads, path_problems, config)
    release_freed_memory()  # the raw rows and intake's temporaries
    if review.prepared.rows_accepted == 0:
        prep = review.prepared
        raise InputError(
            f"nothing usable: none of the {prep.rows_read} row(s) read passed validation "
            f"({len(prep.quarantine)} problem(s)); run `sced-audit validate` on the same paths to see them"
        )
    return review


def plan_run(review: ReviewInput, store: ResultsStore | None, config: AuditConfig,
             version: str | None = None) -> ReusePlan:
    """Hash every accepted case and split the cases into reused and to-compute."""
    version = code_version() if version is None else version
    obs = review.prepared.observations
    hashes = case_hashes(obs, config.as_parameters(), version)
    release_freed_memory()  # the canonical text of the hashing
    to_compute, reused = split_for_reuse(obs, hashes, store)
    source = None
    if reused:
        release_freed_memory()  # Arrow's buffers of the store reads, now pandas frames
        source = reused["cases"].attrs.get("source_run")
    return ReusePlan(code_version=version, hashes=hashes, to_compute=to_compute, reused=reused, source_run=source)


def case_batch_rows(observations: pd.DataFrame, batch_size: int = DEFAULT_BATCH_SIZE) -> list[np.ndarray]:
    """Row positions of batches of at most ``batch_size`` whole cases, cases ordered by their
    number of points (then first seen).

    Cases of one length share their design algebra (stacks of equal n and k in the engine), so
    batches of similar lengths repeat less of it: on 20,000 invented cases, ten batches cut this
    way cost about half as much as ten cut in input order. Rows keep their order within a case.
    """
    if batch_size < 1:
        raise ValueError(f"batch_size must be at least 1, got {batch_size}")
    if observations.empty:
        return []
    codes, _ = pd.factorize(observations["case_key"], sort=False)
    sizes = np.bincount(codes)
    by_size = np.lexsort((np.arange(sizes.size), sizes))
    batch_of_case = np.empty(sizes.size, dtype=np.int64)
    batch_of_case[by_size] = np.arange(sizes.size) // int(batch_size)
    batch = batch_of_case[codes]
    order = np.argsort(batch, kind="stable")
    cuts = np.flatnonzero(np.r_[True, batch[order][1:] != batch[order][:-1], True])
    return [order[a:b] for a, b in zip(cuts[:-1], cuts[1:])]


def take_rows(observations: pd.DataFrame, rows: np.ndarray) -> pd.DataFrame:
    """The batch's rows as their own frame (a slice, without copying, when they are contiguous)."""
    if rows.size and rows[-1] - rows[0] == rows.size - 1 and np.all(np.diff(rows) == 1):
        return observations.iloc[int(rows[0]):int(rows[-1]) + 1].reset_index(drop=True)
    return observations.take(rows).reset_index(drop=True)


def case_batches(observations: pd.DataFrame, batch_size: int = DEFAULT_BATCH_SIZE) -> list[pd.DataFrame]:
    """Batches of at most ``batch_size`` whole cases (see :func:`case_batch_rows`), all at once."""
    return [take_rows(observations, rows) for rows in case_batch_rows(observations, batch_size)]


def bounded_results(submit: Callable[[pd.DataFrame, int], Any], observations: pd.DataFrame,
                    batch_rows: Sequence[np.ndarray], in_flight: int) -> Iterator[Any]:
    """``submit(batch, number)`` for each batch, at most ``in_flight`` at a time; yields each
    submission's ``.result()`` in batch order. A batch's frame exists only while it is in flight."""
    pending: deque = deque()
    for number, rows in enumerate(batch_rows, start=1):
        pending.append(submit(take_rows(observations, rows), number))
        if len(pending) >= max(1, in_flight):
            yield pending.popleft().result()
    while pending:
        yield pending.popleft().result()


def _resolve_diagnose(diagnose: Diagnose | None) -> Diagnose:
    if diagnose is not None:
        return diagnose
    fn = _optional("audit.diagnose", "diagnose_cases")
    if fn is None:
        raise RuntimeError("audit.diagnose.diagnose_cases is not available in this installation")
    return fn


def diagnose_batch(observations: pd.DataFrame, alpha: float, diagnose: Diagnose | None = None,
                   spill_to: str | Path | None = None) -> MutableMapping[str, pd.DataFrame]:
    """Diagnostics tables of one batch of cases (``audit.diagnose.diagnose_cases`` by default).

    With ``spill_to`` (a run's :func:`audit.spill.spill_folder`) the tables are written there
    and a handle that reads them back is returned instead (:class:`audit.spill.SpilledTables`)."""
    fn = _resolve_diagnose(diagnose)
    out = fn(observations, alpha=alpha)
    tables = {str(name): df for name, df in out.items() if isinstance(df, pd.DataFrame)}
    return tables if spill_to is None else spill_tables(tables, spill_to)


def _ordered(df: pd.DataFrame, order: Mapping[str, int]) -> pd.DataFrame:
    """Rows sorted by the case order (stable: rows of one case keep their order)."""
    if df.empty or "case_key" not in df.columns:
        return df.reset_index(drop=True)
    pos = df["case_key"].map(order).fillna(len(order)).to_numpy(dtype=np.int64)
    if np.all(pos[1:] >= pos[:-1]):  # already in order (the usual case): no copy
        return df.reset_index(drop=True)
    return df.iloc[np.argsort(pos, kind="stable")].reset_index(drop=True)


def _concat(frames: list[pd.DataFrame]) -> pd.DataFrame:
    frames = [f for f in frames if f is not None and len(f.columns)]
    nonempty = [f for f in frames if len(f)]
    if nonempty:
        # one frame: itself (copy-on-write keeps the caller's frame unchanged; a copy would hold
        # a large reused table twice)
        return nonempty[0] if len(nonempty) == 1 else pd.concat(nonempty, ignore_index=True)
    return frames[0].iloc[0:0].copy() if frames else pd.DataFrame()


# Tables the summary reads (``summary_tables``), held in memory until the run is written; with a
# ``stage`` function, assemble_tables hands the others to it as soon as each is joined.
SUMMARY_INPUTS = ("observations", "quarantine", "adjustments", "cases")


def assemble_tables(review: ReviewInput, plan: ReusePlan,
                    batch_results: Sequence[Mapping[str, pd.DataFrame]],
                    stage: Callable[[str, pd.DataFrame], Any] | None = None) -> dict[str, Any]:
    """Every table of the run: input-side tables plus diagnostics (computed and reused) with hashes.

    Computed ``cases`` rows get the accepted-case columns (n_points, quality flags ...) that the
    diagnostics do not already hold; every diagnostics row gets its case's ``case_hash``.
    Rows are ordered as the accepted cases. Each batch's copy of a table is dropped from its
    (mutable) mapping once the table is joined, and each reused table from ``plan.reused``, so
    no table is held twice for long.

    stage: ``stage(name, frame)`` for every table the summary does not read (not in
    :data:`SUMMARY_INPUTS`), called as soon as the table is joined; its result (e.g. a
    :class:`audit.store.PreparedTable`, see :func:`table_stager`) takes the frame's place.
    """
    prep = review.prepared
    order = {k: i for i, k in enumerate(prep.cases["case_key"])} if len(prep.cases) else {}
    names: list[str] = []
    for part in [plan.reused, *batch_results]:
        for name in part:
            if name not in names:
                names.append(name)
    tables: dict[str, Any] = {
        "observations": prep.observations.reset_index(drop=True),
        "quarantine": prep.quarantine.reset_index(drop=True),
        "adjustments": prep.adjustments.reset_index(drop=True),
    }
    for name in names:
        in_batches = any(name in r for r in batch_results)
        computed = _concat([r[name] for r in batch_results if name in r])
        # columns that were categoricals before their batch was spilled (audit.spill) become
        # categoricals again (one code per row instead of one string)
        for col in {c for r in batch_results if isinstance(r, SpilledTables) for c in r.categorical(name)}:
            if col in computed.columns and not isinstance(computed[col].dtype, pd.CategoricalDtype):
                computed[col] = computed[col].astype(pd.CategoricalDtype())
        for r in batch_results:
            if isinstance(r, MutableMapping):
                r.pop(name, None)
        if len(computed.columns) and "case_key" in computed.columns:
            computed = computed.drop(columns=[HASH_KEY], errors="ignore")
            if name == "cases" and len(prep.cases):
                extra = [c for c in prep.cases.columns if c not in computed.columns]
                if extra:
                    computed = computed.merge(prep.cases[["case_key", *extra]], on="case_key", how="left")
            computed[HASH_KEY] = computed["case_key"].map(plan.hashes).astype(object)
        reused = plan.reused.pop(name, None)
        if isinstance(reused, ReusedRows):
            reused = reused()
            if reused is None and not in_batches:  # that table has no rows of the reused cases
                continue
        frames = [f for f in (reused, computed) if f is not None]
        del reused, computed
        table = _ordered(_concat(frames), order)
        del frames
        tables[name] = table if stage is None or name in SUMMARY_INPUTS else stage(name, table)
        del table
    release_freed_memory()  # the batch results, now concatenated
    return tables


def table_stager(store: ResultsStore, folder: str | Path | None) -> Callable[[str, pd.DataFrame], Any] | None:
    """``stage`` for :func:`assemble_tables`: each table validated and written to ``folder``
    (inside the store, e.g. the run's :func:`spill_folder`) by ``store.prepare_table``, for
    ``write_run`` to link into the run. None without a folder."""
    if folder is None:
        return None
    return lambda name, frame: store.prepare_table(name, frame, folder)


def summary_tables(tables: Mapping[str, pd.DataFrame], alpha: float = 0.05,
                   accepted_cases: pd.DataFrame | None = None) -> dict[str, pd.DataFrame]:
    """Summary tables from ``audit.summary.summarize`` when that module exists, else none.

    ``summarize(cases, alpha=, quarantine=, accepted_cases=, observations=)`` gets the run's
    tables (only the keywords it accepts); a summarize whose first parameter is not ``cases``
    gets the dict of the tables held as frames (tables staged by ``assemble_tables`` are not
    in it). A DataFrame result is stored as table ``summary``; a mapping as
    ``summary_<name>`` tables.
    """
    summarize = _optional("audit.summary", "summarize")
    if summarize is None or "cases" not in tables:
        return {}
    params = inspect.signature(summarize).parameters
    if next(iter(params), None) == "cases":
        offered = {"alpha": alpha, "quarantine": tables.get("quarantine"),
                   "accepted_cases": accepted_cases, "observations": tables.get("observations")}
        kwargs = {k: v for k, v in offered.items() if k in params and v is not None}
        result = summarize(tables["cases"], **kwargs)
    else:
        result = summarize({n: t for n, t in tables.items() if isinstance(t, pd.DataFrame)})
    release_freed_memory()
    if result is None:
        return {}
    if isinstance(result, pd.DataFrame):
        return {"summary": result}
    return {(n if str(n).startswith("summary") else f"summary_{n}"): df
            for n, df in result.items() if isinstance(df, pd.DataFrame)}


def _flips(cases: pd.DataFrame | None) -> int | None:
    if cases is None or "flip_any" not in cases.columns:
        return None
    values = pd.array(cases["flip_any"], dtype="boolean")
    return int(values.fillna(False).sum())


def write_run(store: ResultsStore, review: ReviewInput, plan: ReusePlan, tables: Mapping[str, Any],
              config: AuditConfig, hashes_of_inputs: Mapping[str, str], lock_timeout: float = 60) -> RunSummary:
    """Write every table (validated by the store) and commit the run with its counts.

    A table may be a frame or a :class:`audit.store.PreparedTable` (:func:`table_stager`)."""
    prep = review.prepared
    cases = tables.get("cases")
    n_cases = int(len(cases)) if cases is not None else 0
    counts: dict[str, Any] = {
        "cases_audited": n_cases,
        "cases_reused": plan.n_reused,
        "cases_computed": plan.n_to_compute,
        "cases_quarantined": int(len(prep.cases_quarantined)),
        "rows_read": int(prep.rows_read),
        "rows_accepted": int(prep.rows_accepted),
        "rows_quarantined": int(prep.rows_quarantined),
        "files_read": len(review.files),
        "input_problems": len(review.path_problems),
        "pipeline_version": pipeline_version(),
    }
    flips = _flips(cases)
    if flips is not None:
        counts["flips"] = flips
    with store.begin_run(config.as_parameters(), plan.code_version, dict(hashes_of_inputs),
                         lock_timeout=lock_timeout) as run:
        for name, df in tables.items():
            run.write_table(name, df)
        run_id = run.commit(counts)
    release_freed_memory()
    return RunSummary(
        run_id=run_id,
        store=store.path,
        cases_audited=n_cases,
        cases_reused=plan.n_reused,
        cases_computed=plan.n_to_compute,
        cases_quarantined=counts["cases_quarantined"],
        rows_read=counts["rows_read"],
        rows_accepted=counts["rows_accepted"],
        rows_quarantined=counts["rows_quarantined"],
        flips=flips,
        input_problems=counts["input_problems"],
        tables=tuple(tables),
    )


def write_report(store: ResultsStore, summary: RunSummary) -> RunSummary:
    """Write the run's HTML report with ``audit.report.write_report`` when that module exists.

    Called as ``write_report(store_path, run=run_id)`` (it returns the report's path); the
    summary comes back with ``report`` set.
    """
    fn = _optional("audit.report", "write_report")
    if fn is None:
        return summary
    release_freed_memory()  # the run's tables, freed by the caller
    params = inspect.signature(fn).parameters
    path = fn(store.path, run=summary.run_id) if "run" in params else fn(store.path)
    if path is None:
        return summary
    return dataclasses.replace(summary, report=Path(path))


# ----------------------------------------------------------------------------------- whole run


def run_audit(
    paths: Sequence[str | Path],
    store_path: str | Path,
    config: AuditConfig | None = None,
    progress: Progress | None = None,
    batch_size: int = DEFAULT_BATCH_SIZE,
    diagnose: Diagnose | None = None,
    lock_timeout: float = 60,
    with_summary: bool = True,
    with_report: bool = True,
    force: bool = False,
    workers: int | None = None,
) -> RunSummary:
    """The whole audit without Prefect: intake, reuse, diagnose, store, summary, report.

    Unless ``force``, nothing is run when the latest run used the same input files, parameters
    and code version (:func:`unchanged_run`); its summary is returned with ``unchanged`` set.

    progress: called as progress(stage, done, total) with stage "read" (files) or "diagnose"
    (batches of cases). diagnose: the diagnostics function (default
    ``audit.diagnose.diagnose_cases``), called once per batch. with_summary / with_report:
    run the summary and report hooks (when those modules exist). workers: processes for the
    diagnose batches (:class:`audit.parallel.DiagnosePool`; default one per core for inputs of
    a few MB or more, else in-process; a custom ``diagnose`` always runs in-process).
    """
    config = config or AuditConfig()
    files, path_problems = find_inputs(paths)
    if not force and (same := unchanged_run(store_path, files, path_problems, config, with_report=with_report)):
        return same
    n_workers = 1 if diagnose is not None else workers_for_input(workers, input_bytes(files))
    with DiagnosePool(n_workers) as pool:  # started once there are cases to compute
        return _run_with_pool(pool, files, path_problems, store_path, config, progress, batch_size, diagnose,
                              lock_timeout, with_summary, with_report)


def _run_with_pool(pool: DiagnosePool, files, path_problems, store_path, config: AuditConfig,
                   progress: Progress | None, batch_size: int, diagnose: Diagnose | None, lock_timeout: float,
                   with_summary: bool, with_report: bool) -> RunSummary:
    reads = []
    hashes: dict[str, str] = {}
    for i, path in enumerate(files, start=1):
        read, digest = read_and_hash(path, config)
        reads.append(read)
        hashes[str(read.path)] = digest
        if progress:
            progress("read", i, len(files))
    review = combine_reads(reads, path_problems, config)
    store = open_store(store_path)
    plan = plan_run(review, store, config)
    if len(plan.to_compute) and diagnose is None:
        pool.start()  # after intake, whose peak they would add to; they start while batches are cut
    # batch results wait on disk until they are joined; the joined tables the summary does not
    # read wait there too, validated and written, until the run links them into the store
    with spill_folder(store.path) as spill_to:
        tables = _diagnose_and_assemble(pool, review, plan, config, progress, batch_size, diagnose, spill_to,
                                        table_stager(store, spill_to))
        if with_summary:
            tables.update(summary_tables(tables, config.alpha, review.prepared.cases))
        summary = write_run(store, review, plan, tables, config, hashes, lock_timeout)
    del tables, review, plan  # the report reads what it needs back from the store
    return write_report(store, summary) if with_report else summary


def _diagnose_and_assemble(pool: DiagnosePool, review: ReviewInput, plan: ReusePlan, config: AuditConfig,
                           progress: Progress | None, batch_size: int, diagnose: Diagnose | None,
                           spill_to: Path, stage: Callable[[str, pd.DataFrame], Any] | None = None,
                           ) -> dict[str, Any]:
    batch_rows = case_batch_rows(plan.to_compute, batch_size)
    results = []
    if progress:
        progress("diagnose", 0, len(batch_rows))
    if diagnose is None and pool.uses_processes:  # two batches per worker in flight: none waits
        outcome = bounded_results(lambda batch, _: pool.submit(batch, config.alpha, str(spill_to)),
                                  plan.to_compute, batch_rows, 2 * pool.workers)
    else:
        outcome = (diagnose_batch(take_rows(plan.to_compute, rows), config.alpha, diagnose, spill_to)
                   for rows in batch_rows)
    for i, tables_of_batch in enumerate(outcome, start=1):
        results.append(tables_of_batch)
        if progress:
            progress("diagnose", i, len(batch_rows))
    del batch_rows, outcome
    pool.close()  # the worker processes' memory goes back before the summary
    if pool.fallback_reason:
        log.warning(pool.fallback_reason)
    tables = assemble_tables(review, plan, results, stage)
    results.clear()  # the batch tables now live in ``tables``
    return tables
