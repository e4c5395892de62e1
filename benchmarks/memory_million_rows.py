"""Peak memory and wall time of intake (ingest + repairs + validation) on a 1,000,000-row input.

Writes an invented review as one CSV file (50,000 AB cases of 20 points by default) in a
temporary folder, then runs each stage in a fresh child process and reports the child's peak
resident set size (``os.wait4`` per child, and ``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss``
over all children) and its wall time:

  imports    python -c "import audit.intake, audit.diagnose"   (the floor: libraries alone)
  intake     audit.intake.load_review on the file
  diagnose   load_review, then audit.diagnose.diagnose_cases on the accepted observations (--diagnose)

``--stages`` adds, inside the intake child, the peak RSS after each step (read the file,
prepare the rows) and, with ``--tracemalloc``, the Python-heap peak of each step.

    python benchmarks/memory_million_rows.py                       # intake only
    python benchmarks/memory_million_rows.py --diagnose --stages   # also the diagnostics
    python benchmarks/memory_million_rows.py --rows 200000         # smaller
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()
ROOT = HERE.parent.parent


def write_review(path: Path, rows: int, points: int, seed: int = 20240601) -> tuple[int, int]:
    """Invented AB cases (half baseline, half treatment), 100 cases per study; returns (rows, cases)."""
    rng = np.random.default_rng(seed)
    cases = max(rows // points, 1)
    half = points // 2
    chunk = 5_000  # cases per write
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write("study,case,session,outcome,phase,outcome_scale,desired_direction\n")
        for first in range(0, cases, chunk):
            idx = np.arange(first, min(first + chunk, cases))
            case_col = np.repeat(idx, points)
            session = np.tile(np.arange(1, points + 1), idx.size)
            treat = np.tile(np.arange(points) >= half, idx.size)
            level = np.repeat(rng.uniform(10, 60, idx.size), points)
            effect = np.repeat(rng.uniform(0, 25, idx.size), points)
            noise = np.empty(case_col.size)
            e = rng.normal(0, 5, (idx.size, points))
            for t in range(1, points):  # AR(1) errors, rho = 0.3
                e[:, t] += 0.3 * e[:, t - 1]
            noise[:] = e.ravel()
            outcome = np.clip(np.round(level + effect * treat + noise, 1), 0, 100)
            lines = [
                f"Study {c // 100:04d},case {c:06d},{s},{y:.1f},{'B' if b else 'A'},percent,increase"
                for c, s, y, b in zip(case_col.tolist(), session.tolist(), outcome.tolist(), treat.tolist())
            ]
            fh.write("\n".join(lines))
            fh.write("\n")
    return cases * points, cases


# --------------------------------------------------------------------------- children


def _rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kilobytes


def child_intake(csv: str, stages: bool, trace: bool, diagnose: bool) -> dict:
    """Run in a fresh process: intake (and diagnostics); print what happened as JSON."""
    if trace:
        import tracemalloc

        tracemalloc.start()
    t0 = time.perf_counter()
    from audit.config import AuditConfig
    from audit.ingest import read_input_file
    from audit.intake import combine, read_files

    out: dict = {"after_imports_mib": _rss_mib(), "import_s": time.perf_counter() - t0}
    config = AuditConfig()
    t1 = time.perf_counter()
    files, path_problems = read_files([csv])
    reads = [read_input_file(f, config) for f in files]
    if stages:
        out["after_read_mib"] = _rss_mib()
        out["read_s"] = time.perf_counter() - t1
        if trace:
            out["read_heap_peak_mib"] = tracemalloc.get_traced_memory()[1] / 2**20
            tracemalloc.reset_peak()
    t2 = time.perf_counter()
    review = combine(reads, path_problems, config)
    del reads
    prep = review.prepared
    out.update({
        "intake_s": time.perf_counter() - t1,
        "rows_read": prep.rows_read, "rows_accepted": prep.rows_accepted, "rows_quarantined": prep.rows_quarantined,
        "cases_accepted": int(len(prep.cases)), "after_intake_mib": _rss_mib(),
    })
    if stages:
        out["prepare_s"] = time.perf_counter() - t2
        if trace:
            out["prepare_heap_peak_mib"] = tracemalloc.get_traced_memory()[1] / 2**20
            tracemalloc.reset_peak()
    if diagnose:
        from audit.diagnose import diagnose_cases

        obs = prep.observations
        del review, prep
        t3 = time.perf_counter()
        tables = diagnose_cases(obs)
        out["diagnose_s"] = time.perf_counter() - t3
        out["cases_diagnosed"] = int(len(tables["cases"]))
        out["after_diagnose_mib"] = _rss_mib()
        if trace:
            out["diagnose_heap_peak_mib"] = tracemalloc.get_traced_memory()[1] / 2**20
    out["total_s"] = time.perf_counter() - t0
    return out


def run_child(args: list[str]) -> dict:
    """Start this script as a child; return its JSON, wall time and peak RSS (os.wait4)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, str(HERE), *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env=env, text=True)
    out, err = proc.stdout.read(), proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"child {args} failed with exit code {proc.returncode}:\n{err[-3000:]}")
    result = json.loads(out.strip().splitlines()[-1]) if out.strip() else {}
    result["wall_s"] = wall
    result["peak_rss_mib"] = usage.ru_maxrss / 1024.0
    return result


# --------------------------------------------------------------------------- main


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000, help="rows to generate (default 1,000,000)")
    parser.add_argument("--points", type=int, default=20, help="points per case (default 20)")
    parser.add_argument("--diagnose", action="store_true", help="also run diagnose_cases in a child")
    parser.add_argument("--stages", action="store_true", help="peak RSS after each intake step")
    parser.add_argument("--tracemalloc", action="store_true", help="Python-heap peaks per step (slow)")
    parser.add_argument("--keep", metavar="DIR", help="write the CSV here and keep it")
    parser.add_argument("--child", choices=["imports", "intake"], help=argparse.SUPPRESS)
    parser.add_argument("--csv", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    if args.child == "imports":
        t0 = time.perf_counter()
        import audit.diagnose  # noqa: F401
        import audit.intake  # noqa: F401

        print(json.dumps({"import_s": time.perf_counter() - t0}))
        return 0
    if args.child == "intake":
        print(json.dumps(child_intake(args.csv, args.stages, args.tracemalloc, args.diagnose)))
        return 0

    folder_ctx = tempfile.TemporaryDirectory(prefix="sced-audit-memory-") if not args.keep else None
    folder = Path(args.keep) if args.keep else Path(folder_ctx.name)
    folder.mkdir(parents=True, exist_ok=True)
    csv = folder / "million_rows.csv"
    t0 = time.perf_counter()
    n_rows, n_cases = write_review(csv, args.rows, args.points)
    gen_s = time.perf_counter() - t0
    size_mib = csv.stat().st_size / 2**20
    print(f"input: {n_rows:,} rows, {n_cases:,} cases of {args.points} points, {size_mib:,.1f} MiB CSV "
          f"(written in {gen_s:.1f} s) in {folder}")

    results = {"imports": run_child(["--child", "imports"])}
    flags = (["--stages"] if args.stages else []) + (["--tracemalloc"] if args.tracemalloc else [])
    results["intake"] = run_child(["--child", "intake", "--csv", str(csv), *flags])
    if args.diagnose:
        results["intake + diagnose"] = run_child(["--child", "intake", "--csv", str(csv), "--diagnose", *flags])
    children_max = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0

    intake = results["intake"]
    assert intake["rows_read"] == n_rows == intake["rows_accepted"] + intake["rows_quarantined"], intake
    print()
    print(f"{'stage':<20}{'peak RSS (MiB)':>16}{'wall (s)':>10}{'work (s)':>10}  detail")
    for name, r in results.items():
        work = r.get("diagnose_s", r.get("intake_s", r.get("import_s", float("nan"))))
        detail = ""
        if "rows_read" in r:
            detail = (f"rows read {r['rows_read']:,} = accepted {r['rows_accepted']:,} + quarantined "
                      f"{r['rows_quarantined']:,}; cases {r['cases_accepted']:,}")
        if "cases_diagnosed" in r:
            detail += f"; intake {r['intake_s']:.1f} s, diagnose {r['diagnose_s']:.1f} s ({r['cases_diagnosed']:,} cases)"
        print(f"{name:<20}{r['peak_rss_mib']:>16,.0f}{r['wall_s']:>10.1f}{work:>10.1f}  {detail}")
    print(f"{'max over children':<20}{children_max:>16,.0f}   (resource.getrusage(RUSAGE_CHILDREN).ru_maxrss)")
    if args.stages:
        print("\nintake steps (peak RSS so far, MiB): "
              f"imports {intake['after_imports_mib']:,.0f}, read {intake['after_read_mib']:,.0f} "
              f"({intake['read_s']:.1f} s), prepare {intake['after_intake_mib']:,.0f} ({intake['prepare_s']:.1f} s)")
        if args.tracemalloc:
            print(f"Python-heap peaks (MiB): read {intake['read_heap_peak_mib']:,.0f}, "
                  f"prepare {intake['prepare_heap_peak_mib']:,.0f}")
        if args.diagnose:
            d = results["intake + diagnose"]
            print(f"diagnose child: after intake {d['after_intake_mib']:,.0f}, after diagnose {d['after_diagnose_mib']:,.0f}")
    if folder_ctx is not None:
        folder_ctx.cleanup()
    return 0


if __name__ == "__main__":
    sys.exit(main())
