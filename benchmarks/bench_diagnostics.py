"""Cases per second of the diagnostics engine against the straightforward statsmodels loop, one run.

Loads a review once (ingest and validation are not timed), then for each repeat times

* baseline: ``baseline_statsmodels_loop.baseline_loop`` (OLS + contrast, durbin_watson, acf,
  GLSAR iterative fit + contrast, Ljung-Box per case) on the first ``--baseline-cases`` cases
  (its cost is a fixed amount per case; 0 = all cases);
* engine: every diagnostic of the case table (exact DW p-values on both sides, bounds, zone,
  exact power, REML/ML AR(1), OLS/GLS/HAC effect tests and flips, residual r1 with exact
  null moments, Breusch-Godfrey, Ljung-Box, session-only DW) on all cases:
  ``--engine series`` (default) sorts the observations and runs ``audit.stacked.diagnose_series``
  (case designs for all cases at once, stacks of equal n and k); ``--engine designs`` builds
  ``audit.design.case_design`` per case and runs ``audit.stacked.diagnose_designs``;
  ``--engine diagnose_cases`` times ``audit.diagnose.diagnose_cases`` as a whole (phase table
  and effect sizes included; fast once it calls the stacked path).

Prints each repeat, then the medians and their ratio, with the machine load before and after
(2-core machines shared with other work give noisy figures: compare within one run).

    python benchmarks/bench_diagnostics.py benchmarks/data/review_20000 --repeats 3
    python benchmarks/bench_diagnostics.py benchmarks/data/review_5000 --cases 500 --repeats 1
"""

from __future__ import annotations

import argparse
import multiprocessing
import statistics
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))

from baseline_statsmodels_loop import baseline_loop  # noqa: E402
from bench_common import Timer, flat_arrays, load_observations, load_text, split_designs, take_cases  # noqa: E402


def _series_part(part: dict):
    """diagnose_series on one block of cases (run in a worker process)."""
    from audit.stacked import diagnose_series

    return diagnose_series(**part)


def _cases_part(obs: pd.DataFrame) -> dict:
    """diagnose_cases on one block of whole cases (run in a worker process); its tables come back."""
    from audit.diagnose import diagnose_cases

    return diagnose_cases(obs)


def case_block_rows(obs: pd.DataFrame, parts: int) -> list[np.ndarray]:
    """Row positions of ``parts`` blocks of whole cases of about equal numbers of points.

    Cases are ordered by their number of points, then by first appearance (as
    ``audit.rerun.case_batch_rows`` orders them); each cut falls between the two cases nearest
    to an equal share of the points, and each block's rows stay in input order.  Points measure
    the work: since stacks run side by side (audit.stacked._stack_columns_many) the engine's
    time is about proportional to them (diagnose_cases CPU time on review_20000, cases grouped
    by length 8-12, ..., 37-40: 5.7 to 7.9 us per point, no trend with length).  Cuts are not
    held to length boundaries: one length holds about 500 cases at 20,000 (about 0.1 s of
    work), and blocks cut only between lengths (balanced on points + 8 per case) cost 1.29 s for
    12,527 short cases and 1.45 s for 7,473 long ones (medians of 6).
    """
    if obs.empty:
        return []
    codes, _ = pd.factorize(obs["case_key"], sort=False)
    sizes = np.bincount(codes)
    by_size = np.lexsort((np.arange(sizes.size), sizes))  # cases by length, then first seen
    rank = np.empty(sizes.size, dtype=np.int64)
    rank[by_size] = np.arange(sizes.size)
    rows = np.argsort(rank[codes], kind="stable")  # rows case by case in that order
    row_ends = np.cumsum(sizes[by_size])  # rows up to and including each case
    cuts = [0]
    for i in range(1, parts):
        j = int(np.argmin(np.abs(row_ends - row_ends[-1] * i / parts)))
        cuts.append(max(int(row_ends[j]), cuts[-1]))
    cuts.append(rows.size)
    # within a block the rows keep their input order (clean observations come sorted by case
    # and session, which diagnose_cases then uses as they are)
    return [np.sort(rows[a:b]) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]


def engine_columns(obs: pd.DataFrame) -> list[str]:
    """The observation columns diagnose_cases reads (its tables depend on these only); the
    provenance columns (source file, sheet, row, tier ...) are not sent to the workers."""
    from audit.diagnose import CASE_ID_COLUMNS

    wanted = CASE_ID_COLUMNS + ["session", "outcome", "phase", "phase_index", "condition"]
    return [c for c in obs.columns if c in wanted]


def _case_blocks(obs: pd.DataFrame, parts: int):
    """The observations cut into ``parts`` blocks of whole cases (``case_block_rows``), with the
    columns of ``engine_columns``; yielded one at a time, so the first block can be sent to its
    worker while the next one is cut."""
    from audit.rerun import take_rows

    obs = obs[engine_columns(obs)]
    for rows in case_block_rows(obs, parts):
        yield take_rows(obs, rows)


def _blocks(arrays: dict, parts: int) -> list[dict]:
    """The flat arrays cut into ``parts`` contiguous blocks of cases."""
    starts = arrays["case_starts"]
    cuts = np.linspace(0, starts.size, parts + 1).astype(int)
    out = []
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        r0 = starts[lo]
        r1 = starts[hi] if hi < starts.size else arrays["session"].size
        block = {k: v[r0:r1] for k, v in arrays.items() if k != "case_starts"}
        block["case_starts"] = starts[lo:hi] - r0
        out.append(block)
    return out


def design_shapes(obs: pd.DataFrame) -> list[tuple[int, int]]:
    """The (n, k) of every case model of the input (``audit.stacked.case_design_stacks``)."""
    from audit.stacked import case_design_stacks

    a = flat_arrays(obs)
    return sorted({X.shape[1:] for _, _, X, *_ in case_design_stacks(
        a["session"], a["phase_index"], a["condition"], a["design"], a["phase_label"], a["case_starts"])})


def warm_caches(shapes: list[tuple[int, int]], alpha: float = 0.05) -> None:
    """Fill this process's cache of Durbin-Watson bounds for every (n, k) (worker initializer):
    the pool gives blocks to whichever worker is free, so each worker warms all of them."""
    from audit.durbin_watson import critical_bounds

    for n, k in shapes:
        critical_bounds(n, k - 1, alpha)


def run_engine(obs, engine: str, pool=None, workers: int = 1) -> tuple[int, float, dict]:
    """Diagnose every case of ``obs``; returns (cases, seconds, parts in seconds)."""
    if engine == "diagnose_cases":
        from audit.diagnose import diagnose_cases

        if pool is None or workers < 2:
            with Timer() as t:
                tables = diagnose_cases(obs)
            return len(tables["cases"]), t.seconds, {}
        with Timer() as t:  # splitting, sending the blocks and getting the tables back are timed
            futures = [pool.submit(_cases_part, block) for block in _case_blocks(obs, workers)]
            n = sum(len(f.result()["cases"]) for f in futures)
        return n, t.seconds, {}
    if engine == "designs":
        from audit.stacked import diagnose_designs

        with Timer() as t_split:
            series, designs = split_designs(obs)
        with Timer() as t_stack:
            frame = diagnose_designs(series, designs)
        return len(frame), t_split.seconds + t_stack.seconds, {"case_design per case": t_split.seconds,
                                                                "stacks": t_stack.seconds}
    from audit.stacked import diagnose_series

    with Timer() as t_split:
        arrays = flat_arrays(obs)
    with Timer() as t_stack:
        if pool is None or workers < 2:
            frame = diagnose_series(**arrays)
        else:  # contiguous blocks of cases, one per worker process
            futures = [pool.submit(_series_part, block) for block in _blocks(arrays, workers)]
            frame = pd.concat([f.result() for f in futures], ignore_index=True)
    return len(frame), t_split.seconds + t_stack.seconds, {"sort": t_split.seconds, "designs+stacks": t_stack.seconds}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("path", help="input folder or file (e.g. benchmarks/data/review_20000)")
    ap.add_argument("--cases", type=int, default=None, help="use only the first N cases of the input")
    ap.add_argument("--baseline-cases", type=int, default=2000,
                    help="cases for the baseline loop (first N of the same input; 0 = all)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--workers", type=int, default=1,
                    help="engines 'series' and 'diagnose_cases': split the cases over this many worker "
                         "processes (started before timing; the baseline loop stays one process)")
    ap.add_argument("--engine", choices=("series", "designs", "diagnose_cases"), default="series",
                    help="series: audit.stacked.diagnose_series on the sorted observation arrays (designs "
                         "built for all cases at once); designs: case_design per case, then "
                         "audit.stacked.diagnose_designs; diagnose_cases: audit.diagnose.diagnose_cases")
    args = ap.parse_args(argv)

    print(f"start: {load_text()}")
    with Timer() as t_load:
        obs = take_cases(load_observations(args.path), args.cases)
    n_cases = obs["case_key"].nunique()
    base_obs = take_cases(obs, args.baseline_cases)
    n_base = base_obs["case_key"].nunique()
    print(f"input {args.path}: {n_cases} cases, {len(obs)} observations (loaded in {t_load.seconds:.1f} s, "
          f"not timed); baseline on {n_base} of them")

    shapes = design_shapes(obs)
    pool = None
    if args.workers > 1 and args.engine in ("series", "diagnose_cases"):
        pool = ProcessPoolExecutor(args.workers, mp_context=multiprocessing.get_context("fork"),
                                   initializer=warm_caches, initargs=(shapes,))
    # warm-up (imports, caches such as the DW bounds, worker start), not timed
    warm_caches(shapes)
    run_engine(take_cases(obs, 50), args.engine, pool, args.workers)
    baseline_loop(take_cases(obs, 5))

    base_rates, eng_rates = [], []
    for rep in range(1, args.repeats + 1):
        with Timer() as tb:
            baseline_loop(base_obs)
        base_rates.append(n_base / tb.seconds)
        n, secs, parts = run_engine(obs, args.engine, pool, args.workers)
        eng_rates.append(n / secs)
        detail = ", ".join(f"{k} {v:.2f} s" for k, v in parts.items())
        print(f"repeat {rep}: baseline {n_base} cases {tb.seconds:.2f} s = {base_rates[-1]:.1f} cases/s | "
              f"engine {n} cases {secs:.2f} s = {eng_rates[-1]:.0f} cases/s ({detail}) | "
              f"ratio {eng_rates[-1] / base_rates[-1]:.1f} | {load_text()}")
    if pool is not None:
        pool.shutdown()
    b, e = statistics.median(base_rates), statistics.median(eng_rates)
    ratios = [er / br for er, br in zip(eng_rates, base_rates)]
    print(f"median over {args.repeats}: baseline {b:.1f} cases/s, engine ({args.engine}, {args.workers} process"
          f"{'es' if args.workers > 1 else ''}) {e:.0f} cases/s, ratio of medians {e / b:.1f}x "
          f"(median of per-repeat ratios {statistics.median(ratios):.1f}x) | end: {load_text()}")


if __name__ == "__main__":
    main()
