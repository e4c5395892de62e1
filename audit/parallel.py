"""Diagnose batches in worker processes.

The batch work is many small array operations that hold the GIL, so threads do not run two
batches at once; processes do. :class:`DiagnosePool` starts its worker processes from a fork
server that has already imported the diagnostics (so a worker starts in a fraction of a
second), hands each batch of observations to a worker and gives back its tables. The tables
are the same as in-process ones: the same function (``audit.rerun.diagnose_batch``) runs on the
same rows.

With one worker (or on a one-core machine) there are no processes: batches run in the calling
thread, one at a time. If a worker dies (killed, out of memory), the batch and every later one
run in-process instead, and ``fallback_reason`` says why: nothing is lost.
"""

from __future__ import annotations

import multiprocessing
import os
import sys
import threading
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from contextlib import contextmanager
from typing import Any

import pandas as pd

MAX_DEFAULT_WORKERS = 8
# Inputs smaller than this run in-process: starting workers would cost more than it saves
# (about 1 s of start-up against a few hundred cases).
MIN_INPUT_BYTES_FOR_WORKERS = 2_000_000
_SINGLE_THREAD_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def available_cores() -> int:
    """Cores this process may run on (the affinity mask where the OS has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def default_workers() -> int:
    """Worker processes when none are asked for: one per available core, at most 8."""
    return min(available_cores(), MAX_DEFAULT_WORKERS)


def workers_for_input(workers: int | None, input_bytes: int) -> int:
    """Workers for a run: ``workers`` when given (at least 1), else the default for large inputs, else 1."""
    if workers is not None:
        if int(workers) < 1:
            raise ValueError(f"workers must be at least 1, got {workers}")
        return int(workers)
    return default_workers() if input_bytes >= MIN_INPUT_BYTES_FOR_WORKERS else 1


def input_bytes(files) -> int:
    """Total size of the input files (unreadable ones count 0)."""
    total = 0
    for f in files:
        try:
            total += os.stat(f).st_size
        except OSError:
            pass
    return total


def _diagnose(observations: pd.DataFrame, alpha: float, spill_to: str | None = None):
    from audit.rerun import diagnose_batch

    return diagnose_batch(observations, alpha, spill_to=spill_to)


def _ready() -> int:
    return os.getpid()


@contextmanager
def _single_threaded_blas():
    """Worker processes get one BLAS thread each (unless set already): n workers on n cores."""
    added = [k for k in _SINGLE_THREAD_ENV if k not in os.environ]
    for k in added:
        os.environ[k] = "1"
    try:
        yield
    finally:
        for k in added:
            os.environ.pop(k, None)


@contextmanager
def _main_script_hidden():
    """While the workers start, the caller's main script looks like an interactive session.

    Workers need nothing from it (they run functions of this module), and a spawned or
    fork-server child would otherwise run the script again, which fails for a script that
    calls into sced-audit at top level (without an ``if __name__ == "__main__"`` guard)."""
    main = sys.modules.get("__main__")
    saved = {a: getattr(main, a) for a in ("__file__", "__spec__") if main is not None and hasattr(main, a)}
    try:
        if "__file__" in saved:
            del main.__file__
        if "__spec__" in saved:
            main.__spec__ = None
        yield
    finally:
        for attr, value in saved.items():
            setattr(main, attr, value)


def _fork_server():
    try:
        from multiprocessing import forkserver
    except ImportError:  # pragma: no cover - Windows
        return None
    return getattr(forkserver, "_forkserver", None)


def _fork_server_pid() -> int | None:
    return getattr(_fork_server(), "_forkserver_pid", None)


def _stop_fork_server() -> None:
    """Stop the fork server process (it holds the imported engine: about 200 MB) once no pool needs it."""
    stop = getattr(_fork_server(), "_stop", None)
    if callable(stop):
        try:
            stop()
        except OSError:  # pragma: no cover - already gone
            pass


def _context() -> multiprocessing.context.BaseContext:
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["audit.diagnose", "audit.rerun"])
        return ctx
    return multiprocessing.get_context("spawn")  # pragma: no cover - Windows


class DiagnosePool:
    """Runs ``audit.rerun.diagnose_batch`` on batches, in ``workers`` processes (or in-process for 1).

    Use as a context manager; :meth:`start` launches the workers early (their start overlaps
    whatever the caller does next); :meth:`submit` returns a Future of the batch's tables.
    """

    def __init__(self, workers: int = 1):
        if int(workers) < 1:
            raise ValueError(f"workers must be at least 1, got {workers}")
        self.workers = int(workers)
        self.fallback_reason: str | None = None
        self._executor: ProcessPoolExecutor | None = None
        self._inline_lock = threading.Lock()
        self._start_lock = threading.Lock()
        self._started_fork_server = False

    @property
    def uses_processes(self) -> bool:
        return self.workers > 1 and self.fallback_reason is None

    def start(self) -> "DiagnosePool":
        """Launch the worker processes now (no-op for one worker or when already started)."""
        with self._start_lock:
            if self._executor is None and self.uses_processes:
                self._started_fork_server = _fork_server_pid() is None
                with _single_threaded_blas(), _main_script_hidden():
                    self._executor = ProcessPoolExecutor(self.workers, mp_context=_context())
                    # the worker processes are launched here (one per waiting call) and import
                    # while the caller goes on
                    for _ in range(self.workers):
                        self._executor.submit(_ready)
        return self

    def submit(self, observations: pd.DataFrame, alpha: float, spill_to: str | None = None) -> Future:
        """A Future of the batch's diagnostics tables (with ``spill_to``: written there by the
        worker, see :mod:`audit.spill`, and a handle to them)."""
        if self.uses_processes:
            self.start()
            try:
                with self._start_lock, _main_script_hidden():  # a submit may launch a worker process
                    inner = self._executor.submit(_diagnose, observations, alpha, spill_to)
            except (BrokenProcessPool, RuntimeError) as exc:
                self._fall_back(exc)
            else:
                return self._guarded(inner, observations, alpha, spill_to)
        return self._inline(observations, alpha, spill_to)

    def run(self, observations: pd.DataFrame, alpha: float, spill_to: str | None = None):
        """The batch's diagnostics tables (blocking)."""
        return self.submit(observations, alpha, spill_to).result()

    def _guarded(self, inner: Future, observations: pd.DataFrame, alpha: float, spill_to: str | None) -> Future:
        """``inner``, or the in-process result when its worker died."""
        outer: Future = Future()

        def done(f: Future) -> None:
            try:
                outer.set_result(f.result())
            except BrokenProcessPool as exc:
                self._fall_back(exc)
                try:
                    outer.set_result(self._inline(observations, alpha, spill_to).result())
                except BaseException as inline_exc:  # noqa: BLE001 - handed to the waiting caller
                    outer.set_exception(inline_exc)
            except BaseException as exc:  # noqa: BLE001 - the batch's own error, handed on
                outer.set_exception(exc)

        inner.add_done_callback(done)
        return outer

    def _inline(self, observations: pd.DataFrame, alpha: float, spill_to: str | None = None) -> Future:
        f: Future = Future()
        with self._inline_lock:  # batches hold the GIL: one at a time is fastest
            try:
                f.set_result(_diagnose(observations, alpha, spill_to))
            except BaseException as exc:  # noqa: BLE001 - handed to the caller through the Future
                f.set_exception(exc)
        return f

    def _fall_back(self, exc: BaseException) -> None:
        if self.fallback_reason is None:
            self.fallback_reason = (f"a diagnose worker process stopped ({type(exc).__name__}: {exc}); "
                                    "the remaining batches ran in the main process")

    def close(self) -> None:
        """Stop the worker processes (and the fork server when this pool started it)."""
        if self._executor is not None:
            executor, self._executor = self._executor, None
            if self.fallback_reason is not None:
                # a broken pool may have closed its queue to workers that are still alive: they
                # would never see the request to stop, so they are stopped here
                for process in list((getattr(executor, "_processes", None) or {}).values()):
                    if process.is_alive():
                        process.kill()
            executor.shutdown(wait=True, cancel_futures=True)
            if self._started_fork_server:
                _stop_fork_server()
                self._started_fork_server = False

    def __enter__(self) -> "DiagnosePool":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()
