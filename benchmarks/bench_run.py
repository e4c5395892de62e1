"""Wall time and peak memory of the whole ``sced-audit run`` (Prefect, Parquet store, summary, report).

For each review folder given (made by make_synthetic_review.py), each repeat:

  fresh    ``sced-audit run <review> --store <new empty store>``          (everything computed)
  rerun    the same command again on that store, no new data            (nothing to run)
  forced   the same command with --force                                 (every case reused)

A warm-up run on fixtures/demo_small first creates the embedded Prefect server's database (a
one-time cost of a new Prefect home, reported apart).  Each command runs in its own child
process; wall time is measured around it.  Two memory figures:

  peak RSS     the largest single process of the command (``os.wait4``: the command itself, or
               the embedded Prefect server or a diagnose worker when one of those is larger)
  peak tree    the largest memory of the command and all its descendant processes together
               (embedded Prefect server, fork server, diagnose workers): the sum of their
               proportional set sizes (resident pages, a page shared by k processes counted 1/k
               in each), sampled every 0.1 s from /proc (Linux)

Prints one line per command and the medians per review; ``--json FILE`` writes all figures.

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
import threading
import time
from pathlib import Path

from bench_common import load_text


def _command(review: Path, store: Path, extra: list[str]) -> list[str]:
    return [sys.executable, "-m", "audit.cli", "run", str(review), "--store", str(store), *extra]


def _pss_mib(pid: int) -> float:
    """Proportional set size of a process (its resident pages, shared pages divided among sharers)."""
    try:
        with open(f"/proc/{pid}/smaps_rollup", encoding="ascii", errors="replace") as f:
            for line in f:
                if line.startswith("Pss:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return 0.0


def _descendants(root: int) -> list[int]:
    """``root`` and every process below it (from the parent ids in /proc/*/stat)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat", encoding="ascii", errors="replace") as f:
                    ppid = int(f.read().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
            children.setdefault(ppid, []).append(int(entry))
    out, todo = [], [root]
    while todo:
        pid = todo.pop()
        out.append(pid)
        todo.extend(children.get(pid, []))
    return out


def timed(cmd: list[str], env: dict[str, str]) -> tuple[float, float, float, int]:
    """(wall seconds, peak RSS MiB of the largest process, peak tree RSS MiB, exit code) of one command."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    tree_peak = [0.0]
    done = threading.Event()

    def sample() -> None:
        while not done.is_set():
            tree_peak[0] = max(tree_peak[0], sum(_pss_mib(p) for p in _descendants(proc.pid)))
            done.wait(0.1)

    sampler = threading.Thread(target=sample, daemon=True)
    if os.path.isdir("/proc"):
        sampler.start()
    out = proc.stdout.read() if proc.stdout else ""  # (reading first: a full pipe would block the child)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    done.set()
    if sampler.is_alive():
        sampler.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode not in (0, 1):
        raise SystemExit(f"command failed ({proc.returncode}): {' '.join(cmd)}\n{out}")
    return wall, usage.ru_maxrss / 1024.0, tree_peak[0], proc.returncode


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("reviews", nargs="+", type=Path, help="review folders (make_synthetic_review.py)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-report", action="store_true", help="pass --no-report (the report is on by default)")
    ap.add_argument("--no-prefect", action="store_true", help="pass --no-prefect (sequential, no Prefect)")
    ap.add_argument("--workers", type=int, help="pass --workers N (default: the command's own default)")
    ap.add_argument("--json", type=Path, help="write every figure to this file")
    args = ap.parse_args(argv)
    env = dict(os.environ)
    env.setdefault("OPENBLAS_NUM_THREADS", "1")  # steadier on a shared 2-core machine
    env["SCED_AUDIT_PREFECT_HOME"] = tempfile.mkdtemp(prefix="bench-prefect-")
    extra = ((["--no-report"] if args.no_report else []) + (["--no-prefect"] if args.no_prefect else [])
             + ([f"--workers={args.workers}"] if args.workers else []))
    # warm-up: the first start of the embedded server creates its database (a one-time cost)
    warm = Path(tempfile.mkdtemp(prefix="bench-store-"))
    small = Path(__file__).resolve().parent.parent / "fixtures" / "demo_small" / "data"
    wall, _, _, _ = timed(_command(small, warm / "store", extra + ["--no-report"]), env)
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
                    wall, rss, tree, code = timed(_command(review, store, extra + more), env)
                    rows[kind].append({"wall_s": wall, "peak_rss_mib": rss, "peak_tree_mib": tree, "load": load})
                    print(f"{review.name} repeat {rep + 1} {kind:6s}: {wall:7.1f} s, peak RSS {rss:7.0f} MiB, "
                          f"peak tree {tree:7.0f} MiB, {load}", flush=True)
            finally:
                shutil.rmtree(store.parent, ignore_errors=True)
        med = {k: {f: statistics.median(r[f] for r in v) for f in ("wall_s", "peak_rss_mib", "peak_tree_mib")}
               for k, v in rows.items()}
        print(f"{review.name} medians: " + "; ".join(
            f"{k} {m['wall_s']:.1f} s / {m['peak_rss_mib']:.0f} MiB (tree {m['peak_tree_mib']:.0f} MiB)"
            for k, m in med.items()), flush=True)
        results.append({"review": str(review), "runs": rows, "median": med})
    shutil.rmtree(env["SCED_AUDIT_PREFECT_HOME"], ignore_errors=True)
    if args.json:
        args.json.write_text(json.dumps(results, indent=2), encoding="utf-8")


if __name__ == "__main__":
    main()
