"""Wall time and peak memory of the whole ``sced-audit run`` (Prefect, Parquet store, summary, report).

For each review folder given (made by make_synthetic_review.py), each repeat:

  fresh    ``sced-audit run <review> --store <new empty store>``          (everything computed)
  rerun    the same command again on that store, no new data            (nothing to run)
  forced   the same command with --force                                 (every case reused)

A warm-up run on fixtures/demo_small first creates the embedded Prefect server's database (a
one-time cost of a new Prefect home, reported apart).  Each command runs in its own child process; wall time is measured around it and the peak
resident set size is the child's (``os.wait4``; the largest single process of the command,
which includes the embedded Prefect server process when it is larger).  Prints one line per
command and the medians per review; ``--json FILE`` writes all figures.

    python benchmarks/bench_run.py benchmarks/data/review_5000 benchmarks/data/review_20000 --repeats 3
    python benchmarks/bench_run.py benchmarks/data/review_100000 --repeats 1 --no-report
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from bench_common import load_text


def _command(review: Path, store: Path, extra: list[str]) -> list[str]:
    return [sys.executable, "-m", "audit.cli", "run", str(review), "--store", str(store), *extra]


def timed(cmd: list[str], env: dict[str, str]) -> tuple[float, float, int]:
    """(wall seconds, peak RSS MiB, exit code) of one command in a child process."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    out = proc.stdout.read() if proc.stdout else ""
    if proc.returncode not in (0, 1):
        raise SystemExit(f"command failed ({proc.returncode}): {' '.join(cmd)}\n{out}")
    return wall, usage.ru_maxrss / 1024.0, proc.returncode


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("reviews", nargs="+", type=Path, help="review folders (make_synthetic_review.py)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-report", action="store_true", help="pass --no-report (the report is on by default)")
    ap.add_argument("--no-prefect", action="store_true", help="pass --no-prefect (sequential, no Prefect)")
    ap.add_argument("--json", type=Path, help="write every figure to this file")
    args = ap.parse_args(argv)
    env = dict(os.environ)
    env.setdefault("OPENBLAS_NUM_THREADS", "1")  # steadier on a shared 2-core machine
    env["SCED_AUDIT_PREFECT_HOME"] = tempfile.mkdtemp(prefix="bench-prefect-")
    extra = (["--no-report"] if args.no_report else []) + (["--no-prefect"] if args.no_prefect else [])
    # warm-up: the first start of the embedded server creates its database (a one-time cost)
    warm = Path(tempfile.mkdtemp(prefix="bench-store-"))
    small = Path(__file__).resolve().parent.parent / "fixtures" / "demo_small" / "data"
    wall, _, _ = timed(_command(small, warm / "store", extra + ["--no-report"]), env)
    shutil.rmtree(warm, ignore_errors=True)
    print(f"warm-up on fixtures/demo_small (creates the Prefect database once): {wall:.1f} s", flush=True)
    results = []
    for review in args.reviews:
        rows = {"fresh": [], "rerun": [], "forced": []}
        for rep in range(args.repeats):
            store = Path(tempfile.mkdtemp(prefix="bench-store-")) / "store"
            try:
                for kind, more in (("fresh", []), ("rerun", []), ("forced", ["--force"])):
                    load = load_text()
                    wall, rss, code = timed(_command(review, store, extra + more), env)
                    rows[kind].append({"wall_s": wall, "peak_rss_mib": rss, "load": load})
                    print(f"{review.name} repeat {rep + 1} {kind:6s}: {wall:7.1f} s, peak RSS {rss:7.0f} MiB, "
                          f"{load}", flush=True)
            finally:
                shutil.rmtree(store.parent, ignore_errors=True)
        med = {k: {"wall_s": statistics.median(r["wall_s"] for r in v),
                   "peak_rss_mib": statistics.median(r["peak_rss_mib"] for r in v)} for k, v in rows.items()}
        print(f"{review.name} medians: " + "; ".join(f"{k} {m['wall_s']:.1f} s / {m['peak_rss_mib']:.0f} MiB"
                                                  for k, m in med.items()), flush=True)
        results.append({"review": str(review), "runs": rows, "median": med})
    shutil.rmtree(env["SCED_AUDIT_PREFECT_HOME"], ignore_errors=True)
    if args.json:
        args.json.write_text(json.dumps(results, indent=2), encoding="utf-8")


if __name__ == "__main__":
    main()
