"""Start, stop and query a local Prefect server for scheduled reruns (no prefect import here).

The server runs as a background process (``python -m prefect server start``) bound to
127.0.0.1, in its own Prefect home folder, with analytics off and every service on (the
scheduler creates the scheduled runs). Its pid, port and URL are kept in ``<home>/server.json``
and its output in ``<home>/server.log``. It is started in its own session, so it outlives the
command that started it; ``stop`` ends that process group only.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from pathlib import Path

from flows.settings import EPHEMERAL_SERVER, private_environment

__all__ = [
    "DEFAULT_PORT",
    "ServerError",
    "ServerInfo",
    "free_port",
    "healthy",
    "running_api_url",
    "server_start",
    "server_status",
    "server_stop",
]

DEFAULT_PORT = 4200
HOST = "127.0.0.1"
INFO_FILE = "server.json"
LOG_FILE = "server.log"


class ServerError(RuntimeError):
    """The server could not be started or stopped (message says why and what to do)."""


@dataclass(frozen=True)
class ServerInfo:
    """A server we started: its process, address and files."""

    pid: int
    port: int
    home: Path
    started_at: str

    @property
    def api_url(self) -> str:
        return f"http://{HOST}:{self.port}/api"

    @property
    def ui_url(self) -> str:
        return f"http://{HOST}:{self.port}"

    @property
    def log(self) -> Path:
        return self.home / LOG_FILE


def free_port() -> int:
    """A free TCP port on the loopback interface."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


def _port_in_use(port: int) -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        try:
            s.bind((HOST, port))
        except OSError:
            return True
    return False


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:  # a zombie child of this process counts as gone
        done, _ = os.waitpid(pid, os.WNOHANG)
        return done == 0
    except ChildProcessError:
        return True


# The server is on this machine: never send its requests through a proxy set in the environment.
LOCAL_OPENER = urllib.request.build_opener(urllib.request.ProxyHandler({}))


def healthy(api_url: str, timeout: float = 2.0) -> bool:
    """True when ``<api_url>/health`` answers 200."""
    try:
        with LOCAL_OPENER.open(f"{api_url}/health", timeout=timeout) as resp:
            return resp.status == 200
    except (urllib.error.URLError, OSError, ValueError):
        return False


def _read_info(home: Path) -> ServerInfo | None:
    path = home / INFO_FILE
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
        return ServerInfo(pid=int(raw["pid"]), port=int(raw["port"]), home=home, started_at=str(raw["started_at"]))
    except (OSError, ValueError, KeyError, TypeError):
        return None


def server_status(home: str | os.PathLike[str]) -> ServerInfo | None:
    """The server started in ``home`` if its process is alive, else None (stale files removed)."""
    home = Path(home).expanduser().resolve()
    info = _read_info(home)
    if info is None:
        return None
    if not _alive(info.pid):
        (home / INFO_FILE).unlink(missing_ok=True)
        return None
    return info


def _server_env(home: Path, port: int, verbose: bool) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in EPHEMERAL_SERVER and k != "PREFECT_API_URL"}
    env.update(private_environment(home, verbose))
    env.update({
        "PREFECT_SERVER_API_HOST": HOST,
        "PREFECT_SERVER_API_PORT": str(port),
        # the UI served by this server talks to this server
        "PREFECT_UI_API_URL": f"http://{HOST}:{port}/api",
    })
    return env


def server_start(home: str | os.PathLike[str], port: int = DEFAULT_PORT, timeout: float = 120.0,
                 verbose: bool = False) -> ServerInfo:
    """Start a Prefect server on 127.0.0.1:port with its home in ``home``; wait until it answers.

    Returns the running server's info (also when one was already running there).
    """
    home = Path(home).expanduser().resolve()
    home.mkdir(parents=True, exist_ok=True)
    running = server_status(home)
    if running is not None:
        return running
    if _port_in_use(port):
        raise ServerError(f"port {port} on {HOST} is in use; pick another with --port")
    log_path = home / LOG_FILE
    cmd = [sys.executable, "-m", "prefect", "server", "start", "--host", HOST, "--port", str(port),
           "--analytics-off", "--scheduler", "--late-runs"]
    with open(log_path, "ab") as log:
        proc = subprocess.Popen(
            cmd, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
            env=_server_env(home, port, verbose), cwd=str(home), start_new_session=True,
        )
    info = ServerInfo(pid=proc.pid, port=port, home=home,
                      started_at=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
    tmp = home / (INFO_FILE + ".tmp")
    tmp.write_text(json.dumps({"pid": info.pid, "port": info.port, "api_url": info.api_url,
                               "started_at": info.started_at}), encoding="utf-8")
    os.replace(tmp, home / INFO_FILE)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            (home / INFO_FILE).unlink(missing_ok=True)
            raise ServerError(f"the Prefect server exited with code {proc.returncode} while starting; "
                              f"see {log_path}:\n{_tail(log_path)}")
        if healthy(info.api_url, timeout=1.0):
            return info
        time.sleep(0.25)
    _stop_process(proc.pid, 10.0)
    (home / INFO_FILE).unlink(missing_ok=True)
    raise ServerError(f"the Prefect server did not answer within {timeout:g} s; see {log_path}")


def _tail(path: Path, lines: int = 15) -> str:
    try:
        return "\n".join(path.read_text(encoding="utf-8", errors="replace").splitlines()[-lines:])
    except OSError:
        return ""


def _stop_process(pid: int, timeout: float) -> None:
    """SIGTERM the process group led by ``pid`` (ours: started with its own session), then SIGKILL."""
    try:
        pgid = os.getpgid(pid)
    except ProcessLookupError:
        return
    if pgid != pid:  # not a group we started: signal the process alone
        send = lambda sig: os.kill(pid, sig)  # noqa: E731
    else:
        send = lambda sig: os.killpg(pgid, sig)  # noqa: E731
    try:
        send(signal.SIGTERM)
    except ProcessLookupError:
        return
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not _alive(pid):
            return
        time.sleep(0.1)
    try:
        send(signal.SIGKILL)
    except ProcessLookupError:
        return
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline and _alive(pid):
        time.sleep(0.1)


def server_stop(home: str | os.PathLike[str], timeout: float = 20.0) -> ServerInfo | None:
    """Stop the server started in ``home``; returns what was stopped (None if nothing ran)."""
    home = Path(home).expanduser().resolve()
    info = server_status(home)
    if info is None:
        return None
    _stop_process(info.pid, timeout)
    (home / INFO_FILE).unlink(missing_ok=True)
    return info


def running_api_url(home: str | os.PathLike[str]) -> str | None:
    """API URL of a healthy server started in ``home``, else None."""
    info = server_status(home)
    if info is None or not healthy(info.api_url):
        return None
    return info.api_url
