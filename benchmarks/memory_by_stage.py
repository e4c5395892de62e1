"""Peak memory of each stage of one `sced-audit run`, in this process (Linux).

The run's steps (``audit.rerun``: combine_reads, plan_run, assemble_tables, summary_tables,
write_run, write_report ...) are wrapped; before each one the kernel's high-water mark of the
resident size is reset (``/proc/self/clear_refs``) and after it the mark is read
(``VmHWM``), so each figure is the exact peak of that stage, short spikes included. By default
the whole command runs as `sced-audit run --force` (Prefect flow, embedded server in its own
process); ``--no-prefect`` runs the plain sequential path. Invented data only.

    python benchmarks/memory_by_stage.py benchmarks/data/review_100000 --store /tmp/stage-store
"""

from __future__ import annotations

import argparse
import time

STEPS = ("find_inputs", "combine_reads", "plan_run", "case_batch_rows", "assemble_tables",
         "summary_tables", "write_run", "write_report")


def _high_water_mib() -> float:
    with open("/proc/self/status", encoding="ascii") as f:
        for line in f:
            if line.startswith("VmHWM"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError("no VmHWM in /proc/self/status (Linux only)")


def _reset_high_water() -> None:
    with open("/proc/self/clear_refs", "w", encoding="ascii") as f:
        f.write("5")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("review", help="folder of input files (e.g. from make_synthetic_review.py)")
    ap.add_argument("--store", required=True, help="results store folder (a scratch folder)")
    ap.add_argument("--no-prefect", action="store_true", help="the plain sequential path")
    args = ap.parse_args(argv)

    import audit.rerun as rerun

    peaks: list[tuple[str, float]] = []

    def wrapped(name, fn):
        def step(*a, **kw):
            peaks.append((f"between steps, before {name}", _high_water_mib()))
            _reset_high_water()
            out = fn(*a, **kw)
            peaks.append((name, _high_water_mib()))
            _reset_high_water()
            return out
        return step

    for name in STEPS:
        setattr(rerun, name, wrapped(name, getattr(rerun, name)))
    start = time.perf_counter()
    if args.no_prefect:
        from audit.memory import prefer_returnable_allocations

        prefer_returnable_allocations()  # as the command does
        rerun.run_audit([args.review], args.store, force=True)
    else:
        from audit.cli import main as cli

        cli(["run", args.review, "--store", args.store, "--force"])
    print(f"wall {time.perf_counter() - start:.1f} s; peak resident size of this process by stage:")
    for name, mib in peaks:
        print(f"  {name:40s} {mib:8.0f} MiB")
    print(f"  {'overall (largest of the above)':40s} {max(m for _, m in peaks):8.0f} MiB")


if __name__ == "__main__":
    main()
