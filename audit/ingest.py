"""Read digitized case series from CSV/TSV, XLSX and Parquet files into one long table of raw rows.

Every raw row keeps its origin (file, sheet, row number as a spreadsheet or text editor shows it:
the header is row 1, the first data row is row 2; for Parquet the first record is row 1).
A file that cannot be used at all is reported as a file problem; the rest of the input goes on.
"""

from __future__ import annotations

import csv
import re
from array import array
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from audit.config import KNOWN_COLUMNS, REQUIRED_COLUMNS, AuditConfig

TEXT_SUFFIXES = {".csv", ".tsv", ".txt"}
EXCEL_SUFFIXES = {".xlsx", ".xlsm"}
PARQUET_SUFFIXES = {".parquet", ".pq"}
SUPPORTED_SUFFIXES = TEXT_SUFFIXES | EXCEL_SUFFIXES | PARQUET_SUFFIXES
DELIMITERS = (",", ";", "\t", "|")

# Columns of the raw-row table (strings as read, plus origin).
RAW_COLUMNS = KNOWN_COLUMNS + ("source_file", "source_sheet", "source_row")


class InputError(Exception):
    """Nothing usable was given (no such path, no readable file)."""


@dataclass(frozen=True)
class FileProblem:
    """A file (or sheet) that could not be used at all."""

    source_file: str
    source_sheet: str
    rule: str
    message: str
    n_rows: int = 0  # data rows the file held that are now quarantined with it


@dataclass
class FileRead:
    """What one input file gave: raw rows (canonical columns, strings) and file-level problems."""

    path: Path
    rows: pd.DataFrame
    problems: list[FileProblem] = field(default_factory=list)
    details: dict[str, str] = field(default_factory=dict)  # encoding, delimiter, decimal, sheets
    n_rows_released: int | None = None  # set by release_rows: how many rows ``rows`` held

    @property
    def rows_read(self) -> int:
        held = len(self.rows) if self.n_rows_released is None else self.n_rows_released
        return held + sum(p.n_rows for p in self.problems)

    def release_rows(self) -> None:
        """Drop the raw rows (keeping their count and columns) once they have been prepared."""
        if self.n_rows_released is None:
            self.n_rows_released = len(self.rows)
            self.rows = self.rows.iloc[0:0].copy()  # a view would keep the whole file's columns alive


def find_input_files(paths: list[str | Path]) -> tuple[list[Path], list[FileProblem]]:
    """Expand files and folders (searched recursively) into supported input files.

    Returns the files found (sorted, unique) and problems for paths that do not exist or hold
    nothing we can read. Hidden files and folders (names starting with '.') and Office lock
    files ('~$...') are skipped.
    """
    found: list[Path] = []
    problems: list[FileProblem] = []
    for given in paths:
        p = Path(given)
        if not p.exists():
            problems.append(FileProblem(str(p), "", "path_not_found", f"{p}: no such file or folder"))
            continue
        if p.is_dir():
            inside = sorted(
                f
                for f in p.rglob("*")
                if f.is_file()
                and f.suffix.lower() in SUPPORTED_SUFFIXES
                and not any(part.startswith(".") for part in f.relative_to(p).parts)
                and not f.name.startswith("~$")
            )
            if not inside:
                problems.append(
                    FileProblem(
                        str(p), "", "no_input_files",
                        f"{p}: folder holds no .csv, .tsv, .txt, .xlsx or .parquet files",
                    )
                )
            found.extend(inside)
        elif p.suffix.lower() in SUPPORTED_SUFFIXES:
            found.append(p)
        else:
            problems.append(
                FileProblem(
                    str(p), "", "unsupported_file_type",
                    f"{p}: unsupported file type {p.suffix or '(none)'}; use CSV/TSV, XLSX or Parquet",
                )
            )
    unique: list[Path] = []
    seen: set[Path] = set()
    for f in found:
        key = f.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(f)
    return unique, problems


def read_input_file(path: Path, config: AuditConfig) -> FileRead:
    """Read one file into raw rows with canonical column names; never raises for bad content."""
    path = Path(path)
    name = str(path)
    try:
        size = path.stat().st_size
    except OSError as exc:
        return _failed(path, "unreadable_file", f"{name}: cannot read file ({exc.strerror or exc})")
    if size > config.limits.max_file_bytes:
        return _failed(
            path, "file_too_large",
            f"{name}: file is {size:,} bytes, above the limit of {config.limits.max_file_bytes:,}; "
            "split it or raise [limits] max_file_bytes in the config",
        )
    suffix = path.suffix.lower()
    try:
        if suffix in EXCEL_SUFFIXES:
            sheets, details = _read_excel(path)
        elif suffix in PARQUET_SUFFIXES:
            sheets, details = _read_parquet(path)
        else:
            sheets, details = _read_text(path)
    except _Unreadable as exc:
        return _failed(path, exc.rule, f"{name}: {exc}")
    except OSError as exc:
        return _failed(path, "unreadable_file", f"{name}: cannot read file ({exc.strerror or exc})")

    parts: list[pd.DataFrame] = []
    problems: list[FileProblem] = []
    for sheet_name, table in sheets:
        rows, problem = _standardize(table, name, sheet_name, config, details)
        if problem is not None:
            problems.append(problem)
        else:
            parts.append(rows)
    if not parts and not problems:
        problems.append(FileProblem(name, "", "empty_file", f"{name}: file holds no data rows"))
    rows = pd.concat(parts, ignore_index=True) if parts else _empty_rows()
    return FileRead(path=path, rows=rows, problems=problems, details=details)


class _Unreadable(Exception):
    def __init__(self, rule: str, message: str):
        super().__init__(message)
        self.rule = rule


def _failed(path: Path, rule: str, message: str) -> FileRead:
    return FileRead(path=path, rows=_empty_rows(), problems=[FileProblem(str(path), "", rule, message)])


def _empty_rows() -> pd.DataFrame:
    frame = pd.DataFrame({c: pd.Series([], dtype=object) for c in RAW_COLUMNS})
    frame["source_row"] = frame["source_row"].astype("int64")
    return frame


# ---------------------------------------------------------------- text files

def decode_text(data: bytes) -> tuple[str, str]:
    """Decode bytes as UTF-8 (with or without BOM), falling back to Latin-1."""
    if b"\x00" in data[:4096]:
        raise _Unreadable("not_a_text_table", "file holds binary data (NUL bytes), not a text table")
    try:
        return data.decode("utf-8-sig"), "utf-8"
    except UnicodeDecodeError:
        return data.decode("latin-1"), "latin-1"


def detect_delimiter(lines: list[str], default: str = ",") -> str:
    """Pick the delimiter that splits the first lines into the most, and most consistent, fields."""
    best, best_score = default, (0.0, 0.0)
    sample = [ln for ln in lines if ln.strip()][:30]
    if not sample:
        return default
    for delim in DELIMITERS:
        try:
            counts = [len(row) for row in csv.reader(sample, delimiter=delim)]
        except csv.Error:  # e.g. a quoted field that never closes within the sample
            continue
        if not counts or counts[0] < 2:
            continue
        consistent = sum(c == counts[0] for c in counts) / len(counts)
        score = (consistent, float(counts[0]))
        if score > best_score:
            best, best_score = delim, score
    return best


_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d*,\d+\s*$")
_DECIMAL_POINT = re.compile(r"^\s*[-+]?\d*\.\d+\s*$")


def detect_decimal(values: pd.Series, delimiter: str) -> str:
    """Decimal comma when the file is not comma-delimited and numbers are written like '12,5'."""
    if delimiter == ",":
        return "."
    text = values.astype(str)
    commas = text.str.match(_DECIMAL_COMMA).sum()
    points = text.str.match(_DECIMAL_POINT).sum()
    return "," if commas > 0 and commas >= points else "."


# Lines as io.StringIO(text, newline="") gives them (ends kept; \r\n, \r or \n), without its
# 4-bytes-per-character copy of the whole text.
_LINE = re.compile(r"[^\r\n]*(?:\r\n|\r|\n)|[^\r\n]+\Z")
_HEAD_CHARS = 1 << 20  # text searched for the first lines (delimiter detection)
_CACHE_PROBE_ROWS = 5_000  # after this many rows, stop sharing the cells of a column of mostly unique values


def _lines(text: str):
    for match in _LINE.finditer(text):
        yield match.group()


def _read_text(path: Path) -> tuple[list[tuple[str, pd.DataFrame]], dict[str, str]]:
    data = path.read_bytes()
    text, encoding = decode_text(data)
    del data
    if not text or text.isspace():
        return [], {"encoding": encoding}
    if csv.field_size_limit() < len(text) + 1:  # one long cell must not cost the whole file
        csv.field_size_limit(min(len(text) + 1, 2**31 - 1))
    default = "\t" if path.suffix.lower() == ".tsv" else ","
    delimiter = detect_delimiter(text[:_HEAD_CHARS].splitlines()[:50], default)
    reader = csv.reader(_lines(text), delimiter=delimiter)
    header: list[str] | None = None
    width = 0
    # Column by column; equal cells share one string object (ids, labels and small numbers repeat on
    # every row: this keeps a million-row file to a few hundred MB).
    columns: list[list[str]] = []
    caches: list[dict[str, str] | None] = []
    extra: list[str] = []
    line_numbers = array("q")  # (not a list of int objects, which would stay until the file is read)
    try:
        for row in reader:
            if not any(cell.strip() for cell in row):
                continue
            if header is None:
                header = row
                width = len(header)
                columns = [[] for _ in range(width)]
                caches = [{} for _ in range(width)]
                continue
            # Ragged rows: short rows are padded; the surplus of long rows goes to a marker column (quarantined).
            if len(row) < width:
                row.extend([""] * (width - len(row)))
            extra.append("" if len(row) <= width else delimiter.join(row[width:]))
            for values, cache, cell in zip(columns, caches, row):
                values.append(cell if cache is None else cache.setdefault(cell, cell))
            line_numbers.append(reader.line_num)
            if len(line_numbers) == _CACHE_PROBE_ROWS:
                caches = [None if c is None or len(c) > _CACHE_PROBE_ROWS // 2 else c for c in caches]
    except csv.Error as exc:
        raise _Unreadable("malformed_text_table", f"malformed text table near line {reader.line_num}: {exc}") from None
    del reader, text, caches
    if header is None:
        return [], {"encoding": encoding, "delimiter": delimiter}
    names = _dedupe_header(header)
    data_columns = {name: np.array(values, dtype=object) for name, values in zip(names, columns)}
    del columns
    frame = pd.DataFrame(data_columns, dtype=object, index=pd.RangeIndex(len(line_numbers)))
    frame["__source_row"] = np.frombuffer(line_numbers, dtype=np.int64).copy()
    frame["__extra_fields"] = pd.Series(extra, dtype=object)
    details = {"encoding": encoding, "delimiter": delimiter}
    return [("", frame)], details


def _dedupe_header(header: list[str]) -> list[str]:
    out: list[str] = []
    for i, name in enumerate(header):
        name = (name or "").strip() or f"unnamed_{i + 1}"
        base, k = name, 2
        while name in out:
            name = f"{base}.{k}"
            k += 1
        out.append(name)
    return out


# ---------------------------------------------------------------- spreadsheets and parquet

def _read_excel(path: Path) -> tuple[list[tuple[str, pd.DataFrame]], dict[str, str]]:
    try:
        # keep_default_na=False: text such as "NA", "null" or "nan" is a value (e.g. a participant's
        # initials), as in CSV files; only empty cells are missing
        book = pd.read_excel(path, sheet_name=None, header=None, dtype=object, keep_default_na=False)
    except Exception as exc:  # openpyxl raises many types for damaged files
        raise _Unreadable("unreadable_spreadsheet", f"cannot read spreadsheet ({type(exc).__name__}: {exc})") from None
    sheets: list[tuple[str, pd.DataFrame]] = []
    for sheet_name, table in book.items():
        table = table[~table.map(_blank_cell).all(axis=1)]  # blank rows are skipped, as in text files
        if table.empty:
            continue
        header_pos = table.index[0]
        header = ["" if pd.isna(v) else str(v) for v in table.loc[header_pos].tolist()]
        body = table.loc[table.index > header_pos]
        frame = pd.DataFrame(body.to_numpy(dtype=object), columns=_dedupe_header(header), dtype=object)
        frame["__source_row"] = (body.index.to_numpy() + 1).astype("int64")
        frame["__extra_fields"] = ""
        sheets.append((str(sheet_name), frame))
    return sheets, {"sheets": ", ".join(name for name, _ in sheets)}


def _blank_cell(value) -> bool:
    return value is None or (isinstance(value, float) and value != value) or (isinstance(value, str) and not value.strip())


def _read_parquet(path: Path) -> tuple[list[tuple[str, pd.DataFrame]], dict[str, str]]:
    try:
        table = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises several error types for damaged files
        raise _Unreadable("unreadable_parquet", f"cannot read Parquet file ({type(exc).__name__}: {exc})") from None
    frame = table.astype(object).reset_index(drop=True)
    frame.columns = _dedupe_header([str(c) for c in frame.columns])
    frame["__source_row"] = range(1, len(frame) + 1)
    frame["__extra_fields"] = ""
    return [("", frame)], {}


# ---------------------------------------------------------------- column mapping

def _standardize(
    table: pd.DataFrame, file: str, sheet: str, config: AuditConfig, details: dict[str, str]
) -> tuple[pd.DataFrame, FileProblem | None]:
    """Map file columns onto canonical names; a missing required column quarantines the sheet."""
    n = len(table)
    lower = {}
    for col in table.columns:
        if col.startswith("__"):
            continue
        lower.setdefault(col.strip().lower(), []).append(col)
    where = f"{file}" + (f" [sheet {sheet}]" if sheet else "")
    if n == 0:
        return _empty_rows(), FileProblem(file, sheet, "empty_file", f"{where}: header but no data rows")
    chosen: dict[str, str] = {}
    missing: list[str] = []
    for canonical in KNOWN_COLUMNS:
        wanted = config.column_map.get(canonical, canonical)
        hits = lower.get(wanted, [])
        if len(hits) > 1:
            return _empty_rows(), FileProblem(
                file, sheet, "ambiguous_column", f"{where}: several columns are named {wanted!r} ({hits}); rename one", n
            )
        if hits:
            chosen[canonical] = hits[0]
        elif canonical in REQUIRED_COLUMNS:
            missing.append(canonical if wanted == canonical else f"{canonical} (mapped to {wanted!r})")
    if missing:
        found = [c for c in table.columns if not c.startswith("__")]
        return _empty_rows(), FileProblem(
            file, sheet, "missing_required_column",
            f"{where}: missing required column(s) {', '.join(missing)}; columns found: {found}. "
            "Rename them or map them under [columns] in a config file (--config)",
            n,
        )
    # object columns: the cells keep their string objects (no copy into another string type)
    out = pd.DataFrame({
        canonical: table[chosen[canonical]].to_numpy(dtype=object) if canonical in chosen
        else np.full(n, None, dtype=object)
        for canonical in KNOWN_COLUMNS
    }, dtype=object, index=pd.RangeIndex(n))
    delimiter = details.get("delimiter")
    if delimiter is not None:
        decimal = detect_decimal(pd.concat([out["session"], out["outcome"]]), delimiter)
        details["decimal"] = decimal
    else:
        decimal = "."
    if decimal == ",":
        for col in ("session", "outcome"):
            out[col] = _decimal_comma_to_point(out[col])
    out["source_file"] = pd.Series(np.full(n, file, dtype=object), index=out.index, dtype=object)
    out["source_sheet"] = pd.Series(np.full(n, sheet, dtype=object), index=out.index, dtype=object)
    out["source_row"] = table["__source_row"].to_numpy(dtype="int64")
    out["__extra_fields"] = pd.Series(table["__extra_fields"].to_numpy(dtype=object), index=out.index, dtype=object)
    return out, None


def _decimal_comma_to_point(values: pd.Series) -> pd.Series:
    text = values.astype(str)
    mask = text.str.match(_DECIMAL_COMMA)
    return values.where(~mask, text.str.replace(",", ".", regex=False).str.strip())
