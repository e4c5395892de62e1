"""Property-based fuzzing of ingest and validation (hypothesis, derandomized so CI is reproducible).

Inputs: arbitrary bytes saved as .csv/.tsv/.xlsx/.parquet; generated CSV files with missing,
extra, renamed or duplicated columns, NaN, inf and text in numeric fields, huge and negative
sessions, unicode ids (right-to-left marks, emoji, control characters, path separators), blank
lines, random delimiters and decimal commas, several encodings and line endings; random
spreadsheets and Parquet files with odd column types; empty and one-row files.

Properties (DESIGN.md section 4 and issue 8):
* ``load_review`` never raises for bad content; ``sced-audit validate`` exits with 0, 1 or 2 and
  prints no traceback;
* every row is accounted for: rows read = accepted + quarantined, and rows read equals the number
  of non-blank data rows written whenever the file's header could be read;
* every quarantine entry names its file and a rule; a row entry names its row;
* accepted observations satisfy the published schemas, and each accepted value is the one written
  in the file (up to the logged repairs): nothing is silently changed.
The number of examples each property ran is printed at the end of the module (and kept in
``EXAMPLES_RUN``).
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import tempfile
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from audit.cli import main
from audit.config import REQUIRED_COLUMNS, AuditConfig
from audit.ingest import read_input_file
from audit.intake import load_review
from schemas.tables import AcceptedCases, Adjustments, Observations, Quarantine

CFG = AuditConfig()
EXAMPLES_RUN: Counter = Counter()

# Small, derandomized budgets: the whole module runs in about 40 s on 2 idle cores (under 60 s loaded).  For a deeper
# search set SCED_FUZZ_SCALE (e.g. 20: twenty times the examples, a different derandomized stream).
SCALE = max(1, int(os.environ.get("SCED_FUZZ_SCALE", "1")))
FUZZ = dict(deadline=None, derandomize=True, database=None, phases=[Phase.explicit, Phase.generate],
            suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much])


def _budget(n: int) -> settings:
    return settings(max_examples=n * SCALE, **FUZZ)


# --------------------------------------------------------------------------- shared checks


@dataclass
class Written:
    """What a generator wrote: file, expected rows (None when unknown) and per-line contents."""

    path: Path
    n_data_rows: int | None
    lines: dict[int, dict[str, str]] = field(default_factory=dict)  # source_row -> {column: cell}
    decimal_comma: bool = False


def _quiet_main(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def check_review(files: list[Path], written: list[Written] | None = None, run_cli: bool = False) -> None:
    """All the properties for one input (a list of files read together); run_cli: the same
    input through ``sced-audit validate`` and ``validate --json`` too."""
    review = load_review(files, CFG)
    prep = review.prepared
    names = {str(f) for f in files}

    # every row accounted for
    assert prep.rows_read == prep.rows_accepted + prep.rows_quarantined
    assert prep.rows_read == sum(f.rows_read for f in review.files)
    q = prep.quarantine
    adj = prep.adjustments
    for f in review.files:  # per file too: a point collapsed into an identical one of another file counts in its own
        name = str(f.path)
        qf = q[q["source_file"] == name]
        accepted = int((prep.observations["source_file"] == name).sum()) + int(
            ((adj["source_file"] == name) & (adj["rule"] == "duplicate_collapsed")).sum())
        assert f.rows_read == accepted + int(qf["n_rows"].sum()), name
    per_file = review.per_file()
    assert (per_file["rows_read"] == per_file["rows_accepted"] + per_file["rows_quarantined"]).all()

    # expected number of rows, when the header was readable (no whole-file problem)
    for w in written or []:
        if w.n_data_rows is None:
            continue
        fr = next(f for f in review.files if str(f.path) == str(w.path))
        whole_file = q[(q["source_file"] == str(w.path)) & (q["level"] == "file")]
        header_problem = set(whole_file["rule"]) <= {"missing_required_column", "ambiguous_column"}
        if whole_file.empty or (header_problem and fr.details.get("delimiter") in (None, w_delim(w))):
            assert fr.rows_read == w.n_data_rows, (fr.rows_read, w.n_data_rows, whole_file["message"].tolist())

    # each quarantine entry names its file, a rule, and (row entries) its row
    Quarantine.validate(q)
    for entry in q.itertuples():
        assert entry.source_file and (entry.source_file in names or entry.level == "file"), entry
        assert entry.rule and re.fullmatch(r"[a-z_]+", entry.rule), entry
        assert entry.message, entry
        if entry.level == "row":
            assert re.fullmatch(r"\d+", entry.rows), entry
            assert f"row {entry.rows}" in entry.message and entry.source_file in entry.message, entry
        if entry.level == "case":
            assert entry.study is not None and entry.case is not None, entry

    # accepted observations satisfy the schemas and our own reading of them
    obs = prep.observations
    if len(obs):
        Observations.validate(obs)
        AcceptedCases.validate(prep.cases)
    if len(prep.adjustments):
        Adjustments.validate(prep.adjustments)
    assert obs["case_key"].str.fullmatch(r"[0-9a-f]{16}").all()
    assert np.isfinite(obs["session"].to_numpy()).all() and np.isfinite(obs["outcome"].to_numpy()).all()
    if len(obs):
        assert set(obs["case_key"]) == set(prep.cases["case_key"])
        for key, part in obs.groupby("case_key"):
            assert part["session"].is_monotonic_increasing and part["session"].is_unique
            assert set(part["condition"]) == {"baseline", "treatment"}
            if part["design"].iloc[0] != "alternating":
                assert part.groupby("phase_index").size().min() >= 3
        assert len(set(zip(obs["source_file"], obs["source_sheet"], obs["source_row"]))) == len(obs)

    # nothing silently changed: accepted values are the ones written (up to logged repairs)
    adjusted_rows = set(zip(prep.adjustments["source_file"], prep.adjustments["source_row"]))
    for w in written or []:
        if not w.lines:
            continue
        mine = obs[obs["source_file"] == str(w.path)]
        for row in mine.itertuples():
            cells = w.lines.get(int(row.source_row))
            assert cells is not None, f"accepted row {row.source_row} was not a data row of {w.path}"
            assert row.study == cells["study"].strip() and row.case == cells["case"].strip(), (row, cells)
            assert row.phase == cells["phase"].strip(), (row, cells)
            for col in ("session", "outcome"):
                text = cells[col].strip()
                if w.decimal_comma and re.fullmatch(r"[-+]?\d*,\d+", text):
                    text = text.replace(",", ".")
                written_value = float(text)  # a ValueError here: a non-number was accepted
                value = getattr(row, col)
                if (str(w.path), row.source_row) in adjusted_rows:
                    assert abs(value - written_value) <= max(2.0, 1e-9 * abs(written_value)), (col, row, cells)
                else:
                    assert value == written_value, (col, value, cells)

    if run_cli:
        code, out, err = _quiet_main(["validate", *map(str, files)])
        assert code in (0, 1, 2), (code, err)
        assert "Traceback" not in err and "internal error" not in err, err
        expected = 2 if prep.rows_accepted == 0 else (1 if (len(q) or review.path_problems) else 0)
        assert code == expected, (code, expected, err)
        code_json, out_json, err_json = _quiet_main(["validate", "--json", *map(str, files)])
        assert code_json == code, err_json
        doc = json.loads(out_json)
        assert doc["rows_read"] == doc["rows_accepted"] + doc["rows_quarantined"] == prep.rows_read


_DELIMS: dict[str, str] = {}


def w_delim(w: Written) -> str | None:
    return _DELIMS.get(str(w.path))


# --------------------------------------------------------------------------- 1. arbitrary bytes

SUFFIXES = [".csv", ".tsv", ".txt", ".xlsx", ".parquet"]


@_budget(30)
@given(data=st.one_of(st.binary(max_size=3000),
                      st.sampled_from([b"", b"\n", b"\xef\xbb\xbf", b"PK\x03\x04", b"PAR1", b"PAR1\x00\x00PAR1",
                                       b"study,case,session,outcome,phase\n", b"\x00" * 10, b"\r\r\n\n"])),
       suffix=st.sampled_from(SUFFIXES))
def test_arbitrary_bytes_never_crash(data, suffix):
    EXAMPLES_RUN["arbitrary_bytes"] += 1
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / f"input{suffix}"
        path.write_bytes(data)
        read = read_input_file(path, CFG)
        assert read.rows_read >= 0
        check_review([path], run_cli=EXAMPLES_RUN["arbitrary_bytes"] % 10 == 0)


@_budget(10)
@given(data=st.binary(min_size=1, max_size=400), cut=st.integers(0, 4000))
def test_damaged_real_files_never_crash(data, cut):
    """Real xlsx/parquet files, truncated or with random bytes spliced in."""
    EXAMPLES_RUN["damaged_real_files"] += 1
    with tempfile.TemporaryDirectory() as d:
        frame = pd.DataFrame({"study": ["s"] * 8, "case": ["c"] * 8, "session": range(1, 9),
                              "outcome": np.linspace(1, 8, 8), "phase": ["A"] * 4 + ["B"] * 4})
        files = []
        for suffix in (".xlsx", ".parquet"):
            good = Path(d) / f"good{suffix}"
            frame.to_excel(good, index=False) if suffix == ".xlsx" else frame.to_parquet(good)
            raw = good.read_bytes()
            at = cut % max(len(raw), 1)
            bad = Path(d) / f"bad{suffix}"
            bad.write_bytes(raw[:at] + data + raw[at + len(data):])
            files.append(bad)
        check_review(files)


# --------------------------------------------------------------------------- 2. generated CSV files

CONTROL = "".join(chr(c) for c in range(1, 32) if chr(c) not in "\r\n")
ID_SPECIALS = ["S1", "c1", "a\x00b", "\u202eRTL\u202c", "\u05e9\u05dc\u05d5\u05dd", "😀", "👩‍👩‍👧", "x\x01y", "\x1b[31m",
               "..", "../..", "a/b", "c\\d", "/etc/passwd", "C:\\x", "=1+1", "@SUM(A1)", "<script>", "é", " padded ",
               "\u200b", "nan", "NULL", "-", "0", "1e300"]
IDS = st.one_of(st.sampled_from(ID_SPECIALS),
                st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00\r\n"), min_size=1,
                        max_size=12),
                st.text(alphabet=CONTROL + "ab", min_size=1, max_size=5))
BAD_NUMBERS = ["nan", "NaN", "inf", "-inf", "Infinity", "", " ", "abc", "1e300", "-1e300", "1e999", "-5", "0x10",
               "1_000", "１２", "12%", "5e-324", "1.7976931348623157e308", "--1", "1..2", "+", "3,5", "1;2", "None"]
PHASES = ["A", "B", "A1", "B1", "A2", "C", "baseline", "Baseline", "treatment", "intervention", "A'", "X", "?", ""]
OPTIONAL = ["condition", "design", "outcome_scale", "desired_direction", "tier", "series", "notes", "extra"]
OPTIONAL_VALUES = {
    "condition": ["", "baseline", "treatment", "Intervention", "sometimes"],
    "design": ["", "AB", "ABAB", "multiple baseline", "alternating", "weird"],
    "outcome_scale": ["", "percent", "count", "rate", "rating", "Percent", "kg"],
    "desired_direction": ["", "increase", "decrease", "sideways"],
    "tier": ["", "1", "2"],
    "series": ["", "s1", "s2"],
    "notes": ["", "ok", "a,b", 'say "hi"'],
    "extra": ["", "x"],
}


def _number_text(x: float, decimal_comma: bool) -> str:
    text = repr(float(x)) if not float(x).is_integer() or abs(x) >= 1e16 else str(int(x))
    return text.replace(".", ",") if decimal_comma else text


@st.composite
def csv_files(draw):
    """A CSV file as rows of cells plus how it is written; returns (header, rows, options)."""
    header = list(REQUIRED_COLUMNS) + draw(st.lists(st.sampled_from(OPTIONAL), unique=True, max_size=3))
    shape = draw(st.sampled_from(["ok"] * 6 + ["missing", "renamed", "duplicated", "upper", "shuffled"]))
    if shape == "missing":
        header.remove(draw(st.sampled_from(REQUIRED_COLUMNS)))
    elif shape == "renamed":
        i = draw(st.integers(0, len(REQUIRED_COLUMNS) - 1))
        header[i] = draw(st.sampled_from(["Session #", "Participant", "score", "Phase label", ""]))
    elif shape == "duplicated":
        header.append(draw(st.sampled_from(REQUIRED_COLUMNS)).upper())
    elif shape == "upper":
        header = [h.upper() if draw(st.booleans()) else h.title() for h in header]
    elif shape == "shuffled":
        header = draw(st.permutations(header))
    delimiter = draw(st.sampled_from([",", ";", "\t", "|"]))
    decimal_comma = delimiter != "," and draw(st.booleans())
    rows: list[list[str]] = []
    for _ in range(draw(st.integers(0, 3))):  # cases
        study, case = draw(IDS), draw(IDS)
        start = draw(st.sampled_from([1.0, 0.0, -5.0, 1e6, 1e15, 1e300, 0.5]))
        step = draw(st.sampled_from([1.0, 1.0, 2.0, 0.1, 1e-9, 1e200]))
        jitter = draw(st.sampled_from([0.0, 0.0, 0.05, 0.3]))
        labels = draw(st.sampled_from([["A", "B"], ["A", "B", "A", "B"], ["A", "B", "C"], ["baseline", "treatment"]]))
        extra_attrs = {c: draw(st.sampled_from(OPTIONAL_VALUES[c])) for c in OPTIONAL if c in header}
        k = 0
        for label in labels:
            for _ in range(draw(st.integers(1, 6))):
                cells = {"study": study, "case": case, "phase": label,
                         "session": _number_text(start + k * step + (jitter if k % 2 else 0.0), decimal_comma),
                         "outcome": _number_text(draw(st.one_of(st.floats(-1e3, 1e3, allow_nan=False),
                                                                st.integers(0, 100).map(float),
                                                                st.floats(allow_nan=False, allow_infinity=False))),
                                                 decimal_comma)}
                cells.update(extra_attrs)
                if draw(st.integers(0, 12)) == 0:  # one broken cell
                    col = draw(st.sampled_from(["session", "outcome", "study", "case", "phase"]))
                    cells[col] = draw(st.sampled_from(BAD_NUMBERS + PHASES))
                row = [cells.get(h.strip().lower(), draw(st.sampled_from(["", "x", "1"]))) for h in header]
                ragged = draw(st.integers(0, 20))
                if ragged == 0:
                    row = row + ["surplus"]
                elif ragged == 1 and len(row) > 1:
                    row = row[:-1]
                rows.append(row)
                k += 1
                if draw(st.integers(0, 15)) == 0:
                    rows.append(list(row))  # exact duplicate
    if rows and draw(st.integers(0, 5)) == 0:
        rows.insert(draw(st.integers(0, len(rows))), [""] * len(header))  # a blank row
    options = {
        "delimiter": delimiter,
        "decimal_comma": decimal_comma,
        "encoding": draw(st.sampled_from(["utf-8", "utf-8", "utf-8-sig", "latin-1"])),
        "newline": draw(st.sampled_from(["\n", "\r\n"])),
        "quote_all": draw(st.booleans()),
        "blank_lines": draw(st.integers(0, 2)),
    }
    return header, rows, options


def _cell(text: str, delimiter: str, quote_all: bool) -> str:
    if quote_all or any(ch in text for ch in (delimiter, '"', "\n", "\r")) or text != text.strip():
        return '"' + text.replace('"', '""') + '"'
    return text


def write_csv_file(path: Path, header: list[str], rows: list[list[str]], options: dict) -> Written:
    d, nl, qa = options["delimiter"], options["newline"], options["quote_all"]
    out_lines = [nl * options["blank_lines"] + d.join(_cell(h, d, qa) for h in header)]
    lines: dict[int, dict[str, str]] = {}
    line_no = 1 + options["blank_lines"]
    n_data = 0
    lower = [h.strip().lower() for h in header]
    for row in rows:
        line_no += 1
        out_lines.append(d.join(_cell(c, d, qa) for c in row))
        if any(c.strip() for c in row):
            n_data += 1
            if len(set(lower)) == len(lower):  # short rows are padded with empty cells when read
                lines[line_no] = dict(zip(lower, row + [""] * (len(header) - len(row))))
    text = nl.join(out_lines) + nl
    encoding = options["encoding"]
    try:
        data = text.encode(encoding)
    except UnicodeEncodeError:
        data = text.encode("utf-8")
    if encoding == "latin-1":
        try:
            if data.decode("utf-8") != text:  # Latin-1 bytes that are valid UTF-8 too: read as UTF-8
                lines = {}
        except UnicodeDecodeError:
            pass
    path.write_bytes(data)
    _DELIMS[str(path)] = d
    return Written(path, n_data, lines, options["decimal_comma"])


@_budget(50)
@given(spec=csv_files())
def test_generated_csv_properties(spec):
    EXAMPLES_RUN["generated_csv"] += 1
    header, rows, options = spec
    with tempfile.TemporaryDirectory() as d:
        suffix = ".tsv" if options["delimiter"] == "\t" and len(rows) % 2 else ".csv"
        w = write_csv_file(Path(d) / f"input{suffix}", header, rows, options)
        check_review([w.path], [w])


@_budget(8)
@given(spec=csv_files())
def test_generated_csv_through_the_validate_command(spec):
    """``sced-audit validate`` (tables and --json): exit code 0/1/2 as documented, no traceback."""
    EXAMPLES_RUN["validate_command"] += 1
    with tempfile.TemporaryDirectory() as d:
        w = write_csv_file(Path(d) / "input.csv", *spec)
        check_review([w.path], [w], run_cli=True)


@_budget(10)
@given(specs=st.lists(csv_files(), min_size=2, max_size=3))
def test_several_files_together(specs):
    """Cases may span files (and be duplicated across them); accounting holds per file and overall."""
    EXAMPLES_RUN["several_files"] += 1
    with tempfile.TemporaryDirectory() as d:
        written = [write_csv_file(Path(d) / f"f{i}.csv", *spec) for i, spec in enumerate(specs)]
        check_review([w.path for w in written], written)


def test_case_split_across_files_with_cross_file_duplicates(tmp_path):
    """Per-file counts stay within each file when a case spans files and points repeat across them."""
    rows = [["S", "c", str(i), str(i), "A" if i <= 4 else "B"] for i in range(1, 9)]
    header = list(REQUIRED_COLUMNS)
    opts = {"delimiter": ",", "decimal_comma": False, "encoding": "utf-8", "newline": "\n", "quote_all": False,
            "blank_lines": 0}
    w1 = write_csv_file(tmp_path / "one.csv", header, rows, opts)
    w2 = write_csv_file(tmp_path / "two.csv", header, rows + [["S", "c", "9", "1", "B", "surplus"]], opts)
    check_review([w1.path, w2.path], [w1, w2], run_cli=True)
    review = load_review([w1.path, w2.path], CFG)
    per_file = review.per_file().set_index("file")
    assert per_file.loc[str(w1.path), "rows_read"] == 8 == per_file.loc[str(w1.path), "rows_quarantined"]
    assert per_file.loc[str(w2.path), "rows_read"] == 9 == per_file.loc[str(w2.path), "rows_quarantined"]
    # without the surplus row the case is accepted and the points of one file collapse into the other's
    w3 = write_csv_file(tmp_path / "three.csv", header, rows, opts)
    review = load_review([w1.path, w3.path], CFG)
    per_file = review.per_file().set_index("file")
    assert per_file.loc[str(w1.path), "rows_accepted"] == 8 and per_file.loc[str(w3.path), "rows_accepted"] == 8
    assert review.prepared.adjustments["old_value"].str.contains("one.csv").all()


@_budget(20)
@given(text=st.text(st.characters(blacklist_categories=("Cs",)), max_size=600),
       prefix=st.sampled_from(["", "study,case,session,outcome,phase\n", "study;case;session;outcome;phase\n"]))
def test_free_text_csv_never_crashes(text, prefix):
    """Any text at all (quotes left open, NUL, lone CR, unicode line separators) after a header."""
    EXAMPLES_RUN["free_text_csv"] += 1
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "free.csv"
        path.write_bytes((prefix + text).encode("utf-8", "surrogatepass"))
        check_review([path], run_cli=EXAMPLES_RUN["free_text_csv"] % 8 == 0)


# --------------------------------------------------------------------------- 3. spreadsheets and Parquet

CELL_VALUES = st.one_of(st.none(), IDS, st.integers(-10, 10**6), st.floats(allow_nan=False, allow_infinity=False),
                        st.booleans(), st.sampled_from(["nan", "inf", "", " ", "=1+1"]),
                        st.datetimes(min_value=pd.Timestamp("1990-01-01").to_pydatetime(),
                                     max_value=pd.Timestamp("2030-01-01").to_pydatetime()))


@st.composite
def tables(draw):
    cols = list(REQUIRED_COLUMNS)
    if draw(st.booleans()):
        cols.remove(draw(st.sampled_from(cols)))
    cols += draw(st.lists(st.sampled_from(OPTIONAL), unique=True, max_size=2))
    n = draw(st.integers(0, 14))
    good = draw(st.booleans())
    data = {}
    for c in cols:
        if good and c == "session":
            data[c] = [float(i + 1) for i in range(n)]
        elif good and c == "outcome":
            data[c] = [draw(st.floats(-100, 100)) for _ in range(n)]
        elif good and c == "phase":
            data[c] = ["A" if i < n // 2 else "B" for i in range(n)]
        elif good and c in ("study", "case"):
            v = draw(IDS)
            data[c] = [v] * n
        else:
            data[c] = [draw(CELL_VALUES) for _ in range(n)]
    return cols, data, n


def _strip_illegal_xlsx(v):
    if isinstance(v, str):
        return re.sub(r"[\x00-\x08\x0b\x0c\x0e-\x1f]", "?", v)
    return v


@_budget(10)
@given(spec=tables(), sheets=st.integers(1, 2))
def test_random_spreadsheets(spec, sheets):
    EXAMPLES_RUN["spreadsheets"] += 1
    cols, data, n = spec
    from openpyxl import Workbook

    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "book.xlsx"
        wb = Workbook()
        n_rows = 0
        for s in range(sheets):
            ws = wb.active if s == 0 else wb.create_sheet(f"sheet {s}")
            ws.append(cols)
            for i in range(n):
                values = [_strip_illegal_xlsx(data[c][i]) for c in cols]
                ws.append(values)
                n_rows += any(not (v is None or (isinstance(v, str) and not v.strip())) for v in values)
        wb.save(path)
        check_review([path], [Written(path, n_rows)])


PARQUET_COLUMNS = {
    "float": lambda n, draw: pd.Series([draw(st.floats(allow_nan=True, allow_infinity=True)) for _ in range(n)]),
    "int": lambda n, draw: pd.Series([draw(st.integers(-(2**62), 2**62)) for _ in range(n)], dtype="int64"),
    "nullable_int": lambda n, draw: pd.Series([draw(st.one_of(st.none(), st.integers(-5, 50))) for _ in range(n)],
                                              dtype="Int64"),
    "text": lambda n, draw: pd.Series([draw(IDS) for _ in range(n)], dtype=object),
    "bool": lambda n, draw: pd.Series([draw(st.booleans()) for _ in range(n)]),
    "datetime": lambda n, draw: pd.Series(pd.date_range("2020-01-01", periods=n)),
    "bytes": lambda n, draw: pd.Series([draw(st.binary(max_size=5)) for _ in range(n)], dtype=object),
    "list": lambda n, draw: pd.Series([[draw(st.integers(0, 3))] for _ in range(n)], dtype=object),
    "category": lambda n, draw: pd.Series(pd.Categorical([draw(st.sampled_from(["A", "B", "x"])) for _ in range(n)])),
    "sessions": lambda n, draw: pd.Series(np.arange(1.0, n + 1)),
    "phases": lambda n, draw: pd.Series(["A" if i < n // 2 else "B" for i in range(n)]),
}


@_budget(20)
@given(n=st.integers(0, 14), kinds=st.fixed_dictionaries(
    {c: st.sampled_from(list(PARQUET_COLUMNS)) for c in REQUIRED_COLUMNS}), drop=st.sampled_from([None, *REQUIRED_COLUMNS]),
    data=st.data())
def test_random_parquet(n, kinds, drop, data):
    EXAMPLES_RUN["parquet"] += 1
    frame = pd.DataFrame({c: PARQUET_COLUMNS[k](n, data.draw) for c, k in kinds.items() if c != drop})
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "p.parquet"
        try:
            frame.to_parquet(path)
        except Exception:  # pyarrow refuses some mixed object columns: not our input
            return
        check_review([path], [Written(path, n)])


# --------------------------------------------------------------------------- 4. small fixed edge files


@pytest.mark.parametrize("content", [
    b"",
    b"study,case,session,outcome,phase",
    b"study,case,session,outcome,phase\n",
    b"study,case,session,outcome,phase\nS,c,1,2,A\n",
    b"study,case,session,outcome,phase\n\n\n,,,,\n",
    b"\xef\xbb\xbfstudy;case;session;outcome;phase\r\nS;c;1;2,5;A\r\n",
    b"study,case,session,outcome,phase\nS,c,1e300,-5,A\nS,c,-5,1e300,B\n",
    b'study,case,session,outcome,phase\n"S,c,1,2,A\n',  # quote never closed
    b"study,case,session,outcome,phase\nS\x00,c,1,2,A\n",  # NUL: refused as binary, whole file
])
def test_empty_and_one_row_files(tmp_path, content):
    EXAMPLES_RUN["fixed_edge_files"] += 1
    path = tmp_path / "edge.csv"
    path.write_bytes(content)
    check_review([path], run_cli=True)


@pytest.mark.parametrize("suffix", [".csv", ".xlsx", ".parquet"])
def test_text_that_looks_like_a_missing_marker_is_an_id_in_every_format(tmp_path, suffix):
    """A participant called "NA" (or a study "null") is read as written, whatever the format."""
    names = ["NA", "null", "nan", "None", "N/A", "-nan", "NULL", "n/a"]  # ("#N/A" in a spreadsheet is an error cell)
    frame = pd.DataFrame([{"study": "null", "case": name, "session": s, "outcome": float(s % 3 + (s > 5) * 10),
                           "phase": "A" if s <= 5 else "B"} for name in names for s in range(1, 11)])
    path = tmp_path / f"ids{suffix}"
    if suffix == ".csv":
        frame.to_csv(path, index=False)
    elif suffix == ".xlsx":
        frame.to_excel(path, index=False)
    else:
        frame.to_parquet(path)
    check_review([path], [Written(path, len(frame))])
    prep = load_review([path], CFG).prepared
    assert prep.rows_accepted == len(frame)
    assert sorted(prep.cases["case"]) == sorted(names) and set(prep.cases["study"]) == {"null"}


def test_blank_spreadsheet_rows_are_skipped_like_blank_text_lines(tmp_path):
    from openpyxl import Workbook

    wb = Workbook()
    ws = wb.active
    ws.append(["  ", None, ""])  # blank before the header
    ws.append(["study", "case", "session", "outcome", "phase"])
    for s in range(1, 11):
        ws.append(["S", "c", s, float(s), "A" if s <= 5 else "B"])
        if s == 3:
            ws.append([" ", "", None, "\t", None])  # a blank row in the data
    path = tmp_path / "blank.xlsx"
    wb.save(path)
    check_review([path], [Written(path, 10)])


def test_nul_after_the_first_4096_bytes_is_read_as_text(tmp_path):
    """A NUL late in the file ends up inside an id; the file is still accounted for row by row."""
    lines = [f"S,c{i // 10},{i % 10 + 1},{i},{'A' if i % 10 < 5 else 'B'}" for i in range(400)]
    lines[-1] = lines[-1].replace("S,", "S\x00,")
    path = tmp_path / "late_nul.csv"
    path.write_bytes(("study,case,session,outcome,phase\n" + "\n".join(lines) + "\n").encode())
    written = Written(path, 400)
    _DELIMS[str(path)] = ","
    check_review([path], [written])


def test_zz_report_examples_run(capsys):
    """Print how many examples each property ran (kept last in the module)."""
    with capsys.disabled():
        total = sum(EXAMPLES_RUN.values())
        print(f"\n[fuzz] examples run: {dict(sorted(EXAMPLES_RUN.items()))}; total {total}")
    if EXAMPLES_RUN:
        assert total > 0
