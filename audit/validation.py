"""Validate raw rows, make the certain digitizing repairs, and split accepted cases from quarantine.

Rules (DESIGN.md section 4):
- rows: ids present, session and outcome finite numbers, labels from the known sets, no extra
  fields. A bad row is quarantined, and so is the rest of its case (a missing point would change
  the series; nothing uncertain is guessed).
- repairs, each logged in the adjustments table: exact duplicate points collapse; sessions within
  a tolerance of whole numbers snap to them when every session of the case is that close and
  snapping keeps them unique; percent values slightly outside 0-100 clip to the bound.
- cases: one baseline and one treatment phase at least; unique sessions; every phase (for
  alternating designs: every condition) at least 3 points, 3-4 flagged as below the usual
  5-point standard; scale bounds; one design, scale and direction per case; phase labels that
  map to a condition.
Invariant: rows read = rows accepted + rows quarantined.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pandera.pandas as pa

from audit.conditions import (
    condition_from_label,
    design_from_conditions,
    normalise_condition,
    normalise_design,
)
from audit.config import AuditConfig
from audit.ingest import FileProblem
from schemas.input import RawRows
from schemas.tables import AcceptedCases, Adjustments, Observations, Quarantine

TEXT_COLUMNS = ("study", "case", "series", "phase", "condition", "design", "outcome_scale", "desired_direction", "tier")
NONNEGATIVE_SCALES = ("count", "rate", "duration")
MIN_PHASE_POINTS = 3
STANDARD_PHASE_POINTS = 5

QUARANTINE_COLUMNS = [
    "level", "source_file", "source_sheet", "rows", "n_rows", "study", "case", "series",
    "column", "value", "rule", "message",
]
ADJUSTMENT_COLUMNS = [
    "source_file", "source_sheet", "source_row", "study", "case", "series", "column",
    "old_value", "new_value", "rule",
]
OBSERVATION_COLUMNS = [
    "case_key", "study", "case", "series", "session", "outcome", "phase", "phase_index", "condition",
    "design", "outcome_scale", "desired_direction", "tier", "source_file", "source_sheet", "source_row",
    "n_source_rows", "adjusted",
]


@dataclass
class PreparedInput:
    """Clean observations, accepted cases, adjustments and quarantine of one review input."""

    observations: pd.DataFrame
    cases: pd.DataFrame
    adjustments: pd.DataFrame
    quarantine: pd.DataFrame
    rows_read: int

    @property
    def rows_accepted(self) -> int:
        return int(self.observations["n_source_rows"].sum()) if len(self.observations) else 0

    @property
    def rows_quarantined(self) -> int:
        return int(self.quarantine["n_rows"].sum()) if len(self.quarantine) else 0

    @property
    def cases_quarantined(self) -> pd.DataFrame:
        """One row per quarantined case with its first reason."""
        q = self.quarantine[self.quarantine["level"] == "case"]
        return q.drop_duplicates(["study", "case", "series"])[["study", "case", "series", "rule", "message"]]


def case_key(study: pd.Series, case: pd.Series, series: pd.Series) -> pd.Series:
    """Stable, filesystem-safe key of a case: first 16 hex digits of sha1(study, case, series).

    The ids (as text) are joined with the unit separator U+001F; ids that contain it themselves
    are encoded as a JSON list instead (no raw U+001F in it), so different cases never share a
    key.  Each distinct (study, case, series) is hashed once (factorized codes, no per-row text).
    """
    codes, labels = [], []
    for values in (study, case, series):
        c, u = pd.factorize(np.asarray(values, dtype=object), use_na_sentinel=False)
        codes.append(c.astype(np.int64))
        labels.append([str(v) for v in u])
    if not len(codes[0]):
        return pd.Series([], index=study.index, dtype=object)
    sizes = [max(len(u), 1) for u in labels]
    if sizes[0] * sizes[1] * sizes[2] < 2**62:
        combined = (codes[0] * sizes[1] + codes[1]) * sizes[2] + codes[2]
        # (a hash table of the distinct ids, not a sort of every row: the order of ``uniq`` does not matter)
        inverse, uniq = pd.factorize(combined)
        del combined
        triples = zip(uniq // (sizes[1] * sizes[2]), (uniq // sizes[2]) % sizes[1], uniq % sizes[2])
    else:  # pragma: no cover - more than 2**62 id combinations
        uniq, inverse = np.unique(np.column_stack(codes), axis=0, return_inverse=True)
        triples = map(tuple, uniq)
    keys = []
    for i, j, k in triples:
        s, c, r = labels[0][i], labels[1][j], labels[2][k]
        joined = f"{s}\x1f{c}\x1f{r}"
        if joined.count("\x1f") != 2:
            joined = json.dumps([s, c, r])
        keys.append(hashlib.sha1(joined.encode("utf-8", "surrogatepass")).hexdigest()[:16])
    return pd.Series(np.asarray(keys, dtype=object)[inverse.ravel()], index=study.index, dtype=object)


@dataclass(frozen=True)
class CaseOrder:
    """Rows of observations in (case_key, session) order, as ``sort_values(["case_key",
    "session"], kind="stable")`` gives them, without copying the table."""

    rows: np.ndarray  # row positions in that order
    starts: np.ndarray  # position in ``rows`` where each case begins, plus the total at the end
    keys: np.ndarray  # each case's key (object), in the same order

    @classmethod
    def of(cls, observations: pd.DataFrame) -> "CaseOrder":
        codes, uniques = pd.factorize(observations["case_key"], sort=True)
        rows = np.lexsort((observations["session"].to_numpy(dtype=float), codes))
        sorted_codes = codes[rows]
        starts = np.flatnonzero(np.r_[True, sorted_codes[1:] != sorted_codes[:-1], True])
        if not rows.size:
            starts = np.zeros(1, dtype=np.int64)
        keys = np.asarray(uniques, dtype=object)[sorted_codes[starts[:-1]]]
        return cls(rows, starts.astype(np.int64), keys)


def compact_rows(rows) -> str:
    """'2-5, 9' for rows [2, 3, 4, 5, 9]."""
    values = sorted(set(int(r) for r in rows))
    if not values:
        return ""
    parts = []
    start = prev = values[0]
    for v in values[1:]:
        if v == prev + 1:
            prev = v
            continue
        parts.append(f"{start}" if start == prev else f"{start}-{prev}")
        start = prev = v
    parts.append(f"{start}" if start == prev else f"{start}-{prev}")
    text = ", ".join(parts)
    return text if len(text) <= 200 else text[:197] + "..."


def _as_text(values: pd.Series) -> pd.Series:
    """Cell values as stripped text; empty cells become missing. Whole floats print without '.0'."""

    def one(v):
        if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NA:
            return None
        if isinstance(v, float) and v.is_integer():
            v = int(v)
        text = str(v).strip()
        return text or None

    arr = values.to_numpy(dtype=object)
    if pd.api.types.infer_dtype(arr, skipna=True) in ("string", "empty"):  # text cells (the CSV path)
        # each distinct cell is stripped once (ids and labels repeat on every row)
        codes, distinct = pd.factorize(arr, use_na_sentinel=True)
        stripped = np.empty(len(distinct) + 1, dtype=object)  # the last entry: missing cells
        stripped[:-1] = [v.strip() or None for v in distinct]
        return pd.Series(stripped[codes], index=values.index, dtype=object)
    return pd.Series([one(v) for v in values.tolist()], index=values.index, dtype=object)


def _map_unique(values: pd.Series, fn) -> pd.Series:
    """fn applied once per distinct non-missing value (equal results share one object); None stays None."""
    uniq = {v: fn(v) for v in pd.unique(values.dropna())}
    return pd.Series([None if v is None else uniq.get(v, v) for v in values.tolist()], index=values.index,
                     dtype=object)


def _as_number(values: pd.Series) -> pd.Series:
    """Numbers from cells; text that is not a number becomes NaN (and fails validation)."""
    numeric = pd.to_numeric(values, errors="coerce")
    return numeric.astype("float64")


class _Problems:
    """Collects case-level problems in the order found."""

    def __init__(self) -> None:
        self.items: list[dict] = []

    def add(self, key: str, rule: str, message: str, column: str | None = None, value: str | None = None) -> None:
        self.items.append({"case_key": key, "rule": rule, "message": message, "column": column, "value": value})

    def keys(self) -> set[str]:
        return {item["case_key"] for item in self.items}


_ROW_RULES = {
    ("not_nullable", "study"): ("missing_id", "study is empty"),
    ("not_nullable", "case"): ("missing_id", "case is empty"),
    ("not_nullable", "phase"): ("missing_phase", "phase is empty"),
    ("not_nullable", "session"): ("not_a_number", "session is empty or not a number"),
    ("not_nullable", "outcome"): ("not_a_number", "outcome is empty or not a number"),
    ("finite_number", "session"): ("not_finite", "session is not a finite number"),
    ("finite_number", "outcome"): ("not_finite", "outcome is not a finite number"),
    ("no_extra_fields", "extra_fields"): ("extra_fields", "row has more fields than the header"),
}


def _row_rule(check: str, column: str) -> tuple[str, str]:
    if (check, column) in _ROW_RULES:
        return _ROW_RULES[(check, column)]
    if check.startswith("isin"):
        allowed = {
            "condition": "baseline or treatment",
            "outcome_scale": "percent, count, rate, duration, rating or other",
            "desired_direction": "increase or decrease",
        }.get(column, "a known value")
        return "unknown_value", f"{column} must be {allowed}"
    if check.startswith("str_length"):
        return "missing_id", f"{column} is empty"
    return "invalid_value", f"{column} fails check {check}"


def prepare_rows(raw: pd.DataFrame, file_problems: list[FileProblem], config: AuditConfig) -> PreparedInput:
    """Validate and repair raw rows of the whole review; cases may span files.

    ``raw`` is not changed (copy-on-write). A caller that hands over its only reference (see
    ``audit.intake.combine``) lets each raw column go as soon as its cleaned version exists."""
    frame = raw.reset_index(drop=True)
    del raw
    n = len(frame)
    frame["_pos"] = np.arange(n)
    raw_session = frame["session"].copy()
    raw_outcome = frame["outcome"].copy()
    for col in TEXT_COLUMNS:
        frame[col] = _as_text(frame[col]) if col in frame else None
    defaults = config.defaults
    for col in ("design", "outcome_scale", "desired_direction", "series"):
        if col in defaults:
            frame[col] = frame[col].where(frame[col].notna(), defaults[col])
    frame["series"] = frame["series"].fillna("")
    for col in ("outcome_scale", "desired_direction"):
        frame[col] = _map_unique(frame[col], str.lower)
    frame["condition"] = _map_unique(frame["condition"], normalise_condition)
    frame["session"] = _as_number(frame["session"])
    frame["outcome"] = _as_number(frame["outcome"])
    frame["extra_fields"] = _as_text(frame.get("__extra_fields", pd.Series([None] * n, dtype=object)))

    # ---- row rules (pandera, lazy: every failure at once)
    bad_rows: dict[int, tuple[str, str, str, str]] = {}
    check_columns = ["study", "case", "series", "session", "outcome", "phase", "condition",
                     "outcome_scale", "desired_direction", "extra_fields", "source_file", "source_row"]
    for lo in range(0, max(n, 1), _VALIDATE_CHUNK_ROWS):  # slices: pandera's copies stay slice-sized
        check = frame.iloc[lo:lo + _VALIDATE_CHUNK_ROWS][check_columns].copy()
        for col in ("study", "case", "series", "phase", "condition", "outcome_scale", "desired_direction",
                    "extra_fields"):
            check[col] = (check[col].astype("str").where(check[col].notna(), None) if len(check)
                          else check[col].astype("str"))
        check["source_file"] = check["source_file"].astype("str")
        check["source_row"] = check["source_row"].astype("int64")
        try:
            RawRows.validate(check, lazy=True)
        except pa.errors.SchemaErrors as exc:
            fc = exc.failure_cases
            fc = fc[fc["index"].notna()]
            for pos, column, chk in zip(fc["index"].astype(int), fc["column"].astype(str), fc["check"].astype(str)):
                if pos in bad_rows:
                    continue
                rule, text = _row_rule(chk, column)
                source = {"session": raw_session, "outcome": raw_outcome}.get(column)
                if source is not None:
                    value = source.iloc[pos]
                elif column == "extra_fields":
                    value = frame["extra_fields"].iloc[pos]
                else:
                    value = frame[column].iloc[pos] if column in frame else None
                value_text = None if value is None or (isinstance(value, float) and np.isnan(value)) else str(value)
                bad_rows[pos] = (rule, text, column, value_text)
    del check, raw_session, raw_outcome  # (memory: a million-row input holds several copies otherwise)

    bad_mask = np.zeros(n, dtype=bool)
    if bad_rows:
        bad_mask[list(bad_rows)] = True
    has_ids = frame["study"].notna() & frame["case"].notna()
    frame["case_key"] = None
    if n:
        frame.loc[has_ids, "case_key"] = case_key(frame.loc[has_ids, "study"], frame.loc[has_ids, "case"], frame.loc[has_ids, "series"])

    problems = _Problems()
    for key, part in frame[bad_mask & has_ids.to_numpy()].groupby("case_key", sort=False, observed=True):
        rows = compact_rows(part["source_row"])
        problems.add(key, "case_has_invalid_rows",
                     f"case quarantined because row(s) {rows} of {part['source_file'].iloc[0]} are invalid "
                     "(see the row entries); fix or remove those rows")

    # (copy-on-write: without bad rows ``good`` shares the columns until one of them is changed)
    good = frame[~bad_mask] if bad_mask.any() else frame
    # the rest needs only where each raw row came from (quarantine entries)
    frame = frame[["source_file", "source_sheet", "source_row", "study", "case", "series", "case_key"]]
    for col in ("source_file", "source_sheet", "study", "case", "series", "case_key"):
        frame[col] = _categories(frame[col])

    # ---- conditions from phase labels where not given
    labels = good.loc[good["condition"].isna(), "phase"].unique()
    derived = {lab: condition_from_label(lab, config.phase_map) for lab in labels}
    need = good["condition"].isna()
    good.loc[need, "condition"] = good.loc[need, "phase"].map(derived)
    for key, part in good[good["condition"].isna()].groupby("case_key", sort=False, observed=True):
        label = part["phase"].iloc[0]
        problems.add(key, "ambiguous_phase_label",
                     f"phase label {label!r} cannot be mapped to baseline or treatment; add a `condition` column "
                     f"or map it in the config, e.g. [phases] \"{label}\" = \"treatment\"",
                     "phase", label)

    # From here on the text of each row is final but for the design name: each text column becomes
    # a categorical (a small code per row), so that sorting and grouping move codes, not strings.
    for col in _CODED_COLUMNS:
        good[col] = _categories(good[col])
    good = good.drop(columns=["extra_fields", "__extra_fields"], errors="ignore")

    # ---- order, exact duplicates, conflicting sessions
    good = good.sort_values(["case_key", "session", "_pos"], kind="stable").reset_index(drop=True)
    good["n_source_rows"] = 1
    dup_cols = ["case_key", "session", "outcome", "phase", "condition"]
    is_dup = good.duplicated(dup_cols, keep="first").to_numpy()
    adjustments: list[pd.DataFrame] = []
    origin = ["case_key", "study", "case", "series", "source_file", "source_sheet", "source_row"]
    collapsed = good.iloc[0:0][origin]  # the rows merged into an earlier identical point (any file)
    if is_dup.any():
        kept = good[~is_dup]
        dropped = good[is_dup]
        collapsed = dropped[origin]
        match = dropped[dup_cols].merge(kept[dup_cols + ["source_file", "source_sheet", "source_row"]],
                                        on=dup_cols, how="left")
        same_place = ((match["source_file"].to_numpy() == dropped["source_file"].to_numpy())
                      & (match["source_sheet"].to_numpy() == dropped["source_sheet"].to_numpy()))
        where = [f"exact duplicate of row {r}" + ("" if same else f" of {f}" + (f" [sheet {sh}]" if sh else ""))
                 for r, f, sh, same in zip(match["source_row"], match["source_file"], match["source_sheet"], same_place)]
        adjustments.append(pd.DataFrame({
            "source_file": dropped["source_file"].to_numpy(), "source_sheet": dropped["source_sheet"].to_numpy(),
            "source_row": dropped["source_row"].to_numpy(), "study": dropped["study"].to_numpy(),
            "case": dropped["case"].to_numpy(), "series": dropped["series"].to_numpy(), "column": "row",
            "old_value": where, "new_value": "collapsed",
            "rule": "duplicate_collapsed", "case_key": dropped["case_key"].to_numpy(),
        }))
        counts = good.groupby(dup_cols, sort=False, dropna=False, observed=True)["_pos"].transform("size")
        good["n_source_rows"] = counts.to_numpy()
        good = good[~is_dup].reset_index(drop=True)
    same_session = good.duplicated(["case_key", "session"], keep=False)
    for key, part in good[same_session].groupby("case_key", sort=False, observed=True):
        s = part["session"].iloc[0]
        problems.add(key, "duplicate_session",
                     f"several points at session {s:g} with different outcomes or phases (rows "
                     f"{compact_rows(part['source_row'])}); digitizing cannot tell which is right: fix the file",
                     "session", f"{s:g}")

    # ---- session snapping
    tol = config.repairs.session_snap_tolerance
    if tol > 0 and len(good):
        rounded = np.round(good["session"].to_numpy())
        frac = np.abs(good["session"].to_numpy() - rounded)
        good["_frac"] = frac
        good["_rounded"] = rounded
        case_max = good.groupby("case_key", sort=False, observed=True)["_frac"].transform("max").to_numpy()
        candidate = (case_max <= tol) & (case_max > 0)
        conflict = good[candidate].duplicated(["case_key", "_rounded"], keep=False)
        conflict_keys = set(good[candidate][conflict.to_numpy()]["case_key"])
        for key in conflict_keys:
            part = good[(good["case_key"] == key) & candidate]
            clash = part[part.duplicated("_rounded", keep=False)]
            problems.add(key, "session_snap_conflict",
                         f"sessions {', '.join(f'{v:g}' for v in clash['session'])} (rows {compact_rows(clash['source_row'])}) "
                         "would snap to the same whole number; check the digitized sessions",
                         "session", f"{clash['session'].iloc[0]:g}")
        apply = candidate & ~good["case_key"].isin(conflict_keys).to_numpy() & (frac > 0)
        if apply.any():
            changed = good[apply]
            adjustments.append(pd.DataFrame({
                "source_file": changed["source_file"].to_numpy(), "source_sheet": changed["source_sheet"].to_numpy(),
                "source_row": changed["source_row"].to_numpy(), "study": changed["study"].to_numpy(),
                "case": changed["case"].to_numpy(), "series": changed["series"].to_numpy(), "column": "session",
                "old_value": [repr(float(v)) for v in changed["session"]],
                "new_value": [repr(float(v)) for v in changed["_rounded"]],
                "rule": "session_snapped", "case_key": changed["case_key"].to_numpy(),
            }))
            good.loc[apply, "session"] = good.loc[apply, "_rounded"]
        good = good.drop(columns=["_frac", "_rounded"])
    good["adjusted"] = False

    # ---- scale bounds
    margin = config.repairs.percent_clip_margin
    pct = (good["outcome_scale"] == "percent").to_numpy()
    y = good["outcome"].to_numpy()
    low_clip = pct & (y < 0) & (y >= -margin)
    high_clip = pct & (y > 100) & (y <= 100 + margin)
    outside = pct & ((y < -margin) | (y > 100 + margin))
    for key, part in good[outside].groupby("case_key", sort=False, observed=True):
        problems.add(key, "out_of_range",
                     f"percent outcome {part['outcome'].iloc[0]:g} (row {part['source_row'].iloc[0]}) is outside 0-100 by more "
                     f"than the clip margin of {margin:g}; check the digitizing or the outcome_scale",
                     "outcome", f"{part['outcome'].iloc[0]:g}")
    negative = good["outcome_scale"].isin(NONNEGATIVE_SCALES).to_numpy() & (y < 0)
    for key, part in good[negative].groupby("case_key", sort=False, observed=True):
        problems.add(key, "negative_value",
                     f"{part['outcome_scale'].iloc[0]} outcome {part['outcome'].iloc[0]:g} (row {part['source_row'].iloc[0]}) "
                     "is negative; check the digitizing or the outcome_scale",
                     "outcome", f"{part['outcome'].iloc[0]:g}")
    clip = low_clip | high_clip
    if clip.any():
        changed = good[clip]
        new = np.where(y[clip] < 0, 0.0, 100.0)
        adjustments.append(pd.DataFrame({
            "source_file": changed["source_file"].to_numpy(), "source_sheet": changed["source_sheet"].to_numpy(),
            "source_row": changed["source_row"].to_numpy(), "study": changed["study"].to_numpy(),
            "case": changed["case"].to_numpy(), "series": changed["series"].to_numpy(), "column": "outcome",
            "old_value": [repr(float(v)) for v in changed["outcome"]], "new_value": [repr(float(v)) for v in new],
            "rule": "percent_clipped", "case_key": changed["case_key"].to_numpy(),
        }))
        good.loc[clip, "outcome"] = new

    # ---- one design, scale and direction per case
    for col in ("design", "outcome_scale", "desired_direction"):
        counts = good.groupby("case_key", sort=False, observed=True)[col].nunique(dropna=False)
        for key in counts.index[counts > 1]:
            values = sorted(str(v) for v in good.loc[good["case_key"] == key, col].unique())
            problems.add(key, "inconsistent_case_attribute",
                         f"{col} differs between rows of the same case ({', '.join(values)}); one case has one {col}",
                         col, values[0])

    # ---- phases
    key_codes = good["case_key"].cat.codes.to_numpy()
    phase_codes = good["phase"].cat.codes.to_numpy()
    starts = np.ones(len(good), dtype=np.int64)  # 1 where a case or a run of one phase label begins
    starts[1:] = (key_codes[1:] != key_codes[:-1]) | (phase_codes[1:] != phase_codes[:-1])
    good["phase_index"] = pd.Series(starts, index=good.index).groupby(key_codes, sort=False).cumsum()
    cond_per_phase = good.groupby(["case_key", "phase_index"], sort=False, observed=True)["condition"].nunique(
        dropna=True)
    for key, _ in cond_per_phase[cond_per_phase > 1].index:
        problems.add(key, "condition_changes_within_phase",
                     "the condition column changes within one phase label run; check the phase and condition columns",
                     "condition", None)

    # ---- design names
    given = good["design"].notna()
    good.loc[given, "design"] = _map_unique(good.loc[given, "design"], normalise_design)
    good["design_source"] = pd.Categorical.from_codes(np.where(given, 0, 1), ["given", "inferred"])
    if (~given).any():
        phase_conditions = (
            good[~given].groupby(["case_key", "phase_index"], sort=True, observed=True)["condition"].first().dropna()
        )
        inferred = phase_conditions.groupby(level=0, observed=True).agg(lambda c: design_from_conditions(list(c)))
        good.loc[~given, "design"] = good.loc[~given, "case_key"].map(inferred).astype(object).fillna("other")

    # ---- case rules
    alternating = good["design"] == "alternating"
    present = {needed: (good["condition"] == needed).groupby(key_codes, sort=False).any()
               for needed in ("baseline", "treatment")}
    lacking = ~(present["baseline"].to_numpy() & present["treatment"].to_numpy())
    for code in present["baseline"].index[lacking]:
        key = good["case_key"].cat.categories[code]
        for needed in ("baseline", "treatment"):
            if not present[needed][code]:
                problems.add(key, f"missing_{needed}_phase",
                             f"case has no {needed} phase; each case needs at least one baseline and one treatment phase",
                             "condition", None)
    # (only the columns needed: a masked copy of the whole table would double it for a moment)
    phase_sizes = good.loc[~alternating, ["case_key", "phase_index", "session", "phase", "source_file"]].groupby(
        ["case_key", "phase_index"], sort=False, observed=True).agg(
        n=("session", "size"), phase=("phase", "first"), first=("session", "min"), last=("session", "max"),
        file=("source_file", "first"),
    )
    cond_sizes = good.loc[alternating, ["case_key", "condition", "session"]].groupby(
        ["case_key", "condition"], sort=False, observed=True).agg(n=("session", "size"))
    for (key, idx), row in phase_sizes[phase_sizes["n"] < MIN_PHASE_POINTS].iterrows():
        problems.add(key, "phase_too_short",
                     f"phase {row['phase']!r} (phase {idx}, sessions {row['first']:g}-{row['last']:g}) has {row['n']} point(s); "
                     f"at least {MIN_PHASE_POINTS} are needed for any within-phase estimate",
                     "phase", str(row["phase"]))
    for (key, cond), row in cond_sizes[cond_sizes["n"] < MIN_PHASE_POINTS].iterrows():
        problems.add(key, "condition_too_short",
                     f"alternating design: condition {cond} has {row['n']} point(s); at least {MIN_PHASE_POINTS} are needed",
                     "condition", cond)
    sizes = good.groupby("case_key", sort=False, observed=True)["session"].size()
    for key in sizes.index[sizes > config.limits.max_points_per_case]:
        problems.add(key, "too_many_points",
                     f"case has {sizes[key]:,} points, above the limit of {config.limits.max_points_per_case:,}; "
                     "check that study, case and series identify one series, or raise [limits] max_points_per_case")

    # ---- split
    bad_keys = problems.keys()
    in_bad_case = good["case_key"].isin(bad_keys)
    accepted = good[~in_bad_case].reset_index(drop=True)
    rejected_rows = good[in_bad_case]
    del good, in_bad_case
    quarantine = _quarantine_table(frame, bad_rows, rejected_rows, problems, file_problems, collapsed)
    del frame, rejected_rows, collapsed
    adj = pd.concat(adjustments, ignore_index=True) if adjustments else pd.DataFrame(columns=ADJUSTMENT_COLUMNS + ["case_key"])
    adj = adj[~adj["case_key"].isin(bad_keys)]
    if len(adj):
        adjusted_rows = set(zip(adj["source_file"], adj["source_sheet"], adj["source_row"]))
        accepted["adjusted"] = [
            (f, s, r) in adjusted_rows for f, s, r in zip(accepted["source_file"], accepted["source_sheet"], accepted["source_row"])
        ]
        # a collapsed duplicate marks the point it was merged into as adjusted, too
        accepted.loc[accepted["n_source_rows"] > 1, "adjusted"] = True
    adj_counts = adj.groupby("case_key").size() if len(adj) else pd.Series(dtype="int64")
    adj = adj[ADJUSTMENT_COLUMNS].reset_index(drop=True)
    adj["source_row"] = adj["source_row"].astype("int64")
    for col in ADJUSTMENT_COLUMNS:
        if col != "source_row":
            adj[col] = adj[col].astype(str)

    observations = accepted[OBSERVATION_COLUMNS]  # copy-on-write: columns are copied only when changed
    for col in _CODED_COLUMNS:  # the categories of the quarantined cases go
        observations[col] = observations[col].cat.remove_unused_categories()
    for col in ("session", "outcome"):
        observations[col] = observations[col].astype("float64")
    for col in ("phase_index", "source_row", "n_source_rows"):
        observations[col] = observations[col].astype("int64")
    observations["adjusted"] = observations["adjusted"].astype(bool)
    cases = _accepted_cases(accepted, adj_counts)
    del accepted
    observations = validate_in_slices(observations, Observations)

    total_read = n + sum(p.n_rows for p in file_problems)
    result = PreparedInput(observations, validate_in_slices(cases, AcceptedCases),
                           validate_in_slices(adj, Adjustments), validate_in_slices(quarantine, Quarantine), total_read)
    if result.rows_accepted + result.rows_quarantined != total_read:  # pragma: no cover - invariant guard
        raise AssertionError(
            f"row accounting broken: read {total_read}, accepted {result.rows_accepted}, "
            f"quarantined {result.rows_quarantined}"
        )
    return result


_VALIDATE_CHUNK_ROWS = 200_000  # outgoing tables are validated in slices of whole cases (memory)


def validate_in_slices(df: pd.DataFrame, schema) -> pd.DataFrame:
    """Validate an outgoing table (a failure here is a bug in sced-audit, not in the input).

    A long table whose cases are contiguous is validated in slices of whole cases (the schemas'
    table-wide checks are per case), so pandera's temporary copies stay slice-sized."""
    n = len(df)
    if n <= _VALIDATE_CHUNK_ROWS or "case_key" not in df.columns:
        return schema.validate(df, lazy=True)
    keys, distinct = pd.factorize(df["case_key"])  # codes (no Python string per row)
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    if len(starts) != len(distinct) + int((keys < 0).any()):  # a case in several places: validate whole
        return schema.validate(df, lazy=True)
    cuts = [0]
    for start in starts[1:]:
        if start - cuts[-1] >= _VALIDATE_CHUNK_ROWS:
            cuts.append(int(start))
    cuts.append(n)
    if len(cuts) == 2:
        return schema.validate(df, lazy=True)
    for a, b in zip(cuts[:-1], cuts[1:]):  # every check, slice by slice (raises on a failure)
        schema.validate(df.iloc[a:b], lazy=True)
    return schema.to_schema().coerce_dtype(df)  # then the dtypes once, for the whole table


# text columns held as categoricals from the sort on (the design name is settled after it)
_CODED_COLUMNS = ("case_key", "study", "case", "series", "phase", "condition", "outcome_scale", "desired_direction",
                  "tier", "source_file", "source_sheet")


def _categories(values: pd.Series) -> pd.Series:
    """A text column as a categorical with sorted categories (as the observations schema makes it)."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        return values
    # The codes from a sorted factorization of the cells as they are: ``astype(CategoricalDtype())``
    # would first copy the whole column into one Arrow text array (a few hundred MB for millions
    # of rows) to find the categories. The categories are built from the distinct values only.
    codes, distinct = pd.factorize(values.to_numpy(dtype=object), sort=True, use_na_sentinel=True)
    dtype = pd.CategoricalDtype(pd.Index(distinct))
    return pd.Series(pd.Categorical.from_codes(codes, dtype=dtype), index=values.index, name=values.name)


def _accepted_cases(accepted: pd.DataFrame, adj_counts: pd.Series) -> pd.DataFrame:
    if accepted.empty:
        cols = {c: pd.Series([], dtype=object) for c in ("case_key", "study", "case", "series", "design", "design_source",
                                                          "outcome_scale", "desired_direction")}
        frame = pd.DataFrame(cols)
        for c in ("n_points", "n_phases", "min_phase_points", "n_adjustments"):
            frame[c] = pd.Series([], dtype="int64")
        frame["below_five_point_standard"] = pd.Series([], dtype=bool)
        return frame
    g = accepted.groupby("case_key", sort=False, observed=True)
    cases = g.agg(
        study=("study", "first"), case=("case", "first"), series=("series", "first"), design=("design", "first"),
        design_source=("design_source", "first"), outcome_scale=("outcome_scale", "first"),
        desired_direction=("desired_direction", "first"), n_points=("session", "size"), n_phases=("phase_index", "max"),
    ).reset_index()
    for col in cases.columns:  # plain text (the schema makes strings of them)
        if isinstance(cases[col].dtype, pd.CategoricalDtype):
            cases[col] = cases[col].astype(object)
    per_phase = accepted.groupby(["case_key", "phase_index"], sort=False, observed=True).size()
    per_phase = per_phase.groupby(level=0, observed=True).min()
    per_phase.index = per_phase.index.astype(object)
    per_cond = accepted.groupby(["case_key", "condition"], sort=False, observed=True).size()
    per_cond = per_cond.groupby(level=0, observed=True).min()
    per_cond.index = per_cond.index.astype(object)
    alt = cases["design"] == "alternating"
    cases["min_phase_points"] = np.where(alt, cases["case_key"].map(per_cond), cases["case_key"].map(per_phase)).astype("int64")
    cases["below_five_point_standard"] = cases["min_phase_points"] < STANDARD_PHASE_POINTS
    cases["n_adjustments"] = cases["case_key"].map(adj_counts).fillna(0).astype("int64")
    for col in ("n_points", "n_phases"):
        cases[col] = cases[col].astype("int64")
    return cases


def _quarantine_table(frame, bad_rows, rejected_rows, problems: _Problems, file_problems,
                      collapsed: pd.DataFrame | None = None) -> pd.DataFrame:
    """Quarantine entries; a case entry counts every input row it removes in the file that row
    came from (exact duplicates collapsed into a point of another file included)."""
    entries: list[dict] = []
    for p in file_problems:
        entries.append({
            "level": "file", "source_file": p.source_file, "source_sheet": p.source_sheet,
            "rows": "all" if p.n_rows else "", "n_rows": p.n_rows, "study": None, "case": None, "series": None,
            "column": None, "value": None, "rule": p.rule, "message": p.message,
        })
    if bad_rows:
        pos = np.fromiter(bad_rows.keys(), dtype=np.int64)
        info = frame.iloc[pos]
        for p, (f, sh, r, st, ca, se) in zip(pos, zip(info["source_file"], info["source_sheet"], info["source_row"],
                                                       info["study"], info["case"], info["series"])):
            rule, text, column, value = bad_rows[int(p)]
            shown = "" if value is None else f" (value {value[:60]!r})"
            entries.append({
                "level": "row", "source_file": f, "source_sheet": sh, "rows": str(r), "n_rows": 1,
                "study": st, "case": ca, "series": se, "column": column, "value": value, "rule": rule,
                "message": f"{f}{f' [sheet {sh}]' if sh else ''} row {r}: {text}{shown}",
            })
    if problems.items:
        counted: set[str] = set()
        removed = rejected_rows[["case_key", "study", "case", "series", "source_file", "source_sheet", "source_row"]]
        if collapsed is not None and len(collapsed) and len(removed):
            removed = pd.concat([removed, collapsed[collapsed["case_key"].isin(set(removed["case_key"]))]],
                                ignore_index=True)
        by_key = ({k: part for k, part in removed.groupby("case_key", sort=False, observed=True)}
                  if len(removed) else {})
        for item in problems.items:
            key = item["case_key"]
            part = by_key.get(key)
            first = key not in counted
            counted.add(key)
            if part is None or part.empty:
                meta = frame[frame["case_key"] == key].iloc[0]
                groups = [((meta["source_file"], meta["source_sheet"]), None)]
            else:
                meta = part.iloc[0]
                groups = list(part.groupby(["source_file", "source_sheet"], sort=False, observed=True))
            for i, ((f, sh), sub) in enumerate(groups):
                n_rows = len(sub) if (first and sub is not None) else 0
                entries.append({
                    "level": "case", "source_file": f, "source_sheet": sh,
                    "rows": compact_rows(sub["source_row"]) if sub is not None else "",
                    "n_rows": n_rows, "study": meta["study"], "case": meta["case"], "series": meta["series"],
                    "column": item["column"], "value": item["value"], "rule": item["rule"],
                    "message": f"study {meta['study']!r}, case {meta['case']!r}"
                               + (f", series {meta['series']!r}" if meta["series"] else "") + f": {item['message']}",
                })
    table = pd.DataFrame(entries, columns=QUARANTINE_COLUMNS)
    table["n_rows"] = table["n_rows"].astype("int64")
    for col in ("level", "source_file", "source_sheet", "rows", "rule", "message"):
        table[col] = table[col].astype(str)
    for col in ("study", "case", "series", "column", "value"):
        table[col] = table[col].astype(object)
    return table
