"""The straightforward per-case loop a reviewer would write with statsmodels (benchmark reference).

For each case: the piecewise case model by OLS with a t test of the effect contrast,
``durbin_watson`` on its residuals, ``acf`` (lag 1), ``GLSAR(y, X, rho=1).iterative_fit()``
with the same contrast test, and ``acorr_ljungbox`` at lag max(1, n // 4).  The design matrix
is the engine's (``audit.design.case_design``) so that both fit the same model.  No exact
Durbin-Watson p-values, power, REML, HAC, Breusch-Godfrey or session-only regression: the
engine computes all of these on top.

    python benchmarks/baseline_statsmodels_loop.py benchmarks/data/review_5000 [--cases 500]
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import statsmodels.api as sm
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.stats.stattools import durbin_watson
from statsmodels.tsa.stattools import acf

from audit.design import case_design

NAN = float("nan")


def _contrast(result, c) -> tuple[float, float]:
    t = result.t_test(c)
    return float(np.squeeze(t.effect)), float(np.squeeze(t.pvalue))


def diagnose_case_statsmodels(session, outcome, phase_index, condition, design, phase) -> dict:
    """One case through statsmodels: OLS + contrast, DW, acf, GLSAR iterative fit + contrast, Ljung-Box."""
    des = case_design(session, phase_index, condition, design, phase)
    y = np.asarray(outcome, dtype=float)
    X, c = des.X, des.contrast
    row = {"model": des.model, "n_obs": len(y)}
    try:
        ols = sm.OLS(y, X).fit()
        row["ols_estimate"], row["ols_p_value"] = _contrast(ols, c)
        row["dw_statistic"] = float(durbin_watson(ols.resid))
        row["acf1"] = float(acf(ols.resid, nlags=1, fft=False)[1])
        gls = sm.GLSAR(y, X, rho=1).iterative_fit()
        row["glsar_rho"] = float(gls.model.rho[0])
        row["glsar_estimate"], row["glsar_p_value"] = _contrast(gls, c)
        lb = acorr_ljungbox(ols.resid, lags=[max(1, len(y) // 4)])
        row["lb_statistic"] = float(lb["lb_stat"].iloc[0])
        row["lb_p_value"] = float(lb["lb_pvalue"].iloc[0])
    except (ValueError, np.linalg.LinAlgError, ZeroDivisionError) as exc:  # degenerate case
        row["error"] = type(exc).__name__
    return row


def baseline_loop(observations: pd.DataFrame) -> pd.DataFrame:
    """Loop over the cases of clean observations (one statsmodels pass per case)."""
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # constant series etc. warn; the loop keeps going
        with np.errstate(all="ignore"):
            for key, part in observations.sort_values(["case_key", "session"], kind="stable").groupby(
                    "case_key", sort=False):
                row = diagnose_case_statsmodels(
                    part["session"].to_numpy(dtype=float), part["outcome"].to_numpy(dtype=float),
                    part["phase_index"].to_numpy(), part["condition"].to_numpy().astype(str),
                    str(part["design"].iloc[0]), part["phase"].to_numpy().astype(str))
                row["case_key"] = key
                rows.append(row)
    return pd.DataFrame(rows)


def main(argv=None) -> None:
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_common import load_observations, take_cases

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("path", help="input folder or file (e.g. benchmarks/data/review_5000)")
    ap.add_argument("--cases", type=int, default=None, help="use only the first N cases")
    args = ap.parse_args(argv)
    obs = take_cases(load_observations(args.path), args.cases)
    n = obs["case_key"].nunique()
    t0 = time.perf_counter()
    out = baseline_loop(obs)
    dt = time.perf_counter() - t0
    print(f"baseline statsmodels loop: {n} cases in {dt:.2f} s = {n / dt:.1f} cases/s; "
          f"errors: {int(out.get('error', pd.Series(dtype=object)).notna().sum())}")


if __name__ == "__main__":
    main()
