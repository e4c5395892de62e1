"""The embedded Prefect server of a one-shot run, started as early as possible (no prefect import).

Prefect starts its own temporary server the same way (uvicorn on the server's app factory, UI
off) but only when the first flow run asks for a client, and after importing the whole server
package into the calling process (several seconds).  Here the server process is launched right
after ``flows.settings.configure`` (``begin``), so that it starts while this process imports
pandas, Prefect and the engine; ``api_url`` waits until it answers on /health.  The process is
stopped at exit.  Settings reach it through the environment that ``configure`` prepared.
"""

from __future__ import annotations

import atexit
import os
import subprocess
import sys
import time

from flows.server import HOST, free_port, healthy

__all__ = ["begin", "api_url", "stop", "STARTUP_TIMEOUT_S"]

STARTUP_TIMEOUT_S = 120.0  # a busy 2-core machine can take long to import the server
_ADDRESS_IN_USE = 3  # uvicorn's exit code when the port is taken

_process: subprocess.Popen | None = None
_port: int | None = None


def _launch() -> None:
    global _process, _port
    import importlib.util

    spec = importlib.util.find_spec("prefect")
    if spec is None or spec.origin is None:
        raise RuntimeError("Prefect is not installed")
    app_dir = os.path.dirname(os.path.dirname(spec.origin))
    _port = free_port()
    env = {**os.environ, "PREFECT_UI_ENABLED": "0", "PREFECT__SERVER_EPHEMERAL": "1", "PREFECT__SERVER_FINAL": "1"}
    env.pop("PREFECT_API_URL", None)
    _process = subprocess.Popen(
        [sys.executable, "-m", "uvicorn", "--app-dir", app_dir, "--factory", "prefect.server.api.server:create_app",
         "--host", HOST, "--port", str(_port), "--log-level", "error", "--lifespan", "on"],
        env=env, stdin=subprocess.DEVNULL, preexec_fn=_stop_with_parent(),
    )


def _stop_with_parent():
    """On Linux, the server gets SIGTERM when this process dies, even when it is killed (exit
    handlers do not run then): no server is left behind. Elsewhere: None (exit handlers only)."""
    if not sys.platform.startswith("linux"):
        return None
    import ctypes
    import ctypes.util
    import signal

    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        prctl = libc.prctl
    except (OSError, AttributeError):
        return None
    pr_set_pdeathsig = 1

    def child_setup() -> None:
        prctl(pr_set_pdeathsig, int(signal.SIGTERM))

    return child_setup


def begin() -> None:
    """Launch the server process now (no-op when PREFECT_API_URL is set or it is already running)."""
    if os.environ.get("PREFECT_API_URL") or _process is not None:
        return
    _launch()
    atexit.register(stop)


def api_url(timeout: float = STARTUP_TIMEOUT_S) -> str:
    """The embedded server's API URL once it answers (launching it if ``begin`` was not called)."""
    if _process is None:
        begin()
    assert _process is not None and _port is not None
    deadline = time.monotonic() + timeout
    relaunched = 0
    while time.monotonic() < deadline:
        code = _process.poll()
        if code == _ADDRESS_IN_USE and relaunched < 5:  # the free port was taken meanwhile: another one
            relaunched += 1
            _launch()
            continue
        if code is not None:
            raise RuntimeError(f"the embedded Prefect server exited with code {code} while starting")
        url = f"http://{HOST}:{_port}/api"
        if healthy(url, timeout=1.0):
            return url
        time.sleep(0.1)
    stop()
    raise RuntimeError(f"the embedded Prefect server did not answer within {timeout:g} s")


def stop() -> None:
    """Stop the server process (terminate, then kill after 5 s)."""
    global _process
    proc, _process = _process, None
    if proc is None:
        return
    proc.terminate()
    try:
        proc.wait(timeout=5)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
