"""Prefect flow of a whole audit: each task is a thin call into ``audit.rerun`` (plain library).

find files -> read + validate one task per file -> combine -> hash / reuse split ->
diagnose one task per batch of cases (submitted to the task runner) -> summary -> write store
-> report. The plain sequential path :func:`audit.rerun.run_audit` chains the same functions,
so both write the same store content.

Where tasks run: reading input files, planning, summary and writing the store run in the flow's
own process (the input files and the store live there, also when diagnostics go to a remote Dask
cluster); only the diagnose batches are submitted to the task runner (threads by default, or
Prefect's DaskTaskRunner). No task persists results and no task hashes its inputs
(``cache_policy=NONE``): inputs are DataFrames, and reuse is done by the store's content hashes.
Retries: only the file IO tasks (find, read, write store) retry, and only on OSError.
"""

from __future__ import annotations

import hashlib
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from flows import settings as _settings

if "prefect" not in sys.modules and not _settings._OURS:
    _settings.configure()  # our defaults (own home, nothing sent out, quiet) before prefect loads

from prefect import flow, get_run_logger, task  # noqa: E402
from prefect.cache_policies import NONE  # noqa: E402
from prefect.task_runners import ThreadPoolTaskRunner  # noqa: E402
from prefect.utilities.annotations import quote  # noqa: E402

from audit import rerun  # noqa: E402
from audit.config import AuditConfig, load_config  # noqa: E402
from audit.ingest import FileProblem, FileRead  # noqa: E402
from audit.intake import ReviewInput  # noqa: E402
from audit.parallel import default_workers, input_bytes, workers_for_input  # noqa: E402
from audit.store import StoreError  # noqa: E402
from flows import workers as _workers  # noqa: E402

__all__ = [
    "FLOW_NAME",
    "audit_review",
    "build_deployment",
    "deployment_name",
    "prefect_api",
    "run_review",
    "serve_deployment",
    "task_runner_from_spec",
]

FLOW_NAME = "sced-audit-review"
IO_RETRIES = 2
IO_RETRY_DELAY_SECONDS = 1

_progress: Callable[[str, int, int], None] | None = None

_settings.strip_tracebacks()


def _retry_on_io_error(task: Any, task_run: Any, state: Any) -> bool:
    """Retry condition: an OSError (not a store lock or store error) is worth another try."""
    try:
        state.result()
    except StoreError:
        return False
    except OSError:
        return True
    except BaseException:
        return False
    return False


_common: dict[str, Any] = {"cache_policy": NONE, "persist_result": False}
_io: dict[str, Any] = {
    **_common,
    "retries": IO_RETRIES,
    "retry_delay_seconds": IO_RETRY_DELAY_SECONDS,
    "retry_condition_fn": _retry_on_io_error,
}


@task(name="find-input-files", **_io)
def find_files(inputs: list[str]) -> tuple[list[Path], list[FileProblem]]:
    """Input files under the given paths (see audit.rerun.find_inputs)."""
    return rerun.find_inputs(inputs)


@task(name="check-unchanged", **_io)
def check_unchanged(store: str, files: list[Path], path_problems: list, config: AuditConfig,
                    with_report: bool) -> rerun.RunSummary | None:
    return rerun.unchanged_run(store, files, path_problems, config, with_report=with_report)


@task(name="read-input-file", task_run_name="read {path.name}", **_io)
def read_file(path: Path, config: AuditConfig) -> tuple[FileRead, str]:
    """Read and check one input file, with the SHA-256 of its bytes."""
    return rerun.read_and_hash(path, config)


@task(name="combine-and-validate", **_common)
def combine_files(reads: list[FileRead], path_problems: list[FileProblem], config: AuditConfig) -> ReviewInput:
    """Prepare the rows of all files together (validation, repairs, quarantine)."""
    return rerun.combine_reads(reads, path_problems, config)


@task(name="plan-reuse", **_common)
def plan_reuse(review: ReviewInput, store: str, config: AuditConfig) -> rerun.ReusePlan:
    """Hash every case and find the ones the latest committed run already diagnosed."""
    return rerun.plan_run(review, rerun.open_store(store), config)


@task(name="diagnose-batch", task_run_name="diagnose batch {batch_number}", **_common)
def diagnose_batch(observations: Any, alpha: float, batch_number: int, spill_to: str | None = None) -> Any:
    """Diagnostics tables of one batch of cases (in the flow's worker processes when it has them);
    with ``spill_to``, a handle to them written there (``audit.spill``)."""
    return _workers.diagnose(observations, alpha, spill_to)


@task(name="summarize", **_common)
def summarize(review: ReviewInput, plan: rerun.ReusePlan, results: list[dict[str, Any]],
              alpha: float, with_summary: bool = True, store: str | None = None,
              stage_to: str | None = None) -> dict[str, Any]:
    """Every table of the run, with the review summary when audit.summary exists.

    ``results`` is emptied once its tables are assembled (their memory is not held twice). With
    ``store`` and ``stage_to``, the tables the summary does not read are validated and written
    there as soon as they are joined (``rerun.table_stager``)."""
    stage = None if store is None else rerun.table_stager(rerun.open_store(store), stage_to)
    tables = rerun.assemble_tables(review, plan, results, stage)
    results.clear()
    if with_summary:
        tables.update(rerun.summary_tables(tables, alpha, review.prepared.cases))
    return tables


@task(name="write-store", **_io)
def write_store(store: str, review: ReviewInput, plan: rerun.ReusePlan, tables: dict[str, Any],
                config: AuditConfig, input_hashes: dict[str, str], lock_timeout: float = 60.0) -> rerun.RunSummary:
    """Validate, stage and commit the run."""
    return rerun.write_run(rerun.open_store(store), review, plan, tables, config, input_hashes, lock_timeout)


@task(name="write-report", **_common)
def report(store: str, summary: rerun.RunSummary) -> rerun.RunSummary:
    """The HTML report of the run when audit.report exists."""
    return rerun.write_report(rerun.open_store(store), summary)


def _report_progress(stage: str, done: int, total: int) -> None:
    if _progress is not None:
        _progress(stage, done, total)


# Default runner: one thread per core.  A diagnose-batch task hands its batch to the flow's
# DiagnosePool (worker processes, one per core) and waits, so the threads only wait; the batch
# work itself holds the GIL and in-process batches run one at a time (the pool's lock: several
# at once were measured slower than one).  Other machines: --task-runner dask.
DEFAULT_TASK_RUNNER = ThreadPoolTaskRunner(max_workers=default_workers())


@flow(name=FLOW_NAME, persist_result=False, log_prints=False, task_runner=DEFAULT_TASK_RUNNER)
def audit_review(
    inputs: list[str],
    store: str,
    alpha: float | None = None,
    config_file: str | None = None,
    batch_size: int = rerun.DEFAULT_BATCH_SIZE,
    with_summary: bool = True,
    with_report: bool = True,
    lock_timeout: float = 60.0,
    force: bool = False,
    workers: int | None = None,
) -> rerun.RunSummary:
    """Audit every case under ``inputs`` into the results store ``store`` (reusing unchanged cases).

    Unless ``force``, the run stops at once when the latest run used the same input files,
    parameters and code version (``audit.rerun.unchanged_run``): a scheduled rerun without new
    data costs a few file hashes.

    alpha overrides the config file's [analysis] alpha; config_file is a TOML file with column
    and phase-label maps (see audit.config); with_summary / with_report run the review summary
    and the HTML report (when those modules exist). workers: processes for the diagnose
    batches (default one per core for inputs of a few MB or more, else none); with a Dask task
    runner the batches run on the Dask workers instead.
    """
    config = load_config(config_file).with_alpha(alpha)
    if batch_size < 1:
        raise ValueError(f"batch_size must be at least 1, got {batch_size}")
    files, path_problems = find_files(list(inputs))
    if not force:
        same = check_unchanged(store, files, path_problems, config, with_report)
        if same is not None:
            return same
    n_workers = workers_for_input(workers, input_bytes(files))
    if not isinstance(_current_task_runner(), ThreadPoolTaskRunner):
        n_workers = 1  # e.g. Dask: its workers are the processes
    with _workers.pool_for_run(n_workers):
        return _audit_files(files, path_problems, store, config, batch_size, with_summary, with_report,
                            lock_timeout)


def _current_task_runner() -> Any:
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    return None if ctx is None else ctx.task_runner


def _audit_files(files: list[Path], path_problems: list[FileProblem], store: str, config: AuditConfig,
                 batch_size: int, with_summary: bool, with_report: bool, lock_timeout: float) -> rerun.RunSummary:
    reads: list[FileRead] = []
    hashes: dict[str, str] = {}
    for i, path in enumerate(files, start=1):
        read, digest = read_file(path, config)
        reads.append(read)
        hashes[str(read.path)] = digest
        _report_progress("read", i, len(files))
    review = combine_files(reads, path_problems, config)
    plan = plan_reuse(review, store, config)
    if len(plan.to_compute):
        _workers.start()
    # batch results wait on disk until they are joined (audit.spill); not with Dask, whose
    # workers may run on other machines. The joined tables the summary does not read wait there
    # too (validated and written) until the run links them into the store.
    local = isinstance(_current_task_runner(), ThreadPoolTaskRunner)
    with rerun.spill_folder(store) as spill_to:
        spill = str(spill_to) if local else None
        batch_rows = rerun.case_batch_rows(plan.to_compute, batch_size)
        _report_progress("diagnose", 0, len(batch_rows))
        results = []
        # at most two batches per thread of the runner in flight: the rest are not yet cut out
        in_flight = 2 * max(1, getattr(_current_task_runner(), "_max_workers", None) or default_workers())
        for done, tables_of_batch in enumerate(rerun.bounded_results(
                lambda batch, number: diagnose_batch.submit(batch, config.alpha, number, spill),
                plan.to_compute, batch_rows, in_flight), start=1):
            results.append(tables_of_batch)
            _report_progress("diagnose", done, len(batch_rows))
        _workers.close()  # the worker processes' memory goes back before the summary
        if _workers.fallback_reason():
            get_run_logger().warning(_workers.fallback_reason())
        # quote: Prefect does not walk the batch tables (parameter introspection of many frames);
        # the task gets this very list and empties it, so the flow holds no batch tables afterwards
        tables = summarize(review, plan, quote(results), config.alpha, with_summary, store, str(spill_to))
        del results
        summary = write_store(store, review, plan, quote(tables), config, hashes, lock_timeout)
    del tables, review, plan, reads  # the report reads what it needs back from the store
    return report(store, summary) if with_report else summary


# ----------------------------------------------------------------------------------- running


def task_runner_from_spec(spec: str | None) -> Any | None:
    """None (Prefect's thread pool) for None/"threads"; a DaskTaskRunner for "dask" or "dask=ADDRESS".

    Without an address a local Dask cluster is started (one single-threaded worker process per
    core, no dashboard); with one, the runner connects to that scheduler.
    """
    if spec is None or spec in ("threads", "default"):
        return None
    kind, _, address = spec.partition("=")
    if kind != "dask":
        raise ValueError(f"unknown task runner {spec!r}; use 'dask' or 'dask=ADDRESS' (e.g. dask=tcp://host:8786)")
    try:
        from prefect_dask import DaskTaskRunner
    except ModuleNotFoundError:
        raise ValueError(
            "the Dask task runner needs the optional extra: pip install 'sced-audit[dask]' "
            "(prefect-dask and dask[distributed])"
        ) from None
    if address:
        return DaskTaskRunner(address=address)
    workers = max(1, min(os.cpu_count() or 1, 8))
    return DaskTaskRunner(cluster_kwargs={
        "n_workers": workers, "threads_per_worker": 1, "processes": True,
        # loopback only; the dashboard on a free port (None would still bind the default :8787)
        "host": "127.0.0.1", "dashboard_address": "127.0.0.1:0",
    })


@contextmanager
def prefect_api() -> Iterator[str]:
    """The API for this process's flow runs: PREFECT_API_URL, else the embedded local server.

    The embedded server is started once per process (stopped at exit) and its URL is put into
    the settings and the environment for the duration, so task runners in other processes
    (Dask worker processes) report to this server instead of starting their own on the same
    SQLite file.
    """
    from prefect.settings import PREFECT_API_URL, temporary_settings

    url = PREFECT_API_URL.value()
    if url:
        yield url
        return
    from flows import embedded

    url = embedded.api_url()  # one per process (started early by the CLI; stopped at exit)
    previous = os.environ.get("PREFECT_API_URL")
    os.environ["PREFECT_API_URL"] = url
    try:
        with temporary_settings(updates={PREFECT_API_URL: url}):
            yield url
    finally:
        if previous is None:
            os.environ.pop("PREFECT_API_URL", None)
        else:
            os.environ["PREFECT_API_URL"] = previous


def run_review(
    inputs: Sequence[str | Path],
    store: str | Path,
    *,
    alpha: float | None = None,
    config_file: str | Path | None = None,
    batch_size: int = rerun.DEFAULT_BATCH_SIZE,
    task_runner: Any | None = None,
    progress: Callable[[str, int, int], None] | None = None,
    with_summary: bool = True,
    with_report: bool = True,
    lock_timeout: float = 60.0,
    force: bool = False,
    workers: int | None = None,
) -> rerun.RunSummary:
    """Run :func:`audit_review` in this process (embedded server unless PREFECT_API_URL is set).

    task_runner: None, a Prefect task runner, or a spec for :func:`task_runner_from_spec`.
    progress: called as progress(stage, done, total) from the flow ("read" files, "diagnose" batches).
    """
    global _progress
    runner = task_runner_from_spec(task_runner) if isinstance(task_runner, str) else task_runner
    fn = audit_review if runner is None else audit_review.with_options(task_runner=runner)
    previous = _progress
    _progress = progress
    try:
        with prefect_api():
            _settings.strip_tracebacks()
            return fn(
                inputs=[str(p) for p in inputs],
                store=str(store),
                alpha=alpha,
                config_file=None if config_file is None else str(config_file),
                batch_size=int(batch_size),
                with_summary=with_summary,
                with_report=with_report,
                lock_timeout=float(lock_timeout),
                force=bool(force),
                workers=None if workers is None else int(workers),
            )
    finally:
        _progress = previous


# ----------------------------------------------------------------------------------- schedules


def deployment_name(store: str | Path) -> str:
    """A stable deployment name for a store: its folder name plus a short digest of its full path."""
    path = Path(store).expanduser().resolve()
    digest = hashlib.sha1(str(path).encode("utf-8")).hexdigest()[:8]
    base = "".join(ch if ch.isalnum() or ch in "-_" else "-" for ch in path.name) or "store"
    return f"{base}-{digest}"


def build_deployment(
    inputs: Sequence[str | Path],
    store: str | Path,
    cron: str,
    *,
    alpha: float | None = None,
    config_file: str | Path | None = None,
    batch_size: int = rerun.DEFAULT_BATCH_SIZE,
    name: str | None = None,
    timezone: str | None = None,
    workers: int | None = None,
) -> Any:
    """A deployment of :func:`audit_review` with a cron schedule (paths made absolute).

    The entrypoint is the module path ``flows.review.audit_review``, so the runner finds the
    flow whatever its working folder. An invalid cron expression raises ValueError.
    """
    from prefect.client.schemas.schedules import CronSchedule
    from prefect.deployments.runner import EntrypointType

    try:
        schedule = CronSchedule(cron=cron, timezone=timezone) if timezone else CronSchedule(cron=cron)
    except ValueError as exc:  # pydantic's ValidationError is a ValueError
        raise ValueError(f"invalid cron expression {cron!r}: {_first_error(exc)}") from None
    parameters = {
        "inputs": [str(Path(p).expanduser().resolve()) for p in inputs],
        "store": str(Path(store).expanduser().resolve()),
        "alpha": alpha,
        "config_file": None if config_file is None else str(Path(config_file).expanduser().resolve()),
        "batch_size": int(batch_size),
        "workers": None if workers is None else int(workers),
    }
    return audit_review.to_deployment(
        name=name or deployment_name(store),
        schedules=[schedule],
        parameters=parameters,
        description=f"Scheduled sced-audit rerun into {parameters['store']}",
        entrypoint_type=EntrypointType.MODULE_PATH,
    )


def _first_error(exc: Exception) -> str:
    errors = getattr(exc, "errors", None)
    if callable(errors):
        try:
            return str(errors()[0].get("msg", exc))
        except Exception:  # pragma: no cover - defensive
            pass
    return str(exc).splitlines()[0]


def serve_deployment(deployment: Any) -> None:
    """Serve the deployment (blocks until interrupted); needs a real Prefect server."""
    from prefect import serve

    serve(deployment, print_starting_message=False)
