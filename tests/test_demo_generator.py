"""Tests of the invented demo review generator (audit/demo.py).

These check the generator only: file formats, artefacts, bookkeeping against truth.csv, and
that its errors are stationary AR(1). No statistical claim is made from the invented data.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest
from statsmodels.tsa.stattools import acf

from audit import demo

BOM = b"\xef\xbb\xbf"
KEY = ["study", "case", "series"]
FIXTURE_DIR = Path(__file__).resolve().parents[1] / "fixtures" / "demo_small"


# ----------------------------------------------------------------------------- helpers


def read_inputs(data_folder: Path) -> pd.DataFrame:
    """Read every input file independently of audit/ (plain pandas), one row per data row."""
    frames = []
    for path in sorted(p for p in data_folder.rglob("*") if p.is_file()):
        rel = path.relative_to(data_folder).as_posix()
        if path.suffix == ".xlsx":
            sheets = pd.read_excel(path, sheet_name=None)
        elif path.suffix == ".tsv":
            sheets = {None: pd.read_csv(path, sep="\t", encoding="utf-8-sig")}
        else:
            header = path.read_bytes().decode("utf-8-sig").splitlines()[0]
            if ";" in header:
                sheets = {None: pd.read_csv(path, sep=";", decimal=",", encoding="utf-8-sig")}
            else:
                sheets = {None: pd.read_csv(path, encoding="utf-8-sig")}
        for sheet, df in sheets.items():
            df = df.copy()
            df["file"] = rel
            df["sheet"] = sheet
            df["row_index"] = np.arange(len(df))
            df["has_condition"] = "condition" in df.columns
            frames.append(df)
    out = pd.concat(frames, ignore_index=True)
    out["series"] = out["series"].fillna("").astype(str) if "series" in out else ""
    derived = np.where(out["phase"].astype(str).str.upper().str.startswith("A"),
                       "baseline", "treatment")
    if "condition" in out:
        out["condition"] = out["condition"].fillna(pd.Series(derived, index=out.index))
    else:
        out["condition"] = derived
    return out


def clean(points: pd.DataFrame) -> pd.DataFrame:
    """Snap sessions, drop exact duplicates: the repairs the artefacts call for."""
    out = points.drop_duplicates(subset=KEY + ["session", "outcome", "phase"]).copy()
    out["session"] = np.round(out["session"]).astype(int)
    return out.sort_values(KEY + ["session"])


def runs(labels) -> str:
    parts: list[list] = []
    for lab in labels:
        if parts and parts[-1][0] == lab:
            parts[-1][1] += 1
        else:
            parts.append([lab, 1])
    return "|".join(f"{a}:{b}" for a, b in parts)


@pytest.fixture(scope="module")
def review(tmp_path_factory) -> demo.DemoReview:
    return demo.write_demo_review(tmp_path_factory.mktemp("demo") / "review")


@pytest.fixture(scope="module")
def points(review) -> pd.DataFrame:
    return read_inputs(review.data_folder)


@pytest.fixture(scope="module")
def fixture_review(tmp_path_factory) -> demo.DemoReview:
    return demo.write_fixture_review(tmp_path_factory.mktemp("fx") / "small")


def all_bytes(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


# ----------------------------------------------------------------------------- determinism


def test_same_seed_gives_same_bytes(tmp_path):
    a = demo.write_demo_review(tmp_path / "a", seed=123)
    b = demo.write_demo_review(tmp_path / "b", seed=123)
    assert all_bytes(a.folder) == all_bytes(b.folder)
    c = demo.write_demo_review(tmp_path / "c", seed=124)
    assert all_bytes(a.folder) != all_bytes(c.folder)


def test_fixture_is_fixed(tmp_path):
    a = demo.write_fixture_review(tmp_path / "a")
    b = demo.write_fixture_review(tmp_path / "b")
    assert all_bytes(a.folder) == all_bytes(b.folder)


def test_fast(tmp_path):
    demo.write_demo_review(tmp_path / "warm")
    start = time.perf_counter()
    demo.write_demo_review(tmp_path / "timed")
    assert time.perf_counter() - start < 1.0


def test_rewrites_own_output_but_refuses_other_non_empty_folder(tmp_path):
    demo.write_fixture_review(tmp_path / "x")
    (tmp_path / "x" / "data" / "stale.csv").write_text("study\n")
    again = demo.write_fixture_review(tmp_path / "x")  # an earlier output is replaced
    assert all_bytes(again.folder) == all_bytes(demo.write_fixture_review(tmp_path / "y").folder)
    (tmp_path / "z").mkdir()
    (tmp_path / "z" / "mine.txt").write_text("not the demo")
    with pytest.raises(FileExistsError):
        demo.write_fixture_review(tmp_path / "z")
    assert (tmp_path / "z" / "mine.txt").read_text() == "not the demo"
    demo.write_fixture_review(tmp_path / "z", overwrite=True)
    assert (tmp_path / "z" / "mine.txt").is_file()  # overwrite touches only its own names


def test_main_writes_fixture(tmp_path, capsys):
    assert demo.main(["--fixture", str(tmp_path / "m")]) == 0
    assert (tmp_path / "m" / "truth.csv").is_file()


# ----------------------------------------------------------------------------- contents


def test_invented_everywhere(review):
    text = review.readme.read_text(encoding="utf-8")
    assert "INVENTED" in text and "no real" in text
    assert review.truth["note"].str.contains("invented").all()
    assert review.truth["study"].str.contains(r"\(invented\)").all()


def test_layout_and_files(review):
    assert review.readme.name == "README.txt" and review.readme.parent == review.folder
    assert review.truth_file == review.folder / "truth.csv"
    assert review.artefacts_file == review.folder / "artefacts.csv"
    on_disk = sorted(p for p in review.data_folder.rglob("*") if p.is_file())
    assert sorted(review.files) == on_disk
    suffixes = [p.suffix for p in review.files]
    assert suffixes.count(".xlsx") == 1 and suffixes.count(".tsv") == 1
    assert any(p.parent != review.data_folder for p in review.files)  # a subfolder
    assert sum(p.read_bytes().startswith(BOM) for p in review.files) == 1
    book = openpyxl.load_workbook(next(p for p in review.files if p.suffix == ".xlsx"))
    assert len(book.sheetnames) == 2
    for p in review.files:
        if p.suffix != ".xlsx":
            p.read_bytes().decode("utf-8")  # UTF-8 throughout


def test_counts_designs_scales_directions(review, points):
    truth = review.truth
    cases = truth[["study", "case"]].drop_duplicates()
    assert truth["study"].nunique() >= 12
    assert len(cases) >= 48
    assert (~truth.drop_duplicates(["study", "case"])["expected_quarantine"]).sum() >= 48
    assert set(truth["design"]) == {"AB", "ABAB", "multiple_baseline", "alternating"}
    assert set(truth["outcome_scale"]) == {"percent", "count", "rate"}
    combos = set(zip(truth["outcome_scale"], truth["desired_direction"]))
    assert combos == {(s, d) for s in ("percent", "count", "rate")
                      for d in ("increase", "decrease")}
    assert (truth["level_change"] == 0).sum() >= 3  # some cases with no effect
    assert (truth["level_change"] != 0).sum() >= 30
    assert (truth["series"] != "").any()  # one study with several series per case
    # rho: review-wide mean about 0.3, some studies at 0, some around 0.5
    by_study = truth.groupby("study")["rho"].mean()
    assert 0.2 < truth["rho"].mean() < 0.4
    assert (by_study == 0.0).sum() >= 2 and (by_study >= 0.45).sum() >= 2
    assert truth["rho"].between(-0.5, 0.85).all()
    # every ABAB file uses A/B/A2/B2 or A/B/A/B; both kinds occur
    abab = truth[truth["design"] == "ABAB"]["phases"].str.replace(r":\d+", "", regex=True)
    assert set(abab) == {"A|B|A2|B2", "A|B|A|B"}


def test_multiple_baseline_tiers_are_staggered(review):
    mb = review.truth[review.truth["design"] == "multiple_baseline"]
    for _, study in mb.groupby("study"):
        assert 3 <= len(study) <= 4
        assert list(study["tier"]) == list(range(1, len(study) + 1))
        assert study["n_baseline"].is_monotonic_increasing and study["n_baseline"].is_unique
        assert study["n_points"].nunique() == 1


def test_phase_lengths_and_labels(points):
    pts = clean(points)
    assert set(pts["phase"]) <= {"A", "B", "A2", "B2"}  # no ambiguous labels
    derived = np.where(pts["phase"].str.startswith("A"), "baseline", "treatment")
    assert (pts["condition"] == derived).all()
    short = []
    for key, case in pts.groupby(KEY):
        if case["design"].iloc[0] == "alternating":
            counts = case["condition"].value_counts()
            assert counts.min() >= 3, key
            assert case["phase"].iloc[:4].eq("A").all()  # initial baseline phase
            continue
        lengths = [int(x.split(":")[1]) for x in runs(case["phase"]).split("|")]
        if min(lengths) < 3:
            short.append((key, lengths))
        else:
            assert max(lengths) <= 12, (key, lengths)
    assert len(short) == 1 and short[0][1][0] == 2  # exactly one case too short to use


def test_scales_respected(points):
    pct = points[points["outcome_scale"] == "percent"]["outcome"]
    outside = pct[(pct < 0) | (pct > 100)]
    assert 1 <= len(outside) <= 5  # a few deliberate ones
    assert ((outside > 100) & (outside <= 101)).any() and ((outside < 0) & (outside >= -1)).any()
    cnt = points[points["outcome_scale"] == "count"]["outcome"]
    assert (cnt >= 0).all() and (cnt == np.round(cnt)).all()
    rate = points[points["outcome_scale"] == "rate"]["outcome"]
    assert (rate > 0).all()


def test_digitizing_artefacts_present(review, points):
    # sessions jittered within +-0.15 of whole numbers, in most rows of several files
    off = (points["session"] - np.round(points["session"])).abs()
    assert off.max() <= 0.15 + 1e-9
    share = (off > 1e-9).groupby([points["file"], points["sheet"].fillna("")]).mean()
    assert (share > 0.5).sum() >= 3
    # one exact duplicate row
    dup = points.duplicated(subset=KEY + ["session", "outcome", "phase"], keep="first")
    assert dup.sum() == 1
    # one semicolon file with decimal commas, parsed with sep=';', decimal=','
    semi = [p for p in review.files if p.suffix == ".csv"
            and ";" in p.read_text(encoding="utf-8-sig").splitlines()[0]]
    assert len(semi) == 1
    raw = semi[0].read_text(encoding="utf-8")
    assert any(cell.count(",") == 1 and cell.replace(",", "").isdigit()
               for line in raw.splitlines()[1:] for cell in line.split(";"))
    parsed = pd.read_csv(semi[0], sep=";", decimal=",")
    assert pd.api.types.is_float_dtype(parsed["outcome"])
    assert pd.api.types.is_float_dtype(parsed["session"])
    # exactly one file without a condition column
    per_file = points.groupby("file")["has_condition"].first()
    assert (~per_file).sum() == 1


def test_expected_artefacts_match_files(review, points):
    art = review.expected_artefacts
    kinds = set(art["kind"])
    assert kinds == {"session_jitter", "percent_out_of_range", "exact_duplicate", "short_phase",
                     "semicolon_decimal_comma", "xlsx_two_sheets", "tab_separated", "utf8_bom",
                     "no_condition_column"}
    on_disk = pd.read_csv(review.artefacts_file)
    assert len(on_disk) == len(art)
    assert (on_disk["kind"].tolist() == art["kind"].tolist())
    idx = points.set_index(["file", points["sheet"].fillna(""), "row_index"])
    for row in art[art["row_index"].notna()].itertuples():
        got = idx.loc[(row.file, row.sheet if isinstance(row.sheet, str) else "",
                       int(row.row_index))]
        assert got["case"] == row.case and got["study"] == row.study
        if row.kind == "session_jitter":
            assert got["session"] == pytest.approx(row.written_value)
            assert 0.01 - 1e-9 <= abs(row.written_value - row.expected_value) <= 0.15 + 1e-9
        elif row.kind == "percent_out_of_range":
            assert got["outcome"] == pytest.approx(row.written_value)
            assert row.expected_value in (0.0, 100.0)
        elif row.kind == "exact_duplicate":
            prev = idx.loc[(row.file, row.sheet if isinstance(row.sheet, str) else "",
                            int(row.row_index) - 1)]
            assert prev[["session", "outcome", "phase"]].tolist() == \
                got[["session", "outcome", "phase"]].tolist()
    # every jittered session in the files is listed, and nothing else
    off = (points["session"] - np.round(points["session"])).abs() > 1e-9
    assert off.sum() == (art["kind"] == "session_jitter").sum()
    short = art[art["kind"] == "short_phase"]
    assert len(short) == 1
    flagged = review.truth[review.truth["expected_quarantine"]]
    assert flagged[["study", "case"]].values.tolist() == short[["study", "case"]].values.tolist()


def test_truth_matches_files(review, points):
    on_disk = pd.read_csv(review.truth_file, keep_default_na=False)
    assert list(on_disk.columns[:12]) == ["study", "case", "series", "design", "rho",
                                          "level_change", "slope_change", "baseline_trend",
                                          "sd", "desired_direction", "outcome_scale", "note"]
    assert on_disk["rho"].astype(float).tolist() == review.truth["rho"].tolist()
    truth = review.truth.set_index(KEY)
    pts = clean(points)
    groups = pts.groupby(KEY)
    assert set(groups.groups) == set(truth.index)
    for key, case in groups:
        t = truth.loc[key]
        assert len(case) == t["n_points"], key
        assert (case["condition"] == "baseline").sum() == t["n_baseline"], key
        assert runs(case["phase"]) == t["phases"], key
        assert case["session"].tolist() == list(range(1, len(case) + 1)), key
        for col in ("design", "outcome_scale", "desired_direction", "file"):
            assert case[col].nunique() == 1 and case[col].iloc[0] == t[col], (key, col)
        if t["design"] == "multiple_baseline":
            assert case["tier"].iloc[0] == t["tier"]


# ----------------------------------------------------------------------------- AR(1) errors


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.5, -0.3])
def test_ar1_errors_lag1_autocorrelation(rho):
    e = demo.ar1_errors(np.random.default_rng(11), 40_000, rho, 2.0)
    # source: statsmodels.tsa.stattools.acf; sample r1 of AR(1) has sd ~ sqrt((1-rho^2)/n)=0.005
    assert acf(e, nlags=1, fft=True)[1] == pytest.approx(rho, abs=0.03)
    # source: stationary AR(1) marginal variance = sd^2 (textbook); Monte Carlo tolerance
    assert e.var() == pytest.approx(4.0, rel=0.06)


def test_ar1_errors_stationary_from_first_point():
    rng = np.random.default_rng(5)
    draws = np.array([demo.ar1_errors(rng, 3, 0.5, 1.0) for _ in range(20_000)])
    # source: stationary AR(1): Var(e_t) = sd^2 for every t, Corr(e_0, e_1) = rho (textbook)
    assert draws.var(axis=0) == pytest.approx([1.0, 1.0, 1.0], abs=0.05)
    assert np.corrcoef(draws[:, 0], draws[:, 1])[0, 1] == pytest.approx(0.5, abs=0.03)


# ----------------------------------------------------------------------------- fixture


def test_fixture_small_with_same_artefact_kinds(fixture_review, review):
    truth = fixture_review.truth
    assert truth["study"].nunique() == 4
    assert 10 <= len(truth[["study", "case"]].drop_duplicates()) <= 14
    assert set(truth["design"]) == {"AB", "ABAB", "multiple_baseline", "alternating"}
    assert set(fixture_review.expected_artefacts["kind"]) == \
        set(review.expected_artefacts["kind"])
    pts = read_inputs(fixture_review.data_folder)
    assert set(clean(pts).groupby(KEY).groups) == set(truth.set_index(KEY).index)
    assert pts.duplicated(subset=KEY + ["session", "outcome", "phase"]).sum() == 1


@pytest.mark.skipif(not FIXTURE_DIR.is_dir(), reason="fixtures/demo_small not written yet")
def test_committed_fixture_matches_generator(fixture_review):
    fresh = all_bytes(fixture_review.folder)
    committed = all_bytes(FIXTURE_DIR)
    assert set(fresh) == set(committed)
    for name, data in fresh.items():
        if name.endswith(".xlsx"):  # bytes depend on the openpyxl version; compare content
            a = pd.read_excel(fixture_review.folder / name, sheet_name=None)
            b = pd.read_excel(FIXTURE_DIR / name, sheet_name=None)
            assert a.keys() == b.keys()
            for sheet in a:
                pd.testing.assert_frame_equal(a[sheet], b[sheet])
        else:
            assert data == committed[name], f"{name}: run python -m audit.demo --fixture " \
                                            "fixtures/demo_small --overwrite"
