"""Subprocess used by tests/test_store.py: write a run and pause at an injected point to be killed.

Usage: python store_crash_helper.py STORE READY_FILE
Env SCED_STORE_CRASH_POINT = "<point>" or "<point>:<n>" (pause at the n-th time the store reaches
that point; see audit.store._fault_point). When it pauses, the run id is written to READY_FILE
and the process sleeps until killed. Without the variable the run commits normally.
"""

import os
import sys
import time
from pathlib import Path

import pandas as pd

import audit.store as store_mod


def frame(tag: str, n: int = 30) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "case": [f"{tag}-{i}" for i in range(n)],
            "case_hash": [f"h{i}" for i in range(n)],
            "value": [float(i) + (0.5 if tag == "crash" else 0.0) for i in range(n)],
        }
    )


def main() -> None:
    root, ready = Path(sys.argv[1]), Path(sys.argv[2])
    spec = os.environ.get("SCED_STORE_CRASH_POINT", "")
    point, _, nth = spec.partition(":")
    target = int(nth or 1)
    seen = {"n": 0}
    run_id = {"id": ""}

    def hook(name: str) -> None:
        if name != point:
            return
        seen["n"] += 1
        if seen["n"] == target:
            tmp = ready.with_suffix(".tmp")
            tmp.write_text(run_id["id"])
            os.replace(tmp, ready)
            time.sleep(120)  # wait to be killed

    store_mod._fault_point = hook
    store = store_mod.ResultsStore(root, row_group_size=10)
    with store.begin_run({"who": "helper"}, "helper", {}, lock_timeout=10) as run:
        run_id["id"] = run.run_id
        run.write_table("cases", frame("crash"))
        run.write_table("phases", frame("crash"))
        run.commit({"cases_audited": 30})
    ready.write_text(run_id["id"])


if __name__ == "__main__":
    main()
