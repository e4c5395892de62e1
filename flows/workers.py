"""The diagnose worker processes of the flow run in progress (``audit.parallel.DiagnosePool``).

Kept in a module of its own so that a task shipped to another process (Dask pickles the task
function) refers to this module by name and finds no pool there: the batch then runs in that
process.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from audit import rerun
from audit.parallel import DiagnosePool

_pool: DiagnosePool | None = None


def diagnose(observations: Any, alpha: float, spill_to: str | None = None) -> Any:
    """The batch's tables: in the run's worker processes when it has them, else here (with
    ``spill_to``: written there, and a handle to them)."""
    pool = _pool
    if pool is None:
        return rerun.diagnose_batch(observations, alpha, spill_to=spill_to)
    return pool.run(observations, alpha, spill_to)


@contextmanager
def pool_for_run(workers: int) -> Iterator[DiagnosePool]:
    """A pool of ``workers`` processes for the duration of one flow run; :func:`start` launches
    them (after intake, whose memory peak they would add to), else the first batch does."""
    global _pool
    previous, _pool = _pool, DiagnosePool(workers)
    try:
        yield _pool
    finally:
        _pool.close()
        _pool = previous


def start() -> None:
    """Launch the current run's worker processes (they start while the first batches are cut)."""
    if _pool is not None:
        _pool.start()


def close() -> None:
    """Stop the current run's worker processes early (their memory goes back before the summary)."""
    if _pool is not None:
        _pool.close()


def fallback_reason() -> str | None:
    return None if _pool is None else _pool.fallback_reason
