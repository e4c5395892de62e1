"""sced-audit: batch audit of serial dependence and trend in single-case series.

A plain library (no Prefect import): ingest, cleaning, validation, statistics,
store, summary and report.
"""

__version__ = "0.1.0"
