"""Prefect orchestration of sced-audit (the only package that imports prefect).

flows.settings  Prefect's environment, applied before prefect is imported (import it first).
flows.review    the ``audit_review`` flow, ``run_review`` and scheduled deployments.
flows.server    start / stop / status of a local Prefect server for scheduled reruns.

Importing this package does not import prefect.
"""
