"""The temporary Prefect server of a CLI run, stopped even when the run is killed.

Without ``PREFECT_API_URL``, Prefect starts a temporary server as a child process for the life of the run and
stops it at exit. A run killed with SIGKILL (the kernel's out-of-memory killer, a scheduler's timeout) never gets
to stop it, and the server stays behind, holding its port and the Prefect database. :func:`guard_temporary_server`
starts that server up front and, beside it, a small watchdog process in its own session that waits on a pipe
whose only writer is this process: the pipe closes when this process ends, however it ends, and the watchdog
then stops the server if it is still running. At a normal exit the server gets SIGTERM from this process's exit
handler, which does not wait for its graceful shutdown (Prefect's own handler waits up to 5 s): the watchdog
waits for it and kills it if it is still there 5 s later.

The server runs in a session and process group of its own. A terminal's Ctrl-C sends SIGINT to its whole
foreground process group; were the server in it, it would die at the same moment as the flow, and the flow's
last calls (recording the run as crashed) would retry a dead API for minutes. Out of the group, the server is
stopped only after the flow has wound down: by Prefect at exit, or by the watchdog when the process is gone.
Its output goes to ``temporary-server.log`` in Prefect's home directory (:func:`server_log_path`), not to the
command's terminal.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from typing import Callable

__all__ = ["guard_temporary_server", "start_temporary_server", "server_log_path"]

_STOP_TIMEOUT = 5.0
_LOG_KEEP_BYTES = 8 << 20
_KEEP: list[int] = []  # the pipe's write end, open for the life of the process


def guard_temporary_server() -> int | None:
    """Start Prefect's temporary server and its watchdog when no API URL is configured.

    Returns
    -------
    int or None
        The watchdog's process id, or None when a server is configured (nothing to guard).
    """
    from prefect.settings import get_current_settings

    if get_current_settings().api.url:
        return None
    import psutil
    from prefect.server.api.server import SubprocessASGIServer

    server = SubprocessASGIServer()  # the one instance Prefect's client starts and reuses when no API URL is set
    if not server.running:
        _in_own_session(server)
    server.start()
    pid = server.server_process.pid
    started = psutil.Process(pid).create_time()
    read_fd, write_fd = os.pipe()  # both ends non-inheritable: no other child keeps the pipe open
    watchdog = subprocess.Popen([sys.executable, "-m", "graphkit.flows.tempserver", str(read_fd), str(pid), repr(started)],
                                pass_fds=(read_fd,), start_new_session=True, stdin=subprocess.DEVNULL,
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(read_fd)
    _KEEP.append(write_fd)  # never closed by us: it closes when this process ends
    _stop_without_waiting(server)
    return watchdog.pid


def _stop_without_waiting(server) -> None:
    """At exit, send the server SIGTERM and leave its waiting to the watchdog: Prefect's own exit handler waits up
    to 5 s for the server's graceful shutdown, which a finished run was seen to spend whole. The handler keeps its
    place among the exit handlers (registered when the server started, so it runs after those of the flow's log
    and event workers, which still talk to the server)."""
    import atexit

    process = server.server_process

    def stop():
        if process.poll() is None:
            process.terminate()  # the watchdog, which sees this process end, kills it if it is still there in 5 s

    atexit.unregister(server.stop)
    atexit.register(stop)


def start_temporary_server() -> Callable[[], int | None]:
    """:func:`guard_temporary_server` in a background thread; returns the function that waits for it (and raises
    what it raised).

    The server boots in a process of its own for several seconds (its imports and database); meanwhile this process
    can load what the run needs next. With ``PREFECT_API_URL`` set the waiter returns None at once. Prefect's server module is imported here first, in the calling thread, so
    that the thread imports nothing while the caller imports (two threads importing one package's modules can
    dead-lock on the import locks).
    """
    from prefect.settings import get_current_settings

    if get_current_settings().api.url:
        # A configured server (PREFECT_API_URL): nothing to start or guard, and no need to import Prefect's server
        # (FastAPI, SQLAlchemy: seconds of a run's start-up that a client never uses).
        return lambda: None
    import psutil  # noqa: F401 - see above
    from prefect.server.api import server  # noqa: F401 - see above

    outcome: dict = {}

    def target():
        try:
            outcome["pid"] = guard_temporary_server()
        except BaseException as exc:  # noqa: BLE001 - handed to the waiting caller
            outcome["error"] = exc

    thread = threading.Thread(target=target, name="graphkit-server-start", daemon=True)
    thread.start()

    def wait() -> int | None:
        thread.join()
        if "error" in outcome:
            raise outcome["error"]
        return outcome.get("pid")

    return wait


class _OwnSessionSubprocess:
    """Stands in for the ``subprocess`` module inside Prefect's server module while it starts the server."""

    def __getattr__(self, name):
        return getattr(subprocess, name)

    @staticmethod
    def Popen(*args, **kwargs):  # noqa: N802 - the name it stands in for
        kwargs["start_new_session"] = True
        if kwargs.get("stdout") is None and kwargs.get("stderr") is None:
            # The server's own log goes to a file beside its database, not to the command's terminal: after a
            # stop it logs each database call the stop cancelled, with a traceback, after the command's last line.
            path = server_log_path()
            keep = path.exists() and path.stat().st_size < _LOG_KEEP_BYTES  # started afresh once it is large
            log = open(path, "ab" if keep else "wb")  # noqa: SIM115 - handed to the child, closed below
            try:
                kwargs["stdout"] = kwargs["stderr"] = log
                return subprocess.Popen(*args, **kwargs)
            finally:
                log.close()
        return subprocess.Popen(*args, **kwargs)


def server_log_path():
    """Where the temporary server's output goes: ``temporary-server.log`` in Prefect's home directory."""
    from prefect.settings import get_current_settings

    home = get_current_settings().home
    home.mkdir(parents=True, exist_ok=True)
    return home / "temporary-server.log"


def _in_own_session(server) -> None:
    """Make ``server`` start its uvicorn process with ``start_new_session=True`` (Prefect's own command line and
    environment, only the session differs)."""
    from prefect.server.api import server as server_module

    start = server._run_uvicorn_command

    def run_in_own_session():
        saved = server_module.subprocess
        server_module.subprocess = _OwnSessionSubprocess()
        try:
            return start()
        finally:
            server_module.subprocess = saved

    server._run_uvicorn_command = run_in_own_session


def watch(read_fd: int, pid: int, started: float) -> None:
    """Block until the pipe's writer is gone, then stop process ``pid`` if it is still the server we were given
    (same process id *and* start time, so a recycled id is never touched)."""
    import psutil

    with os.fdopen(read_fd, "rb") as pipe:
        pipe.read()  # returns at end of file: the run's process has ended
    try:
        proc = psutil.Process(pid)
        if abs(proc.create_time() - started) > 1e-3:
            return
        proc.terminate()
        try:
            proc.wait(_STOP_TIMEOUT)
        except psutil.TimeoutExpired:
            proc.kill()
    except psutil.NoSuchProcess:
        return


if __name__ == "__main__":
    watch(int(sys.argv[1]), int(sys.argv[2]), float(sys.argv[3]))
