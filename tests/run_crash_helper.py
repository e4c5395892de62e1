"""Subprocess for tests/test_crash_and_concurrency.py: run `sced-audit run` and pause at a point to be killed.

Usage: python run_crash_helper.py INPUT STORE READY_FILE POINT [LOCK_TIMEOUT]
POINT is "diagnose" (inside the first diagnose batch) or a store step named in audit.store._fault_point
("row_group", "commit_begin", "moved", "moves_done", "ledger_tmp_written"). When the run reaches it, READY_FILE
is written and the process sleeps until killed. POINT "none" runs to the end.
"""

import os
import sys
import time
from pathlib import Path

import audit.diagnose as diagnose_mod
import audit.store as store_mod
from audit.cli import main


def pause(ready: Path) -> None:
    tmp = ready.with_suffix(".tmp")
    tmp.write_text("paused")
    os.replace(tmp, ready)
    time.sleep(300)  # wait to be killed


def run() -> int:
    inputs, store, ready, point = sys.argv[1], sys.argv[2], Path(sys.argv[3]), sys.argv[4]
    lock_timeout = sys.argv[5] if len(sys.argv) > 5 else "10"
    if point == "diagnose":
        real = diagnose_mod.diagnose_cases

        def slow(*args, **kwargs):
            out = real(*args, **kwargs)
            pause(ready)
            return out

        diagnose_mod.diagnose_cases = slow
    elif point != "none":
        def hook(name: str) -> None:
            if name == point:
                pause(ready)

        store_mod._fault_point = hook
    return main(["run", inputs, "--store", store, "--no-prefect", "--no-report", "--force", "--lock-timeout", lock_timeout])


if __name__ == "__main__":
    sys.exit(run())
