"""Small builders for test input files (hand-written rows; no statistics is checked with them)."""

from __future__ import annotations

from pathlib import Path

HEADER = "study,case,session,outcome,phase"


def ab_rows(study="S1", case="c1", n_a=5, n_b=5, start=1, a_level=10.0, b_level=20.0, extra="") -> list[str]:
    """Rows of a clean AB case as CSV lines (no header)."""
    rows = []
    s = start
    for i in range(n_a):
        rows.append(f"{study},{case},{s},{a_level + (i % 3)},A{extra}")
        s += 1
    for i in range(n_b):
        rows.append(f"{study},{case},{s},{b_level + (i % 3)},B{extra}")
        s += 1
    return rows


def write_csv(path: Path, lines: list[str], header: str = HEADER, encoding: str = "utf-8") -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(("\n".join([header] + lines) + "\n").encode(encoding))
    return path
