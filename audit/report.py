"""Self-contained HTML report of one committed run: summary, figures, tables, methods, cautions.

One file: figures are embedded PNG (data: URIs), the style sheet is inline, there is no
JavaScript and nothing is fetched. Every text that comes from the data (study and case ids,
messages, file names, parameters) passes through ``html.escape``.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import math
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

from audit import figures as F
from audit.summary import (DEMONSTRATIONS_NEEDED, SUMMARY_TABLES, DesignGroups, _read_optional, _series_label,
                           case_designs,
                           summarize)

__all__ = ["write_report", "build_report_html", "cmd_report", "REFERENCES", "CAUTION_TEXT"]

CAUTION_TEXT = (
    "These diagnostics support, and never replace, visual analysis and professional judgment. "
    "Follow your review protocol and local professional standards. Short series give imprecise "
    "estimates of serial dependence: a non-significant test is not evidence of independence."
)

REFERENCES = [
    "Andrews, D. W. K. (1993). Exactly median-unbiased estimation of first order autoregressive/unit root "
    "models. Econometrica, 61(1), 139-165.",
    "Bayley, G. V., & Hammersley, J. M. (1946). The \"effective\" number of independent observations in an "
    "autocorrelated time series. Supplement to the Journal of the Royal Statistical Society, 8(2), 184-197.",
    "Busk, P. L., & Serlin, R. C. (1992). Meta-analysis for single-case research. In T. R. Kratochwill & "
    "J. R. Levin (Eds.), Single-case research design and analysis. Erlbaum.",
    "Cheang, W.-K., & Reinsel, G. C. (2000). Bias reduction of autoregressive estimates in time series "
    "regression model through restricted maximum likelihood. Journal of the American Statistical "
    "Association, 95, 1173-1184.",
    "DerSimonian, R., & Laird, N. (1986). Meta-analysis in clinical trials. Controlled Clinical Trials, 7, "
    "177-188.",
    "Durbin, J., & Watson, G. S. (1950, 1951, 1971). Testing for serial correlation in least squares "
    "regression I, II, III. Biometrika, 37, 409-428; 38, 159-178; 58, 1-19.",
    "Higgins, J. P. T., & Thompson, S. G. (2002). Quantifying heterogeneity in a meta-analysis. Statistics "
    "in Medicine, 21, 1539-1558.",
    "Higgins, J. P. T., Thompson, S. G., & Spiegelhalter, D. J. (2009). A re-evaluation of random-effects "
    "meta-analysis. Journal of the Royal Statistical Society A, 172, 137-159.",
    "Huitema, B. E., & McKean, J. W. (1991). Autocorrelation estimation and inference with small samples. "
    "Psychological Bulletin, 110, 291-304.",
    "Huitema, B. E., & McKean, J. W. (2000). Design specification issues in time-series intervention models. "
    "Educational and Psychological Measurement, 60, 38-58.",
    "Imhof, J. P. (1961). Computing the distribution of quadratic forms in normal variables. Biometrika, 48, "
    "419-426.",
    "Koopmans, T. (1942). Serial correlation and quadratic forms in normal variables. Annals of Mathematical "
    "Statistics, 13, 14-33.",
    "Kratochwill, T. R., Hitchcock, J. H., Horner, R. H., Levin, J. R., Odom, S. L., Rindskopf, D. M., & "
    "Shadish, W. R. (2013). Single-case intervention research design standards. Remedial and Special "
    "Education, 34, 26-38.",
    "Magnus, J. R. (1986). The exact moments of a ratio of quadratic forms in normal variables. Annales "
    "d'Economie et de Statistique, 4, 95-109.",
    "Morris, C. N. (1983). Parametric empirical Bayes inference: theory and applications. Journal of the "
    "American Statistical Association, 78, 47-55.",
    "Newey, W. K., & West, K. D. (1987). A simple, positive semi-definite, heteroskedasticity and "
    "autocorrelation consistent covariance matrix. Econometrica, 55, 703-708.",
    "Parker, R. I., & Vannest, K. J. (2009). An improved effect size for single-case research: "
    "nonoverlap of all pairs. Behavior Therapy, 40, 357-367.",
    "Parker, R. I., Vannest, K. J., Davis, J. L., & Sauber, S. B. (2011). Combining nonoverlap and trend "
    "for single-case research: Tau-U. Behavior Therapy, 42, 284-299.",
    "Prais, S. J., & Winsten, C. B. (1954). Trend estimators and serial correlation. Cowles Commission "
    "Discussion Paper 383.",
    "Pustejovsky, J. E. (2018). Using response ratios for meta-analyzing single-case designs with "
    "behavioral outcomes. Journal of School Psychology, 68, 99-112.",
    "Sawa, T. (1978). The exact moments of the least squares estimator for the autoregressive model. "
    "Journal of Econometrics, 8, 159-172.",
    "Wilson, E. B. (1927). Probable inference, the law of succession, and statistical inference. Journal "
    "of the American Statistical Association, 22, 209-212.",
]

# Large reviews: the report stays readable and quick to open; every row stays in the results store.
MAX_CASE_GRAPHS = 300  # case graphs drawn (flagged cases first when the review has more)
MAX_FOREST_STUDIES = 50  # studies in the forest plot (those with most cases when there are more)
MAX_TABLE_ROWS = 500  # rows of the long tables (screening, flips, per-study effects)
# case flip columns shown in the report, with their names in words
FLIP_COLUMNS = (("flip_gls_reml", "GLS own AR(1)"), ("flip_hac", "HAC"), ("flip_tau", "Tau adjusted"))

DW_ZONE_WORDS = {
    "positive": "positive serial dependence",
    "inconclusive_positive": "inconclusive (positive side)",
    "none": "no serial dependence indicated",
    "inconclusive_negative": "inconclusive (negative side)",
    "negative": "negative serial dependence",
    "unknown": "not computable",
}

CSS = """
:root { --ink:#1d1d1f; --muted:#5a5a5a; --rule:#d9d9d9; --band:#f5f5f2; --accent:#0072B2; --warn:#D55E00; }
* { box-sizing: border-box; }
body { margin:0; color:var(--ink); background:#fff; font:15px/1.5 system-ui, -apple-system, "Segoe UI",
       Roboto, "Noto Sans", "DejaVu Sans", sans-serif; }
main { max-width: 1180px; margin: 0 auto; padding: 24px 28px 60px; }
h1 { font-size: 1.7rem; margin: 0.2em 0 0.1em; }
h2 { font-size: 1.25rem; margin: 2.2em 0 0.5em; padding-bottom: 0.2em; border-bottom: 2px solid var(--ink); }
h3 { font-size: 1.05rem; margin: 1.6em 0 0.4em; }
p, li { max-width: 75ch; }
.sub { color: var(--muted); margin-top: 0; }
.answer { background: var(--band); border-left: 6px solid var(--accent); padding: 14px 18px; margin: 18px 0;
          font-size: 1.05rem; }
.caution { border: 2px solid var(--warn); padding: 10px 16px; margin: 18px 0; }
.caution strong { color: var(--warn); }
.kpis { display: flex; flex-wrap: wrap; gap: 12px; margin: 12px 0; padding: 0; list-style: none; }
.kpis li { border: 1px solid var(--rule); padding: 8px 14px; min-width: 150px; }
.kpis b { display: block; font-size: 1.35rem; }
figure { margin: 16px 0 22px; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: 0.9rem; max-width: 90ch; }
table { border-collapse: collapse; margin: 8px 0 18px; font-size: 0.84rem; width: 100%; }
th, td { border-bottom: 1px solid var(--rule); padding: 4px 8px; text-align: left; vertical-align: top; }
th { background: #ececec; font-weight: 600; }
tbody tr:nth-child(even) { background: #fafafa; }
.scroll { overflow-x: auto; }
td.wide { min-width: 18ch; }
th.num { white-space: normal; }
table.notes tbody tr { background: #fff; }
tr.note td { color: var(--muted); font-size: 0.82rem; padding-top: 0; border-bottom: 1px solid #bdbdbd; }
tr.note + tr td, tbody tr:first-child td { padding-top: 6px; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.flag { color: var(--warn); font-weight: 600; }
nav ol { columns: 2; font-size: 0.95rem; }
.small { font-size: 0.85rem; color: var(--muted); }
details summary { cursor: pointer; font-weight: 600; }
.panels { display: flex; flex-wrap: wrap; gap: 10px; }
.panels svg { border: 1px solid var(--rule); }
footer { margin-top: 3em; color: var(--muted); font-size: 0.85rem; }
"""


def _e(x) -> str:
    """HTML-escaped text of any value (None and NaN as an empty cell)."""
    if x is None:
        return ""
    if isinstance(x, float) and math.isnan(x):
        return ""
    try:
        if pd.isna(x):
            return ""
    except (TypeError, ValueError):
        pass
    return html.escape(str(x), quote=True)


def _f(x, digits: int = 2) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return _e(x)
    return "" if not np.isfinite(x) else f"{x:.{digits}f}"


def _p(x) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return ""
    if not np.isfinite(x):
        return ""
    return "<0.001" if x < 0.001 else f"{x:.3f}"


def _pct(x) -> str:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return ""
    return "" if not np.isfinite(x) else f"{100 * x:.0f}%"


def _table(df: pd.DataFrame, spec: list[tuple[str, str, str]], empty: str = "None.", limit: int | None = None,
           notes: str | None = None) -> str:
    """HTML table from df; spec = [(column, header, kind)], kind in text|wide|num|int|p|pct|f3.

    notes: a text column shown as a full-width row under each row (long plain-words notes).
    """
    if df is None or len(df) == 0:
        return f"<p class='small'>{_e(empty)}</p>"
    spec = [s for s in spec if s[0] in df.columns]
    shown = df if limit is None else df.head(limit)
    head = "".join(f"<th class='{'' if k in ('text', 'wide') else 'num'}' scope='col'>{_e(h)}</th>" for _, h, k in spec)
    body = []
    for _, row in shown.iterrows():
        cells = []
        for col, _, kind in spec:
            v = row[col]
            if kind == "num":
                cells.append(f"<td class='num'>{_f(v)}</td>")
            elif kind == "f3":
                cells.append(f"<td class='num'>{_f(v, 3)}</td>")
            elif kind == "int":
                cells.append(f"<td class='num'>{'' if pd.isna(v) else int(v)}</td>")
            elif kind == "p":
                cells.append(f"<td class='num'>{_p(v)}</td>")
            elif kind == "pct":
                cells.append(f"<td class='num'>{_pct(v)}</td>")
            elif kind == "wide":
                cells.append(f"<td class='wide'>{_e(v)}</td>")
            else:
                cells.append(f"<td>{_e(v)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
        if notes is not None and notes in df.columns and _e(row[notes]):
            body.append(f"<tr class='note'><td colspan='{len(spec)}'>{_e(row[notes])}</td></tr>")
    more = ""
    if limit is not None and len(df) > limit:
        more = f"<p class='small'>Showing {limit} of {len(df)} rows; the full table is in the results store.</p>"
    cls = " class='notes'" if notes is not None else ""
    return (f"<div class='scroll'><table{cls}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table></div>"
            f"{more}")


def _when(x) -> str:
    try:
        t = pd.Timestamp(x)
    except (TypeError, ValueError):
        return _e(x)
    if pd.isna(t):
        return ""
    if t.tzinfo is not None:
        t = t.tz_convert("UTC")
    return t.strftime("%Y-%m-%d %H:%M:%S") + (" UTC" if t.tzinfo is not None else "")


def _figure(fig, alt: str, caption: str, dpi: int = 90) -> str:
    data = F.png_base64(fig, dpi=dpi)
    return (f"<figure><img src='data:image/png;base64,{data}' alt='{_e(alt)}'>"
            f"<figcaption>{_e(caption)}</figcaption></figure>")


# ----------------------------------------------------------------------------- case panels


def _case_panels(cases: pd.DataFrame, observations: pd.DataFrame, groups: DesignGroups,
                 shrink: pd.DataFrame | None) -> dict[str, list[F.CasePanel]]:
    """Per study, one panel per case: points, phase changes, OLS and GLS (REML AR(1)) fitted lines."""
    obs = observations.sort_values(["case_key", "session"], kind="stable")
    by_key = {k: g for k, g in obs.groupby("case_key", sort=False)}
    shr = shrink.set_index("case_key")["shrunken"] if shrink is not None and len(shrink) else pd.Series(dtype=float)
    out: dict[str, list[F.CasePanel]] = {}
    order = cases.sort_values(["study", "case", "series"] if "series" in cases else ["study", "case"])
    for _, c in order.iterrows():
        key = str(c["case_key"])
        if key not in by_key or key not in groups.signature_of:
            continue
        o = by_key[key]
        des = groups.designs[groups.signature_of[key]]
        X = des.X
        y = o["outcome"].to_numpy(float)
        s = o["session"].to_numpy(float)
        fit_ols = X @ np.linalg.lstsq(X, y, rcond=None)[0]
        rho = float(c.get("ar1_reml_rho", np.nan))
        if np.isfinite(rho) and abs(rho) < 1:
            from audit.regression import prais_winsten_transform

            beta = np.linalg.lstsq(prais_winsten_transform(X, rho), prais_winsten_transform(y, rho), rcond=None)[0]
            fit_gls = X @ beta
        else:
            fit_gls = np.full_like(y, np.nan)
        treat = o["condition"].astype(str).to_numpy() == "treatment"
        alternating = des.model == "alternating"
        if alternating:
            segments = np.where(treat, 1, 0)
            first = np.flatnonzero(treat)
            starts = np.array([(s[first[0] - 1] + s[first[0]]) / 2]) if first.size and first[0] > 0 else np.array([])
        else:
            ph = o["phase_index"].to_numpy()
            segments = ph
            change = np.flatnonzero(ph[1:] != ph[:-1]) + 1
            starts = (s[change - 1] + s[change]) / 2
        zone = DW_ZONE_WORDS.get(str(c.get("dw_zone", "unknown")), "not computable")
        flips = [lbl for alt, lbl in (("flip_gls_reml", "GLS"), ("flip_hac", "HAC")) if bool(c.get(alt) is True)]
        caption = (f"Durbin-Watson {_f(c.get('dw_statistic'))}, bounds: {zone}; exact p (positive) "
                   f"{_p(c.get('dw_p_positive'))}. AR(1): REML {_f(rho)}, shrunken {_f(shr.get(key, np.nan))}."
                   + (f" Decision flips: {', '.join(flips)}." if flips else ""))
        title = f"{c['case']}" + (f" / {c['series']}" if str(c.get("series", "") or "") not in ("", "nan") else "")
        out.setdefault(str(c["study"]), []).append(F.CasePanel(
            title=title, session=s, outcome=y, is_treatment=treat, phase_starts=np.asarray(starts, float),
            segments=np.asarray(segments), fit_ols=fit_ols, fit_gls=fit_gls, caption=caption))
    return out


# ----------------------------------------------------------------------------- sections


def _kpis(overall: pd.Series) -> str:
    items = [
        ("studies", f"{int(overall['n_studies'])}"),
        ("cases audited", f"{int(overall['n_cases'])}"),
        ("pooled AR(1)", f"{_f(overall['pooled_ar1'])} "
                         f"<span class='small'>[{_f(overall['pooled_ar1_ci_lower'])}, "
                         f"{_f(overall['pooled_ar1_ci_upper'])}]</span>"),
        ("flips, own REML AR(1)", _pct(overall.get("flip_rate_gls_reml"))),
        ("flips, shrunken AR(1)", _pct(overall.get("flip_rate_gls_shrunken"))),
        ("verdicts changing", f"{int(overall['n_verdict_changes'])} of {int(overall['n_study_outcomes'])}"),
        ("mean DW power", _pct(overall.get("mean_dw_power"))),
    ]
    return "<ul class='kpis'>" + "".join(f"<li><b>{v}</b>{_e(k)}</li>" for k, v in items) + "</ul>"


def _forest_rows(pooled: pd.DataFrame) -> tuple[pd.DataFrame, str]:
    """The pooled table with at most MAX_FOREST_STUDIES study rows (most cases first), and a caption note."""
    is_study = (pooled["group_by"] == "study") & (pooled["measure"] == "ar1_coefficient")
    studies = pooled[is_study]
    if len(studies) <= MAX_FOREST_STUDIES:
        return pooled, ""
    keep = studies.sort_values(["n_cases", "group"], ascending=[False, True]).head(MAX_FOREST_STUDIES)
    note = (f" Shown: the {MAX_FOREST_STUDIES} studies with most cases, of {len(studies)}; every study's "
            "estimate is in the screening table and the results store.")
    return pd.concat([pooled[~is_study], keep]), note


def _cases_to_draw(cases: pd.DataFrame, verdicts: pd.DataFrame | None) -> tuple[pd.DataFrame, str]:
    """At most MAX_CASE_GRAPHS cases to draw: all of a small review; else cases of study outcomes whose
    verdict changes first, then cases whose decision flips, then the rest, in study order."""
    if len(cases) <= MAX_CASE_GRAPHS:
        return cases, ""
    rank = np.full(len(cases), 2)
    flip_cols = [c for c, _ in FLIP_COLUMNS if c in cases]
    if flip_cols:
        flipped = np.zeros(len(cases), dtype=bool)
        for col in flip_cols:
            flipped |= cases[col].astype("boolean").fillna(False).to_numpy(dtype=bool)
        rank[flipped] = 1
    if verdicts is not None and len(verdicts) and "verdict_changes" in verdicts:
        changed = verdicts[verdicts["verdict_changes"].astype(bool)]
        series = _series_label(cases["series"]) if "series" in cases else pd.Series("", index=cases.index)
        pairs = set(zip(changed["study"].astype(str), changed["series"].astype(str)))
        in_changed = np.array([(s, r) in pairs for s, r in zip(cases["study"].astype(str), series)], dtype=bool)
        rank[in_changed] = 0
    order = cases.assign(_rank=rank).sort_values(["_rank", "study", "case"], kind="stable")
    chosen = order.head(MAX_CASE_GRAPHS).drop(columns="_rank")
    note = (f"This review has {len(cases)} cases; graphs are drawn for {len(chosen)} of them: cases in study "
            "outcomes whose verdict changes first, then cases whose decision flips, then others. Every case's "
            "results are in the results store (cases table).")
    return chosen, note


def _flip_cases(cases: pd.DataFrame, shrink: pd.DataFrame | None) -> pd.DataFrame:
    c = cases.copy()
    flags = []
    for col, name in FLIP_COLUMNS:
        if col in c:
            flags.append((c[col].astype("boolean").fillna(False).to_numpy(dtype=bool), name))
    which = []
    for i in range(len(c)):
        which.append(", ".join(name for f, name in flags if f[i]))
    c["flips"] = which
    if shrink is not None and len(shrink):
        c = c.merge(shrink[["case_key", "shrunken"]], on="case_key", how="left")
    c = c[c["flips"] != ""]
    return c.sort_values(["study", "case"])


def build_report_html(tables: dict[str, pd.DataFrame], cases: pd.DataFrame, observations: pd.DataFrame | None,
                      quarantine: pd.DataFrame | None, adjustments: pd.DataFrame | None, run_info: dict,
                      drawn: tuple[pd.DataFrame, str] | None = None) -> str:
    """The report as one HTML string (see module docstring). ``drawn``: the cases to draw and their
    note when the caller has chosen them already (``_cases_to_draw``), else they are chosen here."""
    overall = tables["summary_overall"].iloc[0]
    pooled = tables["summary_pooled_autocorrelation"]
    shrink = tables.get("summary_case_shrinkage")
    flips = tables["summary_flip_rates"]
    sens = tables.get("summary_sensitivity")
    dw = tables.get("summary_durbin_watson")
    verdicts = tables.get("summary_study_verdicts")
    effect = tables.get("summary_pooled_effect")
    screening = tables.get("summary_screening")
    notes = tables.get("summary_notes")
    alpha = float(overall["alpha"])
    run_id = str(run_info.get("run_id", ""))
    parts: list[str] = []
    add = parts.append

    add(f"<header><h1>Serial dependence audit of a single-case review</h1>"
        f"<p class='sub'>Run {_e(run_id)} &middot; finished {_when(run_info.get('finished_at', ''))} &middot; "
        f"code version {_e(run_info.get('code_version', ''))} &middot; alpha = {alpha:g}</p></header>")
    add(f"<section class='answer' aria-label='Answer'><p>{_e(overall['answer'])}</p></section>")
    add(_kpis(overall))
    add(f"<section class='caution'><p><strong>Caution.</strong> {_e(CAUTION_TEXT)}</p></section>")
    add("<nav aria-label='Contents'><ol>"
        "<li><a href='#autocorrelation'>Serial dependence across the review</a></li>"
        "<li><a href='#flips'>How often conclusions change</a></li>"
        "<li><a href='#studies'>Study verdicts and screening</a></li>"
        "<li><a href='#effect'>Pooled effect</a></li>"
        "<li><a href='#cases'>Cases with flips</a></li>"
        "<li><a href='#graphs'>Case graphs by study</a></li>"
        "<li><a href='#inputs'>Quarantine and adjustments</a></li>"
        "<li><a href='#run'>Run parameters</a></li>"
        "<li><a href='#methods'>Methods and references</a></li></ol></nav>")

    # --- autocorrelation
    add("<section id='autocorrelation'><h2>1. Serial dependence across the review</h2>")
    if shrink is not None and len(shrink):
        add(_figure(F.autocorrelation_distribution(shrink, pooled),
                    "Histograms of per-case corrected residual autocorrelation and AR(1) coefficients",
                    "Left: residual lag-1 autocorrelation minus its exact null mean (attenuated when the true "
                    "coefficient is not 0). Right: each case's AR(1) coefficient from inverting the exact "
                    "expectation of its residual autocorrelation. Black line: random-effects pooled value; "
                    "orange band: 95% confidence interval; yellow band: 95% prediction interval."))
    forest, forest_note = _forest_rows(pooled)
    add(_figure(F.forest_by_study(forest), "Forest plot of the pooled AR(1) coefficient by study",
                "Pooled AR(1) coefficient per study (squares sized by number of cases, lines 95% CI), the "
                "review-wide estimate (diamond) and its 95% prediction interval (dashed)." + forest_note))
    sel = pooled[pooled["group_by"].isin(["all", "design", "outcome_scale"])]
    add("<h3>Pooled estimates (random effects, DerSimonian-Laird)</h3>")
    add(_table(sel, [("measure", "measure", "text"), ("group_by", "grouping", "text"), ("group", "group", "text"),
                     ("n_cases", "cases", "int"), ("estimate", "estimate", "num"), ("ci_lower", "CI low", "num"),
                     ("ci_upper", "CI high", "num"), ("pi_lower", "PI low", "num"), ("pi_upper", "PI high", "num"),
                     ("tau2", "tau²", "f3"), ("i2", "I²", "pct")]))
    if dw is not None and len(dw):
        add("<h3>Exact Durbin-Watson test</h3>")
        add(_table(dw[dw["group_by"].isin(["all", "design"])],
                   [("group_by", "grouping", "text"), ("group", "group", "text"), ("n_cases", "cases", "int"),
                    ("share_significant_positive", "significant, positive", "pct"),
                    ("positive_ci_lower", "CI low", "pct"), ("positive_ci_upper", "CI high", "pct"),
                    ("share_significant_negative", "significant, negative", "pct"),
                    ("power_rho", "power at AR(1)", "num"), ("mean_power", "mean power", "pct"),
                    ("min_power", "min", "pct"), ("max_power", "max", "pct")]))
        add("<p class='small'>Power: exact power of the exact one-sided DW test at the pooled AR(1) coefficient, "
            "for each case's own design. Low power means a non-significant DW result says little.</p>")
    add("</section>")

    # --- flips
    add("<section id='flips'><h2>2. How often would serial dependence change conclusions?</h2>")
    if len(flips):
        add(_figure(F.flip_chart(flips), "Bar chart of flip rates by alternative analysis",
                    "Share of cases whose decision at alpha differs from the OLS (independence) decision, split "
                    "into lost and gained significance, with Wilson 95% intervals of the total."))
        add(_table(flips[flips["group_by"] == "all"],
                   [("label", "alternative", "text"), ("n_cases", "cases", "int"),
                    ("n_significant_independence", "significant (independence)", "int"),
                    ("n_significant_alternative", "significant (alternative)", "int"),
                    ("n_flips", "flips", "int"), ("flip_rate", "rate", "pct"), ("flip_ci_lower", "CI low", "pct"),
                    ("flip_ci_upper", "CI high", "pct"), ("n_lost", "lost", "int"), ("n_gained", "gained", "int")]))
    if sens is not None and len(sens):
        add(_figure(F.sensitivity_curve(sens, float(overall["pooled_ar1"])),
                    "Line chart of flip rate against assumed AR(1) coefficient",
                    "Sensitivity: share of cases whose decision changes when every case is analysed by GLS at the "
                    "same assumed AR(1) coefficient (0 reproduces OLS)."))
    add("</section>")

    # --- studies
    add("<section id='studies'><h2>3. Study verdicts and screening</h2>")
    add(f"<p>A study outcome shows an effect when at least {DEMONSTRATIONS_NEEDED} demonstrations go in the desired direction at "
        "alpha (the common three-demonstrations standard; common practice). A case counts once; a reversal "
        "case counts once per baseline/treatment transition when its average effect is significant "
        "(transitions are not tested one by one).</p>")
    if verdicts is not None and len(verdicts):
        changed = verdicts[verdicts["verdict_changes"].astype(bool)]
        add(f"<h3>Study outcomes whose verdict changes ({len(changed)} of {len(verdicts)})</h3>")
        add(_table(changed, [("study", "study", "wide"), ("series", "outcome series", "text"),
                             ("verdict_independence", "independence (OLS)", "text"),
                             ("verdict_ar1", "AR(1) (GLS, own REML)", "text"),
                             ("verdict_shrunken", "AR(1) (GLS, shrunken)", "text"), ("change", "change", "text")],
                   empty="No study outcome changes its verdict.", limit=MAX_TABLE_ROWS))
    if screening is not None and len(screening):
        add("<h3>Screening table</h3>")
        add(_table(screening, [("study", "study", "wide"), ("cases_audited", "cases audited", "int"),
                               ("cases_quarantined", "quarantined", "int"),
                               ("cases_meeting_five_point_standard", "≥5 points per phase", "int"),
                               ("share_significant_dw", "DW significant (+)", "pct"), ("n_flips", "flips", "int"),
                               ("n_baseline_trend_flags", "baseline-trend flags", "int"),
                               ("verdict_independence", "verdict, independence", "text"),
                               ("verdict_ar1", "verdict, own AR(1)", "text"),
                               ("verdict_shrunken", "verdict, shrunken AR(1)", "text")], notes="note",
                   limit=MAX_TABLE_ROWS))
    add("</section>")

    # --- pooled effect
    add("<section id='effect'><h2>4. Pooled effect under independence and under AR(1)</h2>")
    if effect is not None and len(effect):
        add("<p>Random-effects pooled effect with each case's sampling variance as estimated (independence) and "
            "inflated by (1+ρ)/(1−ρ) with the case's shrunken AR(1) coefficient ρ clipped to [0, 0.95] "
            "(variance of a mean of AR(1) observations, Bayley &amp; Hammersley 1946).</p>")
        add(_table(effect[effect["group_by"] == "all"],
                   [("measure", "measure", "text"), ("assumption", "assumption", "text"), ("n_cases", "cases", "int"),
                    ("estimate", "estimate", "num"), ("std_error", "SE", "f3"), ("ci_lower", "CI low", "num"),
                    ("ci_upper", "CI high", "num"), ("ci_width", "CI width", "num"), ("tau2", "tau²", "f3"),
                    ("width_ratio", "width ratio", "num"),
                    ("median_case_width_ratio", "median case width ratio", "num")]))
        add("<p class='small'>Width ratio: pooled interval width under AR(1) divided by the width under "
            "independence. Median case width ratio: the same for single cases, sqrt((1+ρ)/(1−ρ)). The pooled "
            "interval can change less than single cases do, because part of the inflated within-case variance "
            "is absorbed by a smaller between-case variance τ².</p>")
        per_study = effect[(effect["group_by"] == "study") & (effect["assumption"] == "ar1")]
        if len(per_study):
            add("<details><summary>By study</summary>")
            add(_table(per_study, [("measure", "measure", "text"), ("group", "study", "wide"),
                                   ("n_cases", "cases", "int"), ("estimate", "estimate under AR(1)", "num"),
                                   ("ci_width", "CI width under AR(1)", "num"), ("width_ratio", "width ratio", "num")],
                       limit=MAX_TABLE_ROWS))
            add("</details>")
    else:
        add("<p class='small'>No effect-size columns in this run's cases table; nothing pooled.</p>")
    add("</section>")

    # --- cases with flips
    add("<section id='cases'><h2>5. Cases whose decision changes</h2>")
    fc = _flip_cases(cases, shrink)
    if "series" in fc and not fc["series"].astype(str).replace({"nan": "", "None": ""}).str.len().any():
        fc = fc.drop(columns="series")
    add(_table(fc, [("study", "study", "wide"), ("case", "case", "text"), ("series", "series", "text"),
                    ("design", "design", "text"), ("n_obs", "points", "int"),
                    ("effect_ols_estimate", "effect", "num"), ("effect_ols_p_value", "p OLS", "p"),
                    ("ar1_reml_rho", "REML AR(1)", "num"), ("effect_gls_reml_p_value", "p GLS", "p"),
                    ("effect_hac_p_value", "p HAC", "p"), ("shrunken", "shrunken AR(1)", "num"),
                    ("flips", "flips under", "text")], empty="No case changes its decision.", limit=MAX_TABLE_ROWS))
    add("</section>")

    # --- small multiples
    add("<section id='graphs'><h2>6. Case graphs by study</h2>")
    if observations is not None and len(observations):
        add("<p class='small'>Blue circles: baseline; orange triangles: treatment; dotted lines: phase changes; "
            "black line: OLS fit of the case model; vermillion dashed line: GLS fit with the case's REML AR(1). "
            "Under each graph: the Durbin-Watson zone in words, the exact p-value for positive dependence, "
            "and the AR(1) estimates.</p>")
        drawn, graph_note = drawn if drawn is not None else _cases_to_draw(cases, verdicts)
        if graph_note:
            add(f"<p>{_e(graph_note)}</p>")
        obs_drawn = observations[observations["case_key"].astype(str).isin(set(drawn["case_key"].astype(str)))]
        groups = case_designs(obs_drawn)
        panels = _case_panels(drawn, obs_drawn, groups, shrink)
        add(f"<p>{F.legend_svg()}</p>")
        for study in sorted(panels):
            add(f"<h3>{_e(study)}</h3><div class='panels'>"
                + "".join(F.case_panel_svg(p) for p in panels[study]) + "</div>")
    else:
        add("<p class='small'>This run stored no observations table; case graphs are not available.</p>")
    add("</section>")

    # --- inputs
    add("<section id='inputs'><h2>7. Quarantine and adjustments</h2>")
    q = quarantine if quarantine is not None else pd.DataFrame()
    if len(q) and "source_file" in q:
        q = q.assign(source_file=q["source_file"].astype(str).map(lambda p: Path(p).name))
    add(f"<h3>Quarantine ({len(q)} entries)</h3>")
    add(_table(q, [("level", "level", "text"), ("source_file", "file", "text"), ("rows", "rows", "text"),
                   ("study", "study", "text"), ("case", "case", "text"), ("column", "column", "text"),
                   ("rule", "rule", "text"), ("message", "message", "text")], empty="Nothing was quarantined.",
               limit=200))
    a = adjustments if adjustments is not None else pd.DataFrame()
    add(f"<h3>Adjustments ({len(a)} repairs)</h3>")
    if len(a):
        a = a.assign(source_file=a["source_file"].astype(str).map(lambda p: Path(p).name)) if "source_file" in a else a
        counts = a.groupby([c for c in ("rule", "source_file") if c in a.columns]).size().reset_index(name="n")
        add(_table(counts, [("rule", "rule", "text"), ("source_file", "file", "text"), ("n", "repairs", "int")]))
        add("<details><summary>First repairs</summary>")
        add(_table(a, [("source_file", "file", "text"), ("source_row", "row", "int"), ("study", "study", "text"),
                       ("case", "case", "text"), ("column", "column", "text"), ("old_value", "old", "text"),
                       ("new_value", "new", "text"), ("rule", "rule", "text")], limit=60))
        add("</details>")
    else:
        add("<p class='small'>No repairs were made.</p>")
    add("</section>")

    # --- run parameters
    add("<section id='run'><h2>8. Run parameters</h2>")
    params = run_info.get("parameters") or {}
    counts = run_info.get("counts") or {}
    rows = [("run id", run_id), ("started", _when(run_info.get("started_at", ""))),
            ("finished", _when(run_info.get("finished_at", ""))), ("code version", run_info.get("code_version", "")),
            ("pipeline version", counts.get("pipeline_version", "") if isinstance(counts, dict) else ""),
            ("input files", len(run_info.get("input_hashes") or {}))]
    rows += [(f"parameter: {k}", json.dumps(v, default=str) if isinstance(v, (dict, list)) else v)
             for k, v in (params.items() if isinstance(params, dict) else [])]
    rows += [(f"count: {k}", v) for k, v in (counts.items() if isinstance(counts, dict) else [])
             if k != "pipeline_version"]
    add(_table(pd.DataFrame(rows, columns=["name", "value"]), [("name", "name", "text"), ("value", "value", "text")]))
    if notes is not None and len(notes):
        add("<h3>Summary notes</h3>")
        add(_table(notes, [("part", "part", "text"), ("status", "status", "text"), ("note", "note", "text")]))
    add("</section>")

    # --- methods
    add("<section id='methods'><h2>9. Methods and references</h2>")
    add(_methods_html(alpha))
    add("<ol class='small'>" + "".join(f"<li>{_e(r)}</li>" for r in REFERENCES) + "</ol>")
    add(f"<section class='caution'><p><strong>Caution.</strong> {_e(CAUTION_TEXT)}</p></section>")
    add("</section>")
    add(f"<footer>Generated by sced-audit on {_e(_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%d %H:%M UTC'))}."
        " Self-contained file: no scripts, nothing loaded from the network.</footer>")
    body = "\n".join(parts)
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>sced-audit report {_e(run_id)}</title><style>{CSS}</style></head>"
            f"<body><main>{body}</main></body></html>\n")


def _methods_html(alpha: float) -> str:
    items = [
        "<b>Case model.</b> Piecewise regression per case (Huitema &amp; McKean 2000, generalised to several "
        "phase changes): level and trend, with a level and slope change at each phase change (a level-only "
        "model when a phase is short). The case effect is the average immediate level change, counted "
        "positive from baseline to treatment.",
        "<b>Decisions.</b> The effect is tested at alpha = " + f"{alpha:g}" + " by OLS (independent errors), by "
        "GLS (Prais-Winsten) with the case's REML AR(1) coefficient (Cheang &amp; Reinsel 2000), by GLS with "
        "the shrunken review-wide coefficient, and by OLS with Newey-West (HAC) standard errors. A flip is a "
        "case whose decision differs from the OLS decision; lost = significant only under independence, "
        "gained = significant only under the alternative.",
        "<b>Durbin-Watson.</b> Exact p-values for the case's own design (Imhof 1961), the bounds zone "
        "(Durbin &amp; Watson 1950, 1951, 1971) in words, and the exact power against AR(1) errors.",
        "<b>AR(1) coefficient per case.</b> The lag-1 autocorrelation r1 of the model residuals has exact null "
        "mean tr(ML)/(n−k) and variance V0 (Koopmans 1942). Subtracting the null mean removes the bias only "
        "when the true coefficient is 0; under AR(1) errors the expectation of r1 rises with slope (n−k)·V0 "
        "(about 0.4 for 15 points and 4 parameters). Each case's coefficient is therefore the value ρ whose "
        "exact expected r1 for this design (Sawa 1978; Magnus 1986) equals the observed r1 (a mean-bias "
        "correction, compare Andrews 1993), bounded to ±0.95. Its within-case variance is 1/((n−k)²·V0), the "
        "exact null variance carried to the ρ scale by the exact slope at 0.",
        "<b>Pooling.</b> Random-effects meta-analysis with the DerSimonian-Laird between-case variance τ², "
        "normal 95% confidence interval, prediction interval with t(k−2) (Higgins, Thompson &amp; "
        "Spiegelhalter 2009) and I² (Higgins &amp; Thompson 2002), overall and by study, design and outcome "
        "scale. The corrected r1 is also pooled (with the exact null variance): its interval is a test of "
        "any serial dependence, not an estimate of the coefficient.",
        "<b>Shrinkage.</b> Empirical Bayes (Morris 1983): each case's coefficient moves toward the pooled mean "
        "with weight τ²/(τ² + v_i) on its own estimate; clipped to ±0.95; fed back into the GLS test.",
        "<b>Proportions.</b> Wilson (1927) score intervals.",
        "<b>Study verdicts.</b> Three demonstrations of an effect in the desired direction (common practice; "
        "compare Kratochwill et al. 2013), counted under independence and under AR(1).",
        "<b>Effect sizes.</b> Log response ratio (Pustejovsky 2018) or within-case standardized mean difference "
        "(Busk &amp; Serlin 1992), NAP (Parker &amp; Vannest 2009) and Tau-U (Parker et al. 2011), with "
        "variances under AR(1) inflated by (1+ρ)/(1−ρ) (Bayley &amp; Hammersley 1946).",
    ]
    return "<ul>" + "".join(f"<li>{i}</li>" for i in items) + "</ul>"


# ----------------------------------------------------------------------------- entry points


def write_report(store_path, out_path=None, run: str = "latest") -> Path:
    """Write the HTML report of a committed run; returns its path (default: in the store folder)."""
    from audit.store import ResultsStore

    store = ResultsStore(store_path)
    info = store.run_info(run)
    run_id = info["run_id"]
    cases = _read_optional(store, "cases", run_id)
    if cases is None:
        raise KeyError(f"run {run_id} in {store_path} has no cases table; nothing to report")
    quarantine = _read_optional(store, "quarantine", run_id)
    adjustments = _read_optional(store, "adjustments", run_id)
    names = set(info.get("tables") or [])
    if set(SUMMARY_TABLES) - {"summary_notes"} <= names:
        tables = {n: _read_optional(store, n, run_id) for n in SUMMARY_TABLES if n in names}
        # only the observations of the cases drawn (memory: a large review's table is not read whole)
        drawn = _cases_to_draw(cases, tables.get("summary_study_verdicts"))
        observations = _read_optional(store, "observations", run_id,
                                      case_key=sorted(set(drawn[0]["case_key"].astype(str))))
    else:
        drawn = None  # chosen from the summary computed below
        observations = _read_optional(store, "observations", run_id)
        accepted = None
        for name in ("accepted_cases", "accepted", "cases_accepted"):
            accepted = _read_optional(store, name, run_id)
            if accepted is not None:
                break
        params = info.get("parameters") or {}
        alpha = float(params.get("alpha", 0.05)) if isinstance(params, dict) else 0.05
        tables = summarize(cases, alpha, quarantine=quarantine, accepted_cases=accepted, observations=observations)
    text = build_report_html(tables, cases, observations, quarantine, adjustments, info, drawn=drawn)
    out = Path(out_path) if out_path is not None else Path(store_path) / f"sced-audit-report-{run_id}.html"
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(out)
    return out


def cmd_report(args) -> int:
    """`sced-audit report --store DIR [--out FILE] [--run ID]`: write the report, print its path."""
    start = time.perf_counter()
    try:
        path = write_report(args.store, getattr(args, "out", None), getattr(args, "run", None) or "latest")
    except (LookupError, FileNotFoundError) as exc:
        print(f"sced-audit: error: {exc}", file=sys.stderr)
        return 2
    print(f"Report written to {path} ({path.stat().st_size / 1e6:.1f} MB, {time.perf_counter() - start:.1f} s)")
    return 0
