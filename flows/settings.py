"""Prefect settings for sced-audit, applied through environment variables BEFORE prefect is imported.

Prefect 3 reads its settings from the environment when ``prefect`` is first imported (and
starts its local server with that environment), so :func:`configure` must run first. If prefect
is already imported, :func:`configure` refreshes Prefect's global settings and logging too.

What is set, and why (a value the user already set in the environment is kept):

- ``PREFECT_HOME``: our own folder (``--prefect-home``, else ``SCED_AUDIT_PREFECT_HOME``, else
  ``~/.sced-audit/prefect``), so the embedded server's SQLite file is never shared with another
  Prefect project. ``PREFECT_API_URL``, when set by the user, is used as is (a real server).
- Nothing leaves the machine: ``PREFECT_SERVER_ANALYTICS_ENABLED=false`` (the server's telemetry
  heartbeat, which otherwise logs an ERROR when offline) and ``DO_NOT_TRACK=1`` (client SDK
  events).
- Quiet by default: ``PREFECT_LOGGING_LEVEL=WARNING`` (no per-task INFO lines, no "Starting
  temporary server") and ``DASK_LOGGING__DISTRIBUTED=error`` (Dask warns when a worker process
  is slow to exit after the work is done); ``--verbose`` sets INFO for both. Without --verbose, tracebacks are stripped from
  Prefect's console records (the CLI reports errors in one line).
- Embedded (ephemeral) server only, when no API URL is given: ``PREFECT_SERVER_EPHEMERAL_ENABLED``
  on, a startup timeout of 120 s (the server imports slowly on a busy machine), logs not sent to
  the API (``PREFECT_LOGGING_TO_API_ENABLED=false``), and every server service a one-shot local
  run does not need turned off (scheduler, late runs, foreman, cancellation cleanup, pause
  expirations, repossessor, cleanup reconciler, triggers, event persister, event logger, task
  run recorder). Fewer writers on the SQLite file: no "database is locked" errors.
  Resource metrics collection in run subprocesses is off too.
- A server started with ``sced-audit server start`` gets only the no-outside-calls settings; it
  keeps all its services (the scheduler is what runs scheduled reruns).
"""

from __future__ import annotations

import logging
import os
import sys
from dataclasses import dataclass
from pathlib import Path

__all__ = [
    "ENV_HOME",
    "PrefectSetup",
    "configure",
    "default_home",
    "default_server_home",
    "ephemeral_environment",
    "private_environment",
    "resolve_home",
    "strip_tracebacks",
]

ENV_HOME = "SCED_AUDIT_PREFECT_HOME"
ENV_SERVER_HOME = "SCED_AUDIT_SERVER_HOME"

# Never sends anything out (server and client side); used for every Prefect process we start.
PRIVATE = {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "DO_NOT_TRACK": "1",
    "PREFECT_TELEMETRY_ENABLE_RESOURCE_METRICS": "false",
}

# The embedded server of a one-shot run: only what a flow run needs.
EPHEMERAL_SERVER = {
    "PREFECT_SERVER_EPHEMERAL_ENABLED": "true",
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
    "PREFECT_LOGGING_TO_API_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_SCHEDULER_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_LATE_RUNS_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_FOREMAN_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_CANCELLATION_CLEANUP_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_PAUSE_EXPIRATIONS_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_REPOSSESSOR_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_CLEANUP_RECONCILER_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_TRIGGERS_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_EVENT_PERSISTER_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_EVENT_LOGGER_ENABLED": "false",
    "PREFECT_SERVER_SERVICES_TASK_RUN_RECORDER_ENABLED": "false",
}

# Keys this module put into os.environ (so a later configure() may change them, while values
# the user set before are left alone).
_OURS: dict[str, str] = {}
_VERBOSE = True  # until configure() says otherwise, leave Prefect's console output alone


@dataclass(frozen=True)
class PrefectSetup:
    """How Prefect was configured: its home, the API URL (None: embedded server) and verbosity."""

    home: Path
    api_url: str | None
    verbose: bool

    @property
    def embedded(self) -> bool:
        return self.api_url is None


def default_home() -> Path:
    """``~/.sced-audit/prefect``: the Prefect home of runs on the embedded server."""
    return Path.home() / ".sced-audit" / "prefect"


def default_server_home() -> Path:
    """``$SCED_AUDIT_SERVER_HOME`` or ``~/.sced-audit/prefect-server``: home of ``sced-audit server``."""
    given = os.environ.get(ENV_SERVER_HOME)
    return Path(given).expanduser() if given else Path.home() / ".sced-audit" / "prefect-server"


def resolve_home(home: str | os.PathLike[str] | None = None) -> Path:
    """The Prefect home: the argument, else ``$SCED_AUDIT_PREFECT_HOME``, else :func:`default_home`."""
    if home:
        return Path(home).expanduser().resolve()
    given = os.environ.get(ENV_HOME)
    if given:
        return Path(given).expanduser().resolve()
    return default_home()


def private_environment(home: Path, verbose: bool = False) -> dict[str, str]:
    """Variables for any Prefect process of ours: home, no outside calls, log level."""
    return {
        "PREFECT_HOME": str(home),
        **PRIVATE,
        "PREFECT_LOGGING_LEVEL": "INFO" if verbose else "WARNING",
        # Dask's own log level (scheduler, nannies and worker processes), when Dask is used
        "DASK_LOGGING__DISTRIBUTED": "info" if verbose else "error",
    }


def ephemeral_environment(home: Path, verbose: bool = False) -> dict[str, str]:
    """Variables for a run on the embedded server (see the module docstring)."""
    return {**private_environment(home, verbose), **EPHEMERAL_SERVER}


def _user_value(key: str) -> str | None:
    """The value of ``key`` set outside this module (None when unset or set by us)."""
    value = os.environ.get(key)
    if value is None or _OURS.get(key) == value:
        return None
    return value


def configure(home: str | os.PathLike[str] | None = None, verbose: bool = False,
              api_url: str | None = None) -> PrefectSetup:
    """Set Prefect's environment for this process (and the processes it starts); see module doc.

    api_url: a server to use; else ``PREFECT_API_URL`` from the environment; else the
    embedded server.
    """
    resolved_home = resolve_home(home)
    user_api = None if api_url else _user_value("PREFECT_API_URL")
    if api_url:
        wanted = {**private_environment(resolved_home, verbose), "PREFECT_API_URL": api_url}
    elif user_api:
        wanted = private_environment(resolved_home, verbose)
    else:
        wanted = ephemeral_environment(resolved_home, verbose)
    wanted[ENV_HOME] = str(resolved_home)  # processes we start resolve the same home
    changed = False
    for key in list(_OURS):  # our values from an earlier call that no longer apply
        if key not in wanted and os.environ.get(key) == _OURS[key]:
            del os.environ[key]
            changed = True
        if key not in wanted:
            del _OURS[key]
    for key, value in wanted.items():
        mine = key in ("PREFECT_HOME", ENV_HOME) or (key == "PREFECT_API_URL" and api_url)
        if not mine and _user_value(key) is not None:
            continue  # the user's own setting wins
        if os.environ.get(key) != value:
            os.environ[key] = value
            changed = True
        _OURS[key] = value
    resolved_home.mkdir(parents=True, exist_ok=True)
    if changed and "prefect.context" in sys.modules:
        _refresh_prefect()
    global _VERBOSE
    _VERBOSE = verbose
    strip_tracebacks()
    return PrefectSetup(home=resolved_home, api_url=api_url or user_api, verbose=verbose)


def _refresh_prefect() -> None:
    """Make an already imported prefect pick up the new environment."""
    import prefect.context
    from prefect.logging.configuration import setup_logging

    prefect.context.refresh_global_settings_context()
    setup_logging(incremental=False)


class _NoTraceback(logging.Filter):
    """Drop exception details from console records (the message line stays)."""

    def filter(self, record: logging.LogRecord) -> bool:
        record.exc_info = None
        record.exc_text = None
        record.stack_info = None
        return True


def strip_tracebacks() -> None:
    """Strip tracebacks from Prefect's console output unless configured verbose.

    Idempotent; call again after prefect is imported or its logging is set up anew.
    """
    if "prefect.logging.handlers" not in sys.modules:
        return
    from prefect.logging.handlers import PrefectConsoleHandler

    for logger in (logging.getLogger(), logging.getLogger("prefect")):
        for handler in logger.handlers:
            if not isinstance(handler, PrefectConsoleHandler):
                continue
            ours = [f for f in handler.filters if isinstance(f, _NoTraceback)]
            if _VERBOSE:
                for f in ours:
                    handler.removeFilter(f)
            elif not ours:
                handler.addFilter(_NoTraceback())

