"""The `sced-audit` command line.

Exit codes: 0 everything usable; 1 results written or checked, but some input was quarantined;
2 bad invocation or nothing usable (one-line reason, no traceback unless --verbose).
"""

from __future__ import annotations

import argparse
import json
import sys
import traceback
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from audit import __version__
from audit.config import AuditConfig, ConfigError, load_config
from audit.ingest import InputError

if TYPE_CHECKING:
    from audit.rerun import RunSummary

EXIT_OK = 0
EXIT_QUARANTINE = 1
EXIT_UNUSABLE = 2

CAUTION = (
    "Caution: these diagnostics support, and never replace, visual analysis and professional judgment. "
    "Follow your review protocol and local professional standards."
)


class UsageError(Exception):
    """Bad invocation or unusable input: reported in one line, exit code 2."""


def _config(args) -> AuditConfig:
    try:
        config = load_config(getattr(args, "config", None))
        return config.with_alpha(getattr(args, "alpha", None))
    except ConfigError as exc:
        raise UsageError(str(exc)) from None


# ------------------------------------------------------------------ validate

def _validation_document(review) -> dict:
    prep = review.prepared
    quarantined_cases = prep.cases_quarantined
    return {
        "rows_read": prep.rows_read,
        "rows_accepted": prep.rows_accepted,
        "rows_quarantined": prep.rows_quarantined,
        "cases_accepted": int(len(prep.cases)),
        "cases_quarantined": int(len(quarantined_cases)),
        "cases_below_five_point_standard": int(prep.cases["below_five_point_standard"].sum()) if len(prep.cases) else 0,
        "files": review.per_file().to_dict(orient="records"),
        "path_problems": [p.message for p in review.path_problems],
        "quarantined_cases": quarantined_cases.to_dict(orient="records"),
        "quarantine": _records(prep.quarantine),
        "adjustments": _records(prep.adjustments),
    }


def _records(df: pd.DataFrame) -> list[dict]:
    return json.loads(df.to_json(orient="records"))


def print_validation(review, out=None, limit: int = 30) -> None:
    """Human-readable validation report: per-file counts, problems, repairs."""
    out = out or sys.stdout
    prep = review.prepared
    per_file = review.per_file()
    print("Input files", file=out)
    print(_table(per_file), file=out)
    for problem in review.path_problems:
        print(f"! {problem.message}", file=out)
    q = prep.quarantine
    if len(q):
        print(f"\nProblems ({len(q)}; quarantined rows are left out, the other cases go on)", file=out)
        for msg in q["message"].head(limit):
            print(f"  - {msg}", file=out)
        if len(q) > limit:
            print(f"  ... and {len(q) - limit} more (use --json for all)", file=out)
    adj = prep.adjustments
    if len(adj):
        counts = adj["rule"].value_counts()
        summary = ", ".join(f"{rule.replace('_', ' ')}: {n}" for rule, n in counts.items())
        print(f"\nRepairs made ({len(adj)}): {summary}", file=out)
    below = int(prep.cases["below_five_point_standard"].sum()) if len(prep.cases) else 0
    print(
        f"\nRows: {prep.rows_read} read = {prep.rows_accepted} accepted + {prep.rows_quarantined} quarantined. "
        f"Cases: {len(prep.cases)} accepted ({below} with a phase below the usual 5-point standard), "
        f"{len(prep.cases_quarantined)} quarantined.",
        file=out,
    )


def _table(df: pd.DataFrame) -> str:
    if df.empty:
        return "  (none)"
    return df.to_string(index=False)


def cmd_validate(args) -> int:
    from audit.intake import load_review

    config = _config(args)
    try:
        review = load_review(args.paths, config)
    except InputError as exc:
        raise UsageError(str(exc)) from None
    if args.json:
        json.dump(_validation_document(review), sys.stdout, indent=2, default=str)
        print()
    else:
        print_validation(review)
    prep = review.prepared
    if prep.rows_accepted == 0:
        if not args.json:
            print("Nothing usable: no case passed validation.", file=sys.stderr)
        return EXIT_UNUSABLE
    return EXIT_QUARANTINE if (prep.rows_quarantined or len(prep.quarantine) or review.path_problems) else EXIT_OK


# ------------------------------------------------------------------ progress

class Progress:
    """Progress of long work on stderr: a self-updating line on a terminal, a few lines otherwise."""

    LABELS = {"read": ("reading input files", "file(s)"), "diagnose": ("diagnosing cases", "batch(es)")}

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._open = False
        self._last_step: dict[str, int] = {}

    def __call__(self, stage: str, done: int, total: int) -> None:
        label, unit = self.LABELS.get(stage, (stage, "step(s)"))
        if total <= 0:
            return
        text = f"{label}: {done}/{total} {unit}"
        if self.tty:
            self.stream.write("\r" + text.ljust(60))
            self._open = True
            if done >= total:
                self.stream.write("\n")
                self._open = False
            self.stream.flush()
            return
        step = (4 * done) // total  # 0..4: start, each quarter, end
        if stage == "read" and done < total:
            return
        if self._last_step.get(stage) == step:
            return
        self._last_step[stage] = step
        print(text, file=self.stream, flush=True)

    def close(self) -> None:
        if self._open:
            self.stream.write("\n")
            self.stream.flush()
            self._open = False


# ------------------------------------------------------------------ run

def _check_inputs(paths) -> None:
    """Fail early (exit 2) when no input file can be found."""
    from audit.intake import read_files

    try:
        read_files(paths)
    except InputError as exc:
        raise UsageError(str(exc)) from None


def _run_pipeline(args, paths, store, config: AuditConfig, progress: Progress) -> RunSummary:
    """Run the audit with Prefect (default) or the plain sequential path (--no-prefect)."""
    from audit.rerun import run_audit
    from audit.store import StoreError

    batch_size = getattr(args, "batch_size", None) or _default_batch_size()
    if batch_size < 1:
        raise UsageError(f"--batch-size must be at least 1, got {batch_size}")
    runner_spec = getattr(args, "task_runner", None)
    with_report = not getattr(args, "no_report", False)
    lock_timeout = getattr(args, "lock_timeout", None)
    lock_timeout = 60.0 if lock_timeout is None else lock_timeout
    if lock_timeout < 0:
        raise UsageError(f"--lock-timeout must not be negative, got {lock_timeout}")
    if Path(store).exists() and not Path(store).is_dir():
        raise UsageError(f"--store {store} is a file; give a folder for the results store")
    force = bool(getattr(args, "force", False))
    workers = getattr(args, "workers", None)
    if workers is not None and workers < 1:
        raise UsageError(f"--workers must be at least 1, got {workers}")
    try:
        if getattr(args, "no_prefect", False):
            if runner_spec:
                raise UsageError("--task-runner needs Prefect; leave out --no-prefect")
            return run_audit(paths, store, config, progress=progress, batch_size=batch_size, with_report=with_report,
                             lock_timeout=lock_timeout, force=force, workers=workers)
        if not force:  # nothing new: no flow run (and no Prefect server) needed
            from audit.rerun import find_inputs, unchanged_run

            same = unchanged_run(store, *find_inputs(paths), config, with_report=with_report)
            if same is not None:
                return same
        # Prefect lives in flows/ (audit/ stays a plain library): imported only here.
        from flows import embedded
        from flows.settings import configure

        configure(home=getattr(args, "prefect_home", None), verbose=args.verbose)
        embedded.begin()  # the embedded server starts while the imports below run
        from flows.review import run_review, task_runner_from_spec

        try:
            runner = task_runner_from_spec(runner_spec)
        except ValueError as exc:
            raise UsageError(str(exc)) from None
        # the flow loads the config file itself (its parameters stay plain data for deployments)
        return run_review(paths, store, alpha=getattr(args, "alpha", None), config_file=getattr(args, "config", None),
                          batch_size=batch_size, task_runner=runner, progress=progress, with_report=with_report,
                          lock_timeout=lock_timeout, force=force, workers=workers)
    except InputError as exc:
        raise UsageError(str(exc)) from None
    except StoreError as exc:
        raise UsageError(str(exc)) from None
    except OSError as exc:  # unreadable/unwritable paths, an unreachable Dask scheduler ...
        if getattr(args, "verbose", False):
            traceback.print_exc()
        raise UsageError(f"{type(exc).__name__}: {exc}") from None
    finally:
        progress.close()


def _default_batch_size() -> int:
    from audit.rerun import DEFAULT_BATCH_SIZE

    return DEFAULT_BATCH_SIZE


def cmd_run(args) -> int:
    config = _config(args)
    if args.batch_size is not None and args.batch_size < 1:
        raise UsageError(f"--batch-size must be at least 1, got {args.batch_size}")
    _check_inputs(args.paths)
    summary = _run_pipeline(args, args.paths, args.store, config, Progress())
    print(summary.closing_line())
    return EXIT_QUARANTINE if summary.has_quarantine else EXIT_OK


# ------------------------------------------------------------------ runs

def cmd_runs(args) -> int:
    from audit.store import ResultsStore

    folder = Path(args.store)
    if not (folder / "runs.parquet").is_file():
        raise UsageError(f"{folder} holds no committed run (no runs.parquet); "
                         f"run `sced-audit run PATH... --store {folder}` first")
    runs = ResultsStore(folder).runs()
    cols = [c for c in ("run_id", "finished_at", "cases_audited", "cases_reused", "cases_quarantined", "flips",
                        "rows_read", "rows_accepted", "rows_quarantined", "code_version") if c in runs.columns]
    table = runs[cols].copy()
    if args.json:
        json.dump(_records(table), sys.stdout, indent=2, default=str)
        print()
        return EXIT_OK
    if "finished_at" in table.columns:
        table["finished_at"] = table["finished_at"].dt.strftime("%Y-%m-%d %H:%M:%S UTC")
    print(_table(table.astype(object).where(table.notna(), "")))
    print(f"{len(table)} committed run(s) in {folder}")
    return EXIT_OK


# ------------------------------------------------------------------ schedule and server

def _server_home(args) -> Path:
    from flows.settings import default_server_home

    home = getattr(args, "home", None)
    return Path(home).expanduser().resolve() if home else default_server_home()


def _api_url_for_schedule(args) -> str:
    """PREFECT_API_URL when set, else the server started with `sced-audit server start`."""
    import os

    from flows.server import running_api_url

    url = os.environ.get("PREFECT_API_URL")
    if url:
        return url
    home = _server_home(args)
    url = running_api_url(home)
    if url is None:
        raise UsageError(
            "scheduled reruns need a running Prefect server: start one with `sced-audit server start` "
            f"(home {home}), or set PREFECT_API_URL to a server you run"
        )
    return url


def cmd_schedule(args) -> int:
    config = _config(args)
    _check_inputs(args.paths)
    batch_size = args.batch_size or _default_batch_size()
    if batch_size < 1:
        raise UsageError(f"--batch-size must be at least 1, got {batch_size}")
    if args.workers is not None and args.workers < 1:
        raise UsageError(f"--workers must be at least 1, got {args.workers}")
    url = _api_url_for_schedule(args)
    from flows.settings import configure

    configure(home=getattr(args, "prefect_home", None), verbose=args.verbose, api_url=url)
    from flows.review import build_deployment, serve_deployment

    try:
        deployment = build_deployment(
            args.paths, args.store, args.cron,
            alpha=args.alpha, config_file=args.config, batch_size=batch_size, name=args.name, timezone=args.timezone,
            workers=args.workers,
        )
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    print(f"Serving deployment '{deployment.flow_name}/{deployment.name}' on {url}: cron '{args.cron}'"
          f"{' (' + args.timezone + ')' if args.timezone else ' (UTC)'}; results go to {Path(args.store).resolve()}. "
          "Press Ctrl-C to stop (the schedule is paused when serving stops).", flush=True)
    serve_deployment(deployment)
    return EXIT_OK


def cmd_server(args) -> int:
    import os

    from flows.server import DEFAULT_PORT, ServerError, server_start, server_status, server_stop

    home = _server_home(args)
    user_url = os.environ.get("PREFECT_API_URL")
    if args.action == "start":
        port = args.port or DEFAULT_PORT
        try:
            info = server_start(home, port=port, timeout=args.timeout, verbose=args.verbose)
        except ServerError as exc:
            raise UsageError(str(exc)) from None
        print(f"Prefect server running at {info.ui_url} (pid {info.pid}, home {info.home}, log {info.log}).")
        print(f"`sced-audit schedule` finds it by itself; other tools: export PREFECT_API_URL={info.api_url}")
        if user_url and user_url != info.api_url:
            print(f"Note: PREFECT_API_URL is set to {user_url}; sced-audit uses that server while it is set.")
        return EXIT_OK
    if args.action == "stop":
        info = server_stop(home)
        print(f"Stopped the Prefect server (pid {info.pid}, port {info.port})." if info
              else f"No Prefect server started by sced-audit is running in {home}.")
        return EXIT_OK
    info = server_status(home)
    if user_url:
        print(f"PREFECT_API_URL is set: sced-audit uses {user_url}.")
    if info is None:
        print(f"No Prefect server started by sced-audit is running in {home}.")
        return 1
    print(f"Prefect server running at {info.ui_url} (pid {info.pid}, since {info.started_at}, home {info.home}).")
    return EXIT_OK


# ------------------------------------------------------------------ demo

_DEMO_FILES = {"data", "README.txt", "truth.csv", "artefacts.csv", "store"}


def _is_earlier_demo(folder: Path) -> bool:
    """The folder holds an earlier demo (its data, sidecar files and store only)."""
    if not folder.is_dir() or not any(folder.iterdir()):
        return False
    names = {p.name for p in folder.iterdir()}
    readme = folder / "README.txt"
    if not names <= _DEMO_FILES or not readme.is_file():
        return False
    first = readme.read_text(encoding="utf-8", errors="replace").split("\n", 1)[0]
    return first.startswith("sced-audit ") and first.endswith("(invented data)")


def cmd_demo(args) -> int:
    from audit.demo import write_demo_review
    from audit.intake import load_review

    folder = Path(args.dir)
    try:
        demo = write_demo_review(folder, overwrite=_is_earlier_demo(folder))
    except FileExistsError as exc:
        raise UsageError(str(exc)) from None
    print(f"Wrote an invented demo review to {demo.data_folder} ({len(demo.files)} files). All studies are fictional.")
    review = load_review([demo.data_folder], AuditConfig())
    prep = review.prepared
    print(
        f"Input: {prep.rows_read} rows read = {prep.rows_accepted} accepted + {prep.rows_quarantined} quarantined; "
        f"{len(prep.cases)} cases accepted, {len(prep.cases_quarantined)} quarantined, "
        f"{len(prep.adjustments)} repairs logged (`sced-audit validate {demo.data_folder}` lists them)."
    )
    summary = _run_pipeline(args, [demo.data_folder], folder / "store", AuditConfig(), Progress())
    print(summary.closing_line())
    try:
        from audit.summary import load_summary

        overall = load_summary(summary.store).get("summary_overall")
        if overall is not None and len(overall):
            print(f"\n{overall['answer'].iloc[0]}\n")
    except Exception as exc:  # the summary is a bonus here; the run itself is committed
        print(f"(summary not shown: {exc})")
    print(f"Read the results with pandas: pd.read_parquet('{summary.store / 'cases'}'), "
          f"or `sced-audit summary --store {summary.store} --by study`.")
    print(f"\n{CAUTION}")
    return EXIT_OK


# ------------------------------------------------------------------ summary and report

def cmd_summary(args) -> int:
    from audit.summary import cmd_summary as run

    return run(args)


def cmd_report(args) -> int:
    from audit.report import cmd_report as run

    return run(args)


# ------------------------------------------------------------------ entry point

def _add_analysis_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--alpha", type=float, metavar="A", help="significance level (default 0.05 or the config's)")
    p.add_argument("--config", metavar="FILE", help="TOML file with column and phase-label maps")
    p.add_argument("--batch-size", type=int, metavar="N", help="cases per diagnose task (default 2000; larger batches share more design algebra)")
    p.add_argument("--lock-timeout", type=float, metavar="SECONDS",
                   help="how long to wait for another run writing the same store (default 60)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="processes for the diagnose batches (default one per core for inputs of 2 MB "
                        "or more, else none; 1 = in this process)")


def _add_common(p: argparse.ArgumentParser, prefect: bool = True) -> None:
    p.add_argument("--verbose", action="store_true", default=argparse.SUPPRESS, help="full logs and tracebacks")
    if prefect:
        p.add_argument("--prefect-home", metavar="DIR",
                       help="Prefect home for the embedded server (default $SCED_AUDIT_PREFECT_HOME "
                            "or ~/.sced-audit/prefect)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sced-audit",
        description="Batch audit of serial dependence and trend in digitized single-case series.",
        epilog="Exit codes: 0 ok; 1 ok, but some input was quarantined; 2 bad invocation or unusable input.",
    )
    parser.add_argument("--version", action="version", version=f"sced-audit {__version__}")
    parser.add_argument("--verbose", action="store_true", help="full logs and tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("validate", help="check input files without writing results")
    p.add_argument("paths", nargs="+", metavar="PATH", help="files or folders (searched recursively)")
    p.add_argument("--config", metavar="FILE", help="TOML file with column and phase-label maps")
    p.add_argument("--json", action="store_true", help="print a JSON document instead of tables")
    p.set_defaults(func=cmd_validate)

    p = sub.add_parser("run", help="audit every case and write a run into a results store")
    p.add_argument("paths", nargs="+", metavar="PATH", help="files or folders (searched recursively)")
    p.add_argument("--store", required=True, metavar="DIR", help="results store folder (created if missing)")
    _add_analysis_options(p)
    p.add_argument("--task-runner", metavar="dask[=ADDRESS]",
                   help="run the diagnose batches on Dask: a local cluster, or the scheduler at ADDRESS "
                        "(needs the 'dask' extra)")
    p.add_argument("--no-prefect", action="store_true",
                   help="run sequentially in this process without Prefect (same results)")
    p.add_argument("--no-report", action="store_true", help="skip the HTML report")
    p.add_argument("--force", action="store_true",
                   help="run even when the latest run used the same input files, parameters and code version")
    _add_common(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("runs", help="list the committed runs of a results store")
    p.add_argument("--store", required=True, metavar="DIR", help="results store folder")
    p.add_argument("--json", action="store_true", help="print JSON records instead of a table")
    _add_common(p, prefect=False)
    p.set_defaults(func=cmd_runs)

    p = sub.add_parser("summary", help="how often serial dependence would change the review's conclusions")
    p.add_argument("--store", required=True, metavar="DIR", help="results store")
    p.add_argument("--run", default="latest", metavar="ID", help="run id (default: latest)")
    p.add_argument("--by", choices=["study", "design", "scale"],
                   help="table to show: screening by study, or pooled AR(1) and flips by design / outcome scale")
    p.add_argument("--json", action="store_true", help="print every summary table as JSON")
    p.set_defaults(func=cmd_summary)

    p = sub.add_parser("report", help="write the self-contained HTML report of a run")
    p.add_argument("--store", required=True, metavar="DIR", help="results store")
    p.add_argument("--out", metavar="FILE", help="output file (default: <store>/sced-audit-report-<run>.html)")
    p.add_argument("--run", default="latest", metavar="ID", help="run id (default: latest)")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("schedule", help="serve scheduled reruns (cron) against a Prefect server")
    p.add_argument("paths", nargs="+", metavar="PATH", help="files or folders (searched recursively)")
    p.add_argument("--store", required=True, metavar="DIR", help="results store folder")
    p.add_argument("--cron", required=True, metavar="EXPR", help="cron expression, e.g. '0 3 * * *' (03:00 daily)")
    p.add_argument("--timezone", metavar="TZ", help="time zone of the cron expression (default UTC), e.g. Europe/Paris")
    p.add_argument("--name", metavar="NAME", help="deployment name (default: from the store folder)")
    p.add_argument("--home", metavar="DIR",
                   help="home of the server started by `sced-audit server start` (when PREFECT_API_URL is unset)")
    _add_analysis_options(p)
    _add_common(p)
    p.set_defaults(func=cmd_schedule)

    p = sub.add_parser("server", help="start, stop or check a local Prefect server (for scheduled reruns)")
    p.add_argument("action", choices=["start", "stop", "status"])
    p.add_argument("--home", metavar="DIR",
                   help="the server's own Prefect home (default $SCED_AUDIT_SERVER_HOME or ~/.sced-audit/prefect-server)")
    p.add_argument("--port", type=int, metavar="P", help="port on 127.0.0.1 (default 4200)")
    p.add_argument("--timeout", type=float, default=120.0, metavar="S", help="seconds to wait for start-up (default 120)")
    _add_common(p, prefect=False)
    p.set_defaults(func=cmd_server)

    p = sub.add_parser("demo", help="write an invented demo review and audit it into <DIR>/store")
    p.add_argument("--dir", default="sced-audit-demo", metavar="DIR", help="folder for the demo (default: %(default)s)")
    p.add_argument("--no-prefect", action="store_true", help="run without Prefect (same results)")
    _add_common(p)
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: list[str] | None = None) -> int:
    from audit.memory import prefer_returnable_allocations

    prefer_returnable_allocations()  # large temporary tables go back to the system when freed
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_UNUSABLE
    try:
        return int(args.func(args))
    except UsageError as exc:
        print(f"sced-audit: error: {exc}", file=sys.stderr)
        return EXIT_UNUSABLE
    except KeyboardInterrupt:
        print("sced-audit: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: short message, traceback on request
        if args.verbose:
            traceback.print_exc()
        else:
            print(f"sced-audit: internal error: {type(exc).__name__}: {exc} (rerun with --verbose for details)",
                  file=sys.stderr)
        return 3


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
