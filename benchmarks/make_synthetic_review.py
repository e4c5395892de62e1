"""Write invented single-case reviews at scale as sharded CSV input files (for benchmarks only).

Every study, case and value is invented.  Per case, with t = session - first session:

    y_t = level + trend*t + effect*D_t + slope*(t - t_p)*D_t + e_t,
    e_t = rho*e_{t-1} + sd*sqrt(1 - rho^2)*z_t  (stationary AR(1), z ~ N(0, 1)),

D_t = 1 in treatment sessions, t_p the first session of the current treatment phase.  Designs
(mixed within a review): AB, ABAB (labels A, B, A2, B2), multiple baseline (tiers of a study
share their sessions, staggered starts) and alternating treatments (a baseline phase, then
A/B or A/B/C sessions in shuffled blocks).  Series lengths 8 to 40 (ABAB 12 to 40), at least
3 points per phase (per condition for alternating designs), 1 study in 5 with gaps in the
session numbers.  Outcomes are rounded to 0.1 (counts to integers >= 0, percentages clipped
to 0-100), so a few series come out constant, as in digitized data.

    python benchmarks/make_synthetic_review.py --cases 5000 20000 100000 --out benchmarks/data

writes benchmarks/data/review_5000/part_000.csv ... (about 2,500 cases per file; only the
input files go into the folder, which the pipeline searches recursively).
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.signal import lfilter

DESIGNS = ("AB", "ABAB", "multiple_baseline", "alternating")
DESIGN_WEIGHTS = (0.30, 0.25, 0.25, 0.20)
CASES_PER_FILE = 2500
SD_RANGE = {"count": (1.0, 2.5), "percent": (5.0, 10.0), "rating": (0.5, 1.5)}
LEVEL_RANGE = {"count": (4.0, 12.0), "percent": (30.0, 60.0), "rating": (3.0, 6.0)}
COLUMNS = ["study", "case", "tier", "session", "phase", "condition", "outcome", "design",
           "outcome_scale", "desired_direction"]


def _ar1(rng: np.random.Generator, n: int, rho: float, sd: float) -> np.ndarray:
    """Stationary AR(1) series with marginal sd (filtered white noise, first value from the
    stationary distribution)."""
    z = rng.standard_normal(n) * sd * math.sqrt(1.0 - rho**2)
    z[0] = rng.standard_normal() * sd
    return lfilter([1.0], [1.0, -rho], z)


def _sessions(rng: np.random.Generator, n: int, gaps: bool) -> np.ndarray:
    if not gaps:
        return np.arange(1, n + 1, dtype=float)
    step = np.where(rng.random(n - 1) < 0.15, 2.0, 1.0)
    return np.concatenate([[1.0], 1.0 + np.cumsum(step)])


def _phase_lengths(rng: np.random.Generator, n: int, n_phases: int) -> np.ndarray:
    """n split into n_phases phases of at least 3 points."""
    extra = rng.multinomial(n - 3 * n_phases, np.full(n_phases, 1.0 / n_phases))
    return 3 + extra


def _alternating_labels(rng: np.random.Generator, n: int, three: bool) -> np.ndarray:
    """Baseline phase of 3-5 sessions, then shuffled blocks (B first) of the conditions."""
    n_base = int(rng.integers(3, 6))
    labels = ["A"] * n_base
    block = ["B", "A", "C"] if three else ["B", "A"]
    first = True
    while len(labels) < n:
        b = list(rng.permutation(block))
        if first:
            b.remove("B")
            b = ["B"] + b
            first = False
        labels.extend(b)
    lab = np.array(labels[:n])
    for needed in (["B", "C"] if three else ["B"]):  # at least 3 points per treatment label
        short = 3 - int(np.sum(lab == needed))
        if short > 0:
            spots = np.flatnonzero(lab[n_base:] == "A")[:short] + n_base
            lab[spots] = needed
    return lab


def _case_rows(rng, design, n, sessions, base_len, study_params):
    """Labels, conditions and outcomes of one case."""
    level, trend, effect, slope, rho, sd, scale, direction, three = study_params
    if design == "alternating":
        labels = _alternating_labels(rng, n, three)
    elif design == "ABAB":
        lengths = _phase_lengths(rng, n, 4)
        labels = np.repeat(np.array(["A", "B", "A2", "B2"]), lengths)
    else:
        labels = np.repeat(np.array(["A", "B"]), [base_len, n - base_len])
    treat = np.array([lab[0] != "A" for lab in labels])
    t = sessions - sessions[0]
    start = np.r_[True, labels[1:] != labels[:-1]]
    phase_start = t[np.maximum.accumulate(np.where(start, np.arange(n), 0))]
    sign = 1.0 if direction == "increase" else -1.0
    mean = level + trend * t + sign * (effect * treat + slope * (t - phase_start) * treat * (design != "alternating"))
    y = mean + _ar1(rng, n, rho, sd)
    if scale == "count":
        y = np.maximum(np.round(y), 0.0)
    elif scale == "percent":
        y = np.clip(np.round(y, 1), 0.0, 100.0)
    else:
        y = np.round(y, 1)
    return labels, np.where(treat, "treatment", "baseline"), y


def make_review(n_cases: int, seed: int = 20260101) -> pd.DataFrame:
    """Long-format observations of an invented review with exactly ``n_cases`` cases."""
    rng = np.random.default_rng(seed)
    per_case: dict[str, list] = {c: [] for c in ("study", "case", "tier", "design", "outcome_scale",
                                                 "desired_direction", "n", "study_no")}
    series: dict[str, list[np.ndarray]] = {c: [] for c in ("session", "phase", "condition", "outcome")}
    made = 0
    study_no = 0
    while made < n_cases:
        study_no += 1
        design = DESIGNS[rng.choice(len(DESIGNS), p=DESIGN_WEIGHTS)]
        n_study = min(int(rng.integers(3, 7)), n_cases - made)
        scale = ("count", "percent", "rating")[int(rng.integers(0, 3))]
        direction = "increase" if rng.random() < 0.6 else "decrease"
        sd = rng.uniform(*SD_RANGE[scale])
        level = rng.uniform(*LEVEL_RANGE[scale])
        n_min = 12 if design == "ABAB" else 8
        n_shared = int(rng.integers(n_min, 41))
        gaps = rng.random() < 0.2
        shared_sessions = _sessions(rng, n_shared, gaps)
        study = f"Synthetic study {study_no:06d} (invented)"
        for c in range(n_study):
            if design == "multiple_baseline":  # tiers share the sessions, staggered starts
                n = n_shared
                sessions = shared_sessions
                base_len = int(min(3 + 2 * c + rng.integers(0, 2), n - 3))
            else:
                n = int(rng.integers(n_min, 41))
                sessions = _sessions(rng, n, gaps)
                base_len = int(rng.integers(3, n - 2))
            params = (level, rng.normal(0.0, 0.03) * sd, rng.choice([0.0, 1.0, 2.0, 3.0]) * sd,
                      rng.normal(0.0, 0.05) * sd, rng.uniform(-0.2, 0.7), sd, scale, direction,
                      rng.random() < 0.3)
            labels, conditions, y = _case_rows(rng, design, n, sessions, base_len, params)
            for name, value in (("study", study), ("case", f"P{c + 1}"), ("design", design),
                                ("tier", str(c + 1) if design == "multiple_baseline" else ""),
                                ("outcome_scale", scale), ("desired_direction", direction), ("n", n),
                                ("study_no", study_no)):
                per_case[name].append(value)
            series["session"].append(sessions)
            series["phase"].append(labels)
            series["condition"].append(conditions)
            series["outcome"].append(y)
        made += n_study
    n = np.asarray(per_case["n"])
    cols = {}
    for name in COLUMNS:
        if name in series:
            cols[name] = np.concatenate(series[name])
        else:
            cols[name] = np.repeat(np.asarray(per_case[name], dtype=object), n)
    frame = pd.DataFrame(cols)
    frame.attrs["study_no"] = np.repeat(np.asarray(per_case["study_no"]), n)
    return frame


def write_review(n_cases: int, out: Path, seed: int = 20260101, cases_per_file: int = CASES_PER_FILE) -> list[Path]:
    """Write the review as CSV shards of about ``cases_per_file`` cases (whole studies per file)."""
    frame = make_review(n_cases, seed)
    folder = Path(out) / f"review_{n_cases}"
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob("part_*.csv"):
        old.unlink()
    # rows are in case order and studies are contiguous: cut at study starts near each multiple
    case_start = np.flatnonzero(np.r_[True, (frame["study"].to_numpy()[1:] != frame["study"].to_numpy()[:-1])
                                      | (frame["case"].to_numpy()[1:] != frame["case"].to_numpy()[:-1])])
    study = frame.attrs["study_no"][case_start]
    study_first_case = np.r_[0, np.flatnonzero(study[1:] != study[:-1]) + 1]
    shard_of_study = study_first_case // cases_per_file
    cut_cases = study_first_case[np.r_[True, shard_of_study[1:] != shard_of_study[:-1]]]
    cuts = np.r_[case_start[cut_cases], len(frame)]
    paths = []
    for s, (r0, r1) in enumerate(zip(cuts[:-1], cuts[1:])):
        path = folder / f"part_{s:03d}.csv"
        frame.iloc[r0:r1].to_csv(path, index=False, float_format="%.10g")
        paths.append(path)
    return paths


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, nargs="+", default=[5000, 20000, 100000])
    ap.add_argument("--out", type=Path, default=Path("benchmarks/data"))
    ap.add_argument("--seed", type=int, default=20260101)
    args = ap.parse_args(argv)
    for n in args.cases:
        t0 = time.perf_counter()
        paths = write_review(n, args.out, args.seed)
        print(f"{n} cases -> {len(paths)} files in {paths[0].parent} ({time.perf_counter() - t0:.1f} s)")


if __name__ == "__main__":
    main()
