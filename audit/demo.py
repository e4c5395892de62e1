"""Built-in demo review: writes an invented single-case review with known truth and artefacts.

Every study, case and value written here is invented; none describes real people or research.

Layout written into ``folder``::

    README.txt      says the data are invented, lists the artefacts, how to regenerate
    truth.csv       one row per (study, case, series): the generating parameters
    artefacts.csv   one row per deliberate artefact (see ``expected_artefacts``)
    data/           the input files only (point the pipeline here); searched recursively

Generating model, per case and series, with t = session - 1::

    y_t = level + baseline_trend*t + level_change*D_t + slope_change*(t - t_p)*D_t + e_t
    e_t = rho*e_{t-1} + sd*sqrt(1 - rho^2)*z_t,  e_0 = sd*z_0,  z ~ N(0, 1)   (stationary AR(1))

D_t = 1 in treatment sessions, t_p = first session index of the treatment phase containing t
(so in ABAB the slope change restarts in B2 and the effect is withdrawn in A2). ``sd`` is the
marginal sd of e_t. Then the scale transform: percent clipped to [0, 100] and rounded to 0.1,
count rounded to integers >= 0, rate (per minute) rounded to 0.01 and kept >= 0.01. truth.csv
holds the generating values, before clipping, rounding and artefacts. level_change is signed in
outcome units (therapeutic: > 0 for "increase", < 0 for "decrease"); 0 means no effect.

Phase labels and conditions (labels starting with "A" are baseline, "B" treatment):

- AB: "A" then "B".
- ABAB: "A", "B", "A2", "B2" in some studies, "A", "B", "A", "B" in others.
- multiple_baseline: each tier is a case (column ``tier``), "A" then "B", intervention starts
  staggered across tiers; all tiers share the session count.
- alternating: an initial baseline phase "A" of 4-5 sessions, then baseline ("A") and treatment
  ("B") sessions interleaved in randomised pairs (runs of at most 2, first alternating session is
  "B"). Runs in the alternating part are shorter than 3 points; the points-per-phase rule then
  applies per condition (baseline has 8+ points, treatment 4-6). No slope change is generated.

Artefacts (all listed in artefacts.csv with file, sheet, 0-based data row index as read by
pandas, written and expected values): session values jittered by up to +-0.15 around whole
numbers in most rows of several files; percent values slightly outside 0-100 on points whose
clean value sits at the bound; one exact duplicate row; one case with a 2-point baseline
(the only case that should be quarantined); one semicolon file with decimal commas; one XLSX
file with two sheets; one TSV; one CSV with a UTF-8 BOM; one file without a ``condition``
column; the rest plain UTF-8 CSV. No ambiguous phase labels.

Regenerate: ``python -m audit.demo OUT [--seed N]``; the test fixture with
``python -m audit.demo --fixture fixtures/demo_small`` (an earlier output in OUT is replaced;
any other non-empty OUT needs ``--overwrite``, which replaces only data/ and the sidecars).
"""

from __future__ import annotations

import argparse
import io
import re
import shutil
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

DEFAULT_SEED = 20261201
FIXTURE_SEED = 7
INVENTED_NOTE = "invented data for the demo; no real people or studies"

_SIDECARS = ("README.txt", "truth.csv", "artefacts.csv")
_XLSX_TIMESTAMP = "2026-12-01T00:00:00Z"
_ZIP_DATE = (2026, 12, 1, 0, 0, 0)

TRUTH_COLUMNS = [
    "study", "case", "series", "design", "rho", "level_change", "slope_change",
    "baseline_trend", "sd", "desired_direction", "outcome_scale", "note",
    "file", "sheet", "tier", "level", "n_points", "n_baseline", "n_treatment", "phases",
    "expected_quarantine",
]
ARTEFACT_COLUMNS = [
    "kind", "file", "sheet", "row_index", "study", "case", "series", "column",
    "written_value", "expected_value", "expected_action", "note",
]


@dataclass(frozen=True, eq=False)
class DemoReview:
    """What write_demo_review / write_fixture_review wrote, with the truth behind it."""

    folder: Path
    data_folder: Path
    files: tuple[Path, ...]
    truth: pd.DataFrame
    expected_artefacts: pd.DataFrame
    seed: int
    readme: Path
    truth_file: Path
    artefacts_file: Path


# ----------------------------------------------------------------------------- specifications


@dataclass(frozen=True)
class _Series:
    name: str  # "" when the file has no series column
    scale: str
    direction: str
    level: tuple[float, float] | None = None
    sd: tuple[float, float] | None = None


@dataclass(frozen=True)
class _Study:
    number: str
    topic: str
    design: str
    series: tuple[_Series, ...]
    n_cases: int
    rho_mean: float
    effect_sd: tuple[float, ...]  # choices, in sd units
    placement: tuple[tuple[str, str | None, tuple[int, ...] | None], ...]  # file, sheet, cases
    null_cases: int = 0  # last cases forced to no effect
    trend_sd: float = 0.0  # baseline trend, sd units per session, + = therapeutic direction
    slope_sd: float = 0.0  # slope change, sd units per session, therapeutic when effect > 0
    labels: tuple[str, ...] = ("A", "B", "A2", "B2")  # ABAB labels
    out_of_range: tuple[float, ...] = ()
    duplicate: bool = False
    short_case: bool = False

    @property
    def name(self) -> str:
        return f"Study {self.number} (invented): {self.topic}"


@dataclass(frozen=True)
class _File:
    path: str  # relative to data/
    fmt: str  # csv | tsv | semicolon | xlsx
    bom: bool = False
    condition: bool = True
    jitter: tuple[str | None, ...] = ()  # sheets (None for text files) with jittered sessions


_SCALE_DEFAULTS = {
    ("percent", "increase"): ((15.0, 40.0), (5.0, 10.0)),
    ("percent", "decrease"): ((60.0, 85.0), (5.0, 10.0)),
    ("count", "increase"): ((2.0, 6.0), (1.0, 2.2)),
    ("count", "decrease"): ((8.0, 14.0), (1.0, 2.2)),
    ("rate", "increase"): ((0.6, 1.6), (0.10, 0.30)),
    ("rate", "decrease"): ((1.6, 3.0), (0.10, 0.30)),
}


def _one(scale: str, direction: str, level=None, sd=None) -> tuple[_Series, ...]:
    return (_Series("", scale, direction, level, sd),)


_DEMO_STUDIES: tuple[_Study, ...] = (
    _Study("01", "reading fluency (words per minute) in a fictional after-school club",
           "multiple_baseline", _one("rate", "increase", (30.0, 45.0), (3.0, 6.0)), 3, 0.3,
           (2.0, 3.0), (("study01_reading_fluency.csv", None, None),), slope_sd=0.1),
    _Study("02", "disruptive acts per lunch period in a fictional school lunchroom", "ABAB",
           _one("count", "decrease"), 4, 0.5, (1.5, 2.5, 3.0),
           (("study02_lunchroom.csv", None, None),), null_cases=1),
    _Study("03", "percent of intervals on task in a fictional maths class", "ABAB",
           _one("percent", "increase", (55.0, 65.0), (8.0, 10.0)), 3, 0.0, (3.0, 4.0),
           (("study03_maths_on_task.csv", None, None),), labels=("A", "B", "A", "B"),
           out_of_range=(100.8, 100.4)),
    _Study("04", "spontaneous requests per session in fictional speech practice", "alternating",
           _one("count", "increase"), 3, 0.3, (1.0, 2.0, 3.0),
           (("study04_requests.tsv", None, None),)),
    _Study("05", "turn-taking during a fictional café role-play", "AB",
           _one("percent", "increase"), 4, 0.2, (1.5, 2.5, 3.5),
           (("study05_cafe_roleplay.csv", None, None),), null_cases=1, trend_sd=0.1),
    _Study("06", "percent of intervals with calling out in a fictional reading circle",
           "multiple_baseline", _one("percent", "decrease"), 4, 0.5, (2.0, 3.0),
           (("studies06_07_workbook.xlsx", "Study 06", None),)),
    _Study("07", "peer greetings per recess in a fictional playground", "multiple_baseline",
           _one("count", "increase"), 3, 0.3, (2.0, 3.0),
           (("studies06_07_workbook.xlsx", "Study 07", None),), null_cases=1),
    _Study("08", "typing errors per minute in a fictional keyboarding course", "AB",
           _one("rate", "decrease"), 4, 0.0, (1.5, 2.5),
           (("batch_2/study08_typing_errors.csv", None, None),), trend_sd=-0.05,
           short_case=True),
    _Study("09", "percent of intervals off task in a fictional library hour", "ABAB",
           _one("percent", "decrease", (35.0, 45.0), (8.0, 10.0)), 3, 0.4, (3.0, 4.0),
           (("batch_2/study09_library_off_task.csv", None, None),), out_of_range=(-0.6,)),
    _Study("10", "on-task behaviour and call-outs in a fictional science lab", "AB",
           (_Series("on_task", "percent", "increase"), _Series("call_outs", "count", "decrease")),
           3, 0.3, (2.0, 3.0), (("batch_2/study10_two_outcomes.csv", None, None),),
           null_cases=1, slope_sd=0.15),
    _Study("11", "correct responses with and without a fictional picture prompt", "alternating",
           _one("percent", "increase"), 3, 0.5, (1.5, 2.5, 3.5),
           (("study11_prompting.csv", None, None),)),
    _Study("12", "refusals during a fictional homework routine", "AB",
           _one("count", "decrease"), 4, 0.2, (2.0, 3.0),
           (("study12_homework_refusals.csv", None, None),), null_cases=1, trend_sd=-0.05,
           duplicate=True),
    _Study("13", "maths facts answered per minute in a fictional tutoring club",
           "multiple_baseline", _one("rate", "increase", (8.0, 14.0), (1.0, 2.0)), 4, 0.3,
           (2.0, 3.0), (("study13_math_facts.csv", None, None),), slope_sd=0.1),
    _Study("14", "new words used per minute of fictional story retelling", "ABAB",
           _one("rate", "increase"), 4, 0.4, (2.0, 3.0),
           (("study14_vocabulary.csv", None, None),), null_cases=1, labels=("A", "B", "A", "B")),
)

_DEMO_FILES: tuple[_File, ...] = (
    _File("study01_reading_fluency.csv", "csv", bom=True, jitter=(None,)),
    _File("study02_lunchroom.csv", "csv"),
    _File("study03_maths_on_task.csv", "csv", condition=False),
    _File("study04_requests.tsv", "tsv"),
    _File("study05_cafe_roleplay.csv", "semicolon", jitter=(None,)),
    _File("studies06_07_workbook.xlsx", "xlsx", jitter=("Study 07",)),
    _File("batch_2/study08_typing_errors.csv", "csv"),
    _File("batch_2/study09_library_off_task.csv", "csv"),
    _File("batch_2/study10_two_outcomes.csv", "csv"),
    _File("study11_prompting.csv", "csv"),
    _File("study12_homework_refusals.csv", "csv"),
    _File("study13_math_facts.csv", "csv", jitter=(None,)),
    _File("study14_vocabulary.csv", "csv"),
)

_FIXTURE_STUDIES: tuple[_Study, ...] = (
    _Study("F1", "percent of intervals on task in a fictional art room", "AB",
           _one("percent", "increase", (55.0, 65.0), (8.0, 10.0)), 3, 0.3, (0.0, 3.0, 4.0),
           (("f1_on_task.csv", None, (0, 1)), ("f1_more.tsv", None, (2, 3))),
           out_of_range=(100.8,), duplicate=True, short_case=True),
    _Study("F2", "spelling errors per minute in a fictional dictation game", "ABAB",
           _one("rate", "decrease"), 3, 0.5, (2.0, 3.0),
           (("f2_errors_semicolon.csv", None, None),), null_cases=1),
    _Study("F3", "questions asked per session in a fictional science circle",
           "multiple_baseline", _one("count", "increase"), 3, 0.0, (2.0, 3.0),
           (("f3_f4_workbook.xlsx", "Study F3", None),)),
    _Study("F4", "percent of steps prompted with and without a fictional checklist",
           "alternating", _one("percent", "decrease", (35.0, 45.0), (8.0, 10.0)), 3, 0.4,
           (3.0, 4.0), (("f3_f4_workbook.xlsx", "Study F4", None),), out_of_range=(-0.6,)),
)

_FIXTURE_FILES: tuple[_File, ...] = (
    _File("f1_on_task.csv", "csv", bom=True, jitter=(None,)),
    _File("f1_more.tsv", "tsv"),
    _File("f2_errors_semicolon.csv", "semicolon", condition=False, jitter=(None,)),
    _File("f3_f4_workbook.xlsx", "xlsx", jitter=("Study F3",)),
)


# ----------------------------------------------------------------------------- generation


def ar1_errors(rng: np.random.Generator, n: int, rho: float, sd: float) -> np.ndarray:
    """Stationary AR(1) errors: e_0 = sd*z_0, e_t = rho*e_{t-1} + sd*sqrt(1-rho^2)*z_t."""
    z = rng.standard_normal(n)
    e = np.empty(n)
    if n == 0:
        return e
    e[0] = sd * z[0]
    scale = sd * np.sqrt(1.0 - rho * rho)
    for t in range(1, n):
        e[t] = rho * e[t - 1] + scale * z[t]
    return e


def condition_of(label: str) -> str:
    """Condition for a phase label used here: labels starting with "A" are baseline."""
    return "baseline" if label.upper().startswith("A") else "treatment"


def _layouts(rng: np.random.Generator, study: _Study) -> list[list[str]]:
    """Phase label per session for each case of a study (the short case last)."""
    n = study.n_cases
    out: list[list[str]] = []
    if study.design == "AB":
        for _ in range(n):
            out.append(["A"] * int(rng.integers(3, 11)) + ["B"] * int(rng.integers(4, 13)))
    elif study.design == "ABAB":
        for _ in range(n):
            seq: list[str] = []
            for lab in study.labels:
                seq += [lab] * int(rng.integers(3, 8))
            out.append(seq)
    elif study.design == "multiple_baseline":
        first = int(rng.integers(3, 6))
        step = 2 if n >= 4 else int(rng.integers(2, 4))
        starts = [first + k * step for k in range(n)]
        total = starts[-1] + int(rng.integers(3, 6))
        for b in starts:
            out.append(["A"] * b + ["B"] * (total - b))
    elif study.design == "alternating":
        for _ in range(n):
            seq = ["A"] * int(rng.integers(4, 6))
            pairs = int(rng.integers(4, 7))
            for p in range(pairs):
                seq += ["B", "A"] if (p == 0 or rng.random() < 0.5) else ["A", "B"]
            out.append(seq)
    else:  # pragma: no cover - specs are fixed
        raise ValueError(f"unknown design {study.design!r}")
    if study.short_case:
        out.append(["A"] * 2 + ["B"] * 5)
    return out


def _transform(y: np.ndarray, scale: str) -> np.ndarray:
    """Map the latent series onto its outcome scale."""
    if scale == "percent":
        return np.round(np.clip(y, 0.0, 100.0), 1) + 0.0
    if scale == "count":
        return np.maximum(np.rint(y), 0.0) + 0.0
    return np.maximum(np.round(y, 2), 0.01)  # rate per minute, kept > 0


def _r3(x) -> float:
    """Round to 3 decimals without negative zero."""
    return round(float(x), 3) + 0.0


def _phase_runs(labels: list[str]) -> list[tuple[str, int, int]]:
    """(label, first index, length) for each run of equal consecutive labels."""
    runs: list[tuple[str, int, int]] = []
    for i, lab in enumerate(labels):
        if runs and runs[-1][0] == lab:
            runs[-1] = (lab, runs[-1][1], runs[-1][2] + 1)
        else:
            runs.append((lab, i, 1))
    return runs


def _simulate_study(rng: np.random.Generator, study: _Study):
    """Clean points and truth rows of one study."""
    layouts = _layouts(rng, study)
    # rho per case: study mean plus small case deviation; studies with mean 0 stay exactly 0
    points: list[dict] = []
    truth: list[dict] = []
    for ci, labels in enumerate(layouts):
        short = study.short_case and ci == len(layouts) - 1
        case = f"P{ci + 1}"
        tier = ci + 1 if study.design == "multiple_baseline" else None
        place = _placement(study, ci)
        null = (not short) and ci >= study.n_cases - study.null_cases
        n = len(labels)
        t = np.arange(n, dtype=float)
        cond = np.array([condition_of(lab) for lab in labels])
        treat = cond == "treatment"
        tp = np.zeros(n)
        for lab, start, length in _phase_runs(labels):
            tp[start:start + length] = start
        for s in study.series:
            (lvl_lo, lvl_hi), (sd_lo, sd_hi) = _SCALE_DEFAULTS[(s.scale, s.direction)]
            if s.level is not None:
                lvl_lo, lvl_hi = s.level
            if s.sd is not None:
                sd_lo, sd_hi = s.sd
            sign = 1.0 if s.direction == "increase" else -1.0
            sd = _r3(rng.uniform(sd_lo, sd_hi))
            level = _r3(rng.uniform(lvl_lo, lvl_hi))
            if study.rho_mean == 0.0:
                rho = 0.0
            else:
                rho = _r3(np.clip(study.rho_mean + rng.normal(0.0, 0.05), -0.5, 0.85))
            effect = 0.0 if null else float(rng.choice(np.asarray(study.effect_sd)))
            level_change = _r3(sign * effect * sd)
            slope = 0.0
            if effect > 0 and study.design != "alternating":
                slope = _r3(sign * study.slope_sd * sd)
            trend = _r3(sign * study.trend_sd * sd)
            mean = level + trend * t + (level_change + slope * (t - tp)) * treat
            y = _transform(mean + ar1_errors(rng, n, rho, sd), s.scale)
            for i in range(n):
                points.append({
                    "study": study.name, "case": case, "series": s.name, "tier": tier,
                    "session_clean": i + 1, "outcome_clean": float(y[i]), "phase": labels[i],
                    "condition": cond[i], "design": study.design, "outcome_scale": s.scale,
                    "desired_direction": s.direction, "file": place[0], "sheet": place[1],
                    "short": short,
                })
            note = INVENTED_NOTE + "; generating values before clipping, rounding and artefacts"
            if level_change == 0.0:
                note += "; no effect"
            if short:
                note += "; deliberately too short (baseline has 2 points): expect quarantine"
            truth.append({
                "study": study.name, "case": case, "series": s.name, "design": study.design,
                "rho": rho, "level_change": level_change, "slope_change": slope,
                "baseline_trend": trend, "sd": sd, "desired_direction": s.direction,
                "outcome_scale": s.scale, "note": note, "file": place[0], "sheet": place[1],
                "tier": tier, "level": level, "n_points": n,
                "n_baseline": int((~treat).sum()), "n_treatment": int(treat.sum()),
                "phases": "|".join(f"{lab}:{length}" for lab, _, length in _phase_runs(labels)),
                "expected_quarantine": short,
            })
    return points, truth


def _placement(study: _Study, case_index: int) -> tuple[str, str | None]:
    for path, sheet, cases in study.placement:
        if cases is None or case_index in cases:
            return path, sheet
    raise ValueError(f"case {case_index} of study {study.number} has no file")  # pragma: no cover


# ----------------------------------------------------------------------------- artefacts


def _inject_out_of_range(rng, study: _Study, pts: pd.DataFrame) -> None:
    """Set percent points at the bound to slightly-out-of-range written values (in place).

    Only usable cases are touched (not the deliberately short one), so the repair is exercised.
    """
    mine = pts.index[(pts["study"] == study.name) & ~pts["short"]]
    for value in study.out_of_range:
        bound = 100.0 if value > 100.0 else 0.0
        free = [i for i in mine if pts.at[i, "outcome"] == pts.at[i, "outcome_clean"]]
        at_bound = [i for i in free if pts.at[i, "outcome_clean"] == bound]
        if at_bound:
            i = at_bound[int(rng.integers(len(at_bound)))]
        else:  # no point reached the bound: put the most extreme point there (documented)
            vals = pts.loc[free, "outcome_clean"]
            i = int(vals.idxmax() if bound == 100.0 else vals.idxmin())
            pts.at[i, "outcome_clean"] = bound
        pts.at[i, "outcome"] = value


def _jitter(rng, pts: pd.DataFrame, rows: pd.Index) -> None:
    """Move most sessions of the given rows by 0.01-0.15 off their whole number (in place)."""
    for i in rows:
        if rng.random() < 0.85:
            mag = round(float(rng.uniform(0.01, 0.15)), 2)
            mag = min(max(mag, 0.01), 0.15)
            sign = 1.0 if rng.random() < 0.5 else -1.0
            pts.at[i, "session"] = round(pts.at[i, "session_clean"] + sign * mag, 2)


def _format_number(x: float, kind: str, decimal_comma: bool) -> str:
    if kind == "int":
        s = str(int(round(x)))
    elif kind == "session":
        s = str(int(x)) if float(x).is_integer() else f"{x:.2f}"
    elif kind == "count":
        s = f"{x:.1f}" if not float(x).is_integer() else str(int(x))
    elif kind == "percent":
        s = f"{x:.1f}"
    else:
        s = f"{x:.2f}"
    if s.startswith("-") and float(s.replace(",", ".")) == 0.0:
        s = s[1:]
    return s.replace(".", ",") if decimal_comma else s


def _columns(frame: pd.DataFrame, spec: _File) -> list[str]:
    cols = ["study", "case"]
    if (frame["series"] != "").any():
        cols.append("series")
    if frame["tier"].notna().any():
        cols.append("tier")
    cols += ["session", "phase"]
    if spec.condition:
        cols.append("condition")
    cols += ["outcome", "design", "outcome_scale", "desired_direction"]
    return cols


def _text_frame(frame: pd.DataFrame, cols: list[str], decimal_comma: bool) -> pd.DataFrame:
    out = pd.DataFrame(index=frame.index)
    for c in cols:
        if c == "session":
            out[c] = [_format_number(v, "session", decimal_comma) for v in frame[c]]
        elif c == "outcome":
            out[c] = [_format_number(v, sc, decimal_comma)
                      for v, sc in zip(frame[c], frame["outcome_scale"])]
        elif c == "tier":
            out[c] = [_format_number(v, "int", False) for v in frame[c]]
        else:
            out[c] = frame[c].astype(str)
    return out


def _excel_frame(frame: pd.DataFrame, cols: list[str]) -> pd.DataFrame:
    out = frame[cols].copy()
    if "tier" in cols:
        out["tier"] = out["tier"].astype("int64")
    return out


def _deterministic_xlsx(sheets: dict[str, pd.DataFrame]) -> bytes:
    """XLSX bytes with fixed document timestamps and zip entry dates."""
    buf = io.BytesIO()
    with pd.ExcelWriter(buf, engine="openpyxl") as writer:
        for name, df in sheets.items():
            df.to_excel(writer, sheet_name=name, index=False)
    src = zipfile.ZipFile(io.BytesIO(buf.getvalue()))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename == "docProps/core.xml":
                text = data.decode("utf-8")
                text = re.sub(r"(<dcterms:(created|modified)[^>]*>)[^<]*(</dcterms:\2>)",
                              lambda m: m.group(1) + _XLSX_TIMESTAMP + m.group(3), text)
                data = text.encode("utf-8")
            zi = zipfile.ZipInfo(info.filename, date_time=_ZIP_DATE)
            zi.compress_type = zipfile.ZIP_DEFLATED
            zi.external_attr = 0o600 << 16
            dst.writestr(zi, data)
    return out.getvalue()


def _file_level_artefacts(spec: _File, frames: dict[str | None, pd.DataFrame]) -> list[dict]:
    rows = []

    def add(kind, action, note, sheet=None):
        rows.append({"kind": kind, "file": spec.path, "sheet": sheet, "row_index": None,
                     "study": None, "case": None, "series": None, "column": None,
                     "written_value": np.nan, "expected_value": np.nan,
                     "expected_action": action, "note": note})

    if spec.fmt == "semicolon":
        add("semicolon_decimal_comma", "parse_semicolon_decimal_comma",
            "fields separated by ';', decimals written with ',' (e.g. 12,5)")
    if spec.fmt == "tsv":
        add("tab_separated", "parse_tab", "tab-separated values")
    if spec.fmt == "xlsx":
        add("xlsx_two_sheets", "read_every_sheet",
            f"XLSX workbook with {len(frames)} sheets: " + ", ".join(map(str, frames)))
    if spec.bom:
        add("utf8_bom", "strip_bom", "UTF-8 with byte-order mark")
    if not spec.condition:
        add("no_condition_column", "derive_condition_from_phase",
            "no condition column: A-type labels baseline, B labels treatment")
    return rows


def _build(folder: Path, studies, files, seed: int, title: str, overwrite: bool) -> DemoReview:
    folder = Path(folder)
    _prepare(folder, overwrite)
    data = folder / "data"
    rng = np.random.default_rng(seed)

    points: list[dict] = []
    truth_rows: list[dict] = []
    for study in studies:
        p, t = _simulate_study(rng, study)
        points += p
        truth_rows += t
    pts = pd.DataFrame(points)
    pts["session"] = pts["session_clean"].astype(float)
    pts["outcome"] = pts["outcome_clean"]
    pts["duplicate_of"] = -1

    for study in studies:
        if study.out_of_range:
            _inject_out_of_range(rng, study, pts)

    file_specs = {f.path: f for f in files}
    for spec in files:
        for sheet in spec.jitter:
            sel = (pts["file"] == spec.path) & (
                pts["sheet"].isna() if sheet is None else pts["sheet"] == sheet)
            _jitter(rng, pts, pts.index[sel])

    # exact duplicate: one mid-series point of the second case, repeated right after itself
    blocks = []
    dup_rows = []
    for study in studies:
        if not study.duplicate:
            continue
        cand = pts.index[(pts["study"] == study.name) & (pts["case"] == "P2")]
        dup_rows.append(int(cand[len(cand) // 2]))
    order = []
    for i in pts.index:
        order.append(i)
        if i in dup_rows:
            order.append(i)
    pts = pts.loc[order].reset_index().rename(columns={"index": "point"})
    pts["is_duplicate"] = pts["point"].duplicated()

    artefacts: list[dict] = []
    written: list[Path] = []
    for spec in files:
        in_file = pts[pts["file"] == spec.path]
        sheets = [None] if spec.fmt != "xlsx" else list(dict.fromkeys(in_file["sheet"]))
        frames: dict[str | None, pd.DataFrame] = {}
        for sheet in sheets:
            f = in_file if sheet is None else in_file[in_file["sheet"] == sheet]
            frames[sheet] = f.reset_index(drop=True)
        path = data / spec.path
        path.parent.mkdir(parents=True, exist_ok=True)
        if spec.fmt == "xlsx":
            path.write_bytes(_deterministic_xlsx(
                {s: _excel_frame(f, _columns(f, spec)) for s, f in frames.items()}))
        else:
            f = frames[None]
            dec = spec.fmt == "semicolon"
            sep = {"csv": ",", "tsv": "\t", "semicolon": ";"}[spec.fmt]
            text = _text_frame(f, _columns(f, spec), dec).to_csv(
                sep=sep, index=False, lineterminator="\n")
            path.write_bytes(("\ufeff" if spec.bom else "").encode("utf-8") + text.encode("utf-8"))
        written.append(path)
        artefacts += _file_level_artefacts(spec, frames)
        for sheet, f in frames.items():
            artefacts += _row_artefacts(spec, sheet, f)

    truth = pd.DataFrame(truth_rows, columns=TRUTH_COLUMNS)
    truth["tier"] = truth["tier"].astype("Int64")
    for row in truth.itertuples():
        if row.expected_quarantine:
            artefacts.append({
                "kind": "short_phase", "file": row.file, "sheet": row.sheet, "row_index": None,
                "study": row.study, "case": row.case, "series": row.series, "column": "phase",
                "written_value": np.nan, "expected_value": np.nan,
                "expected_action": "quarantine_case",
                "note": "baseline phase has 2 points (fewer than 3)"})
    art = pd.DataFrame(artefacts, columns=ARTEFACT_COLUMNS)
    art["row_index"] = art["row_index"].astype("Int64")

    truth_file = folder / "truth.csv"
    art_file = folder / "artefacts.csv"
    truth_file.write_bytes(truth.to_csv(index=False, lineterminator="\n").encode("utf-8"))
    art_file.write_bytes(art.to_csv(index=False, lineterminator="\n").encode("utf-8"))
    readme = folder / "README.txt"
    readme.write_bytes(_readme(title, seed, studies, files, truth, art).encode("utf-8"))
    return DemoReview(folder=folder, data_folder=data, files=tuple(written), truth=truth,
                      expected_artefacts=art, seed=seed, readme=readme, truth_file=truth_file,
                      artefacts_file=art_file)


def _row_artefacts(spec: _File, sheet: str | None, f: pd.DataFrame) -> list[dict]:
    rows = []
    for r in f.itertuples():
        base = {"file": spec.path, "sheet": sheet, "row_index": int(r.Index), "study": r.study,
                "case": r.case, "series": r.series}
        if r.session != r.session_clean:
            rows.append({**base, "kind": "session_jitter", "column": "session",
                         "written_value": float(r.session),
                         "expected_value": float(r.session_clean),
                         "expected_action": "snap_session",
                         "note": "digitized session off its whole number"})
        if r.outcome != r.outcome_clean and not r.is_duplicate:
            rows.append({**base, "kind": "percent_out_of_range", "column": "outcome",
                         "written_value": float(r.outcome),
                         "expected_value": float(r.outcome_clean),
                         "expected_action": "clip_percent",
                         "note": "percent digitized just outside 0-100"})
        if r.is_duplicate:
            rows.append({**base, "kind": "exact_duplicate", "column": None,
                         "written_value": np.nan, "expected_value": np.nan,
                         "expected_action": "collapse_duplicate",
                         "note": f"same row as data row {int(r.Index) - 1}"})
    return rows


def _is_previous_output(folder: Path) -> bool:
    """True when the folder holds only an earlier output of this module."""
    names = {p.name for p in folder.iterdir()}
    readme = folder / "README.txt"
    if not names <= {"data", *_SIDECARS} or not readme.is_file():
        return False
    first = readme.read_text(encoding="utf-8", errors="replace").split("\n", 1)[0]
    return first.startswith("sced-audit ") and first.endswith("(invented data)")


def _prepare(folder: Path, overwrite: bool) -> None:
    """Create the folder; replace an earlier demo output; refuse other non-empty folders."""
    if folder.exists() and any(folder.iterdir()):
        if not (overwrite or _is_previous_output(folder)):
            raise FileExistsError(
                f"{folder} is not empty and does not hold an earlier demo review; choose an "
                "empty folder or pass overwrite=True (which replaces only data/ and the files "
                "README.txt, truth.csv, artefacts.csv)")
        if (folder / "data").is_dir():
            shutil.rmtree(folder / "data")
        for name in _SIDECARS:
            (folder / name).unlink(missing_ok=True)
    (folder / "data").mkdir(parents=True, exist_ok=True)


def _readme(title, seed, studies, files, truth, art) -> str:
    kinds = art["kind"].value_counts(sort=False)
    lines = [
        title,
        "=" * len(title),
        "",
        "EVERYTHING IN THIS FOLDER IS INVENTED. The studies, participants and values are",
        "fictional and were generated by audit/demo.py; they describe no real people or",
        "research. Use them to try the pipeline, never as evidence about any intervention.",
        "",
        f"Seed: {seed}. Studies: {len(studies)}. Cases: "
        f"{truth[['study', 'case']].drop_duplicates().shape[0]} "
        f"({int(truth['expected_quarantine'].sum())} deliberately too short). "
        f"Series rows in truth.csv: {len(truth)}.",
        "",
        "Layout",
        "  data/          input files (point the pipeline at this folder; it has a subfolder)",
        "  truth.csv      generating parameters per study/case/series",
        "  artefacts.csv  every deliberate digitizing artefact and the expected repair",
        "",
        "Model: y_t = level + baseline_trend*t + level_change*D_t + slope_change*(t - t_p)*D_t",
        "+ e_t, t = session - 1, e_t stationary AR(1) with lag-1 correlation rho and marginal sd;",
        "then percent clipped to [0, 100], counts rounded to integers >= 0, rates kept > 0.",
        "Alternating designs: baseline phase 'A' first, then 'A' (baseline) and 'B' (treatment)",
        "sessions interleaved; the points-per-phase rule applies per condition.",
        "",
        "Files",
    ]
    for spec in files:
        extra = []
        if spec.bom:
            extra.append("UTF-8 with BOM")
        if not spec.condition:
            extra.append("no condition column")
        if spec.jitter:
            extra.append("jittered sessions")
        desc = {"csv": "CSV", "tsv": "TSV", "semicolon": "CSV with ';' and decimal commas",
                "xlsx": "XLSX, one study per sheet"}[spec.fmt]
        lines.append(f"  data/{spec.path}: {desc}" + (f" ({', '.join(extra)})" if extra else ""))
    lines += ["", "Artefacts (count)"]
    for kind, count in kinds.items():
        lines.append(f"  {kind}: {count}")
    lines += [
        "",
        "Regenerate: python -m audit.demo OUT [--seed N]",
        "Test fixture: python -m audit.demo --fixture fixtures/demo_small",
        "",
    ]
    return "\n".join(lines)


# ----------------------------------------------------------------------------- public API


def write_demo_review(folder: Path, seed: int = DEFAULT_SEED, *,
                      overwrite: bool = False) -> DemoReview:
    """Write the invented demo review (14 studies, 50 cases) into ``folder``; see module doc."""
    return _build(Path(folder), _DEMO_STUDIES, _DEMO_FILES, seed,
                  "sced-audit demo review (invented data)", overwrite)


def write_fixture_review(folder: Path, *, overwrite: bool = False) -> DemoReview:
    """Write the small fixed test review (4 studies, 13 cases, same artefact kinds)."""
    return _build(Path(folder), _FIXTURE_STUDIES, _FIXTURE_FILES, FIXTURE_SEED,
                  "sced-audit small fixture review (invented data)", overwrite)


def main(argv: list[str] | None = None) -> int:
    """Command line: write the demo review (or with --fixture the small fixture) to OUT."""
    parser = argparse.ArgumentParser(prog="python -m audit.demo", description=main.__doc__)
    parser.add_argument("out", type=Path)
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    parser.add_argument("--fixture", action="store_true",
                        help="write the small fixed fixture (fixtures/demo_small)")
    parser.add_argument("--overwrite", action="store_true")
    args = parser.parse_args(argv)
    if args.fixture:
        review = write_fixture_review(args.out, overwrite=args.overwrite)
    else:
        review = write_demo_review(args.out, args.seed, overwrite=args.overwrite)
    print(f"wrote {len(review.files)} data files, {len(review.truth)} truth rows, "
          f"{len(review.expected_artefacts)} artefacts to {review.folder}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
