"""Stopping a long command (``refresh``, ``schedule``) on SIGINT or SIGTERM: within seconds, one line, exit
128 + the signal number (130 for SIGINT, 143 for SIGTERM).

Inside :func:`stop_on_signals`:

- SIGINT raises ``KeyboardInterrupt`` and SIGTERM raises :class:`Interrupted` (a ``KeyboardInterrupt``) in the
  main thread, once: ``finally`` blocks and context managers unwind as for Ctrl-C, so the Dask cluster closes,
  the store lock is released and Prefect records the flow run as crashed. Nothing is published: a version
  becomes visible only by the last rename of the publish step, and a rerun resumes from the finished stages.
  Later signals raise nothing, so they cannot break that unwinding halfway, and once the body has ended after a
  signal, SIGINT and SIGTERM are ignored for the rest of the process's life.
- A watcher thread sees every signal through :func:`signal.set_wakeup_fd`, even while the main thread is inside
  a numba kernel or a DuckDB query and cannot run a Python handler. At the first one it sends everything the
  process writes to stderr from then on (Prefect's crash reports and their tracebacks, Dask's shutdown messages)
  to ``/dev/null``, so that the command's own line is the only one after the signal; with ``GRAPHKIT_DEBUG`` set
  it leaves stderr alone. If the process is still there :data:`GRACE_SECONDS` later (a kernel that runs on, a
  cleanup that hangs), it writes the line and ends the process with ``os._exit``. Whatever a hard exit leaves
  (temporary files, the stage folder being written) is cleaned or resumed by the next run; the store lock is an
  ``fcntl`` lock and goes with the process, and Prefect's temporary server is stopped by its watchdog.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
from contextlib import contextmanager

__all__ = ["Interrupted", "StopGuard", "stop_on_signals", "exit_code", "GRACE_SECONDS"]

#: Seconds between the first signal and the hard exit of a process that has not ended by itself.
GRACE_SECONDS = 6.0  # the bound is 10 s; the rest is margin for a machine under load
_SIGNALS = (signal.SIGINT, signal.SIGTERM)


def exit_code(signum: int) -> int:
    """The shell's convention: 128 + the signal number (130 for SIGINT, 143 for SIGTERM)."""
    return 128 + int(signum)


class Interrupted(KeyboardInterrupt):
    """Raised in the main thread by SIGTERM (SIGINT raises a plain ``KeyboardInterrupt``)."""

    def __init__(self, signum: int):
        super().__init__(signal.Signals(signum).name)
        self.signum = int(signum)


class StopGuard:
    """The state of :func:`stop_on_signals`: which signal came first and whether the line was written."""

    def __init__(self, describe, grace: float = GRACE_SECONDS):
        self.describe = describe  # signal number -> the one line, without newline
        self.grace = grace
        self.signum: int | None = None
        self._raised = False
        self._announced = False
        self._lock = threading.Lock()
        self._stderr_fd: int | None = None  # a copy of the original stderr, kept for the one line
        self._cancelled = threading.Event()

    # -- in the main thread
    def _handler(self, signum, frame):
        self._note(signum)
        if self._raised:
            return  # once is enough: a second signal must not break the unwinding of the first
        self._raised = True
        if signum == signal.SIGINT:
            raise KeyboardInterrupt
        raise Interrupted(signum)

    # -- in any thread
    def note(self, signum: int) -> None:
        """Record a stop by ``signum`` and silence stderr now: for a library's own signal handler that runs
        before the watcher thread has seen the signal (see ``cmd_schedule``)."""
        self._note(signum)

    def _note(self, signum: int) -> None:
        with self._lock:
            if self.signum is not None:
                return
            self.signum = int(signum)
        self._quiet_stderr()
        threading.Thread(target=self._deadline, name="graphkit-stop-deadline", daemon=True).start()

    def _quiet_stderr(self) -> None:
        if os.environ.get("GRAPHKIT_DEBUG"):
            return
        try:
            sys.stderr.flush()
        except (OSError, ValueError):
            pass
        try:
            saved = os.dup(2)
            null = os.open(os.devnull, os.O_WRONLY)
            os.dup2(null, 2)
            os.close(null)
        except OSError:
            return
        self._stderr_fd = saved

    def announce(self, line: str | None = None) -> int:
        """Write the one line (once; ``describe``'s unless ``line`` is given) and return the exit code."""
        with self._lock:
            first = not self._announced
            self._announced = True
        code = exit_code(self.signum)
        if first:
            line = ((line or self.describe(self.signum)) + "\n").encode(errors="replace")
            fd = self._stderr_fd if self._stderr_fd is not None else 2
            try:
                os.write(fd, line)
            except OSError:
                pass
        return code

    def cancel(self) -> None:
        """Call off the hard exit and the ignoring of later signals (for a caller that handles the stop itself
        and goes on living)."""
        self._cancelled.set()

    def _deadline(self) -> None:
        if self._cancelled.wait(self.grace):
            return
        code = self.announce()
        try:
            sys.stdout.flush()
        except (OSError, ValueError):
            pass
        os._exit(code)

    def _watch(self, read_fd: int) -> None:
        while True:
            try:
                data = os.read(read_fd, 64)
            except OSError:
                return
            if not data:
                return
            for signum in data:
                if signum in _SIGNALS:
                    self._note(signum)


@contextmanager
def stop_on_signals(describe, *, grace: float = GRACE_SECONDS):
    """Turn SIGINT and SIGTERM into a prompt, quiet stop for the body (see the module docstring).

    ``describe(signum)`` gives the one line to print. Yields the :class:`StopGuard`; after an interruption the
    caller prints through :meth:`StopGuard.announce` and exits with the code it returns. Outside the main thread
    (where signal handlers cannot be installed) the body runs unguarded.
    """
    guard = StopGuard(describe, grace)
    if threading.current_thread() is not threading.main_thread():
        yield guard
        return
    read_fd, write_fd = os.pipe()
    os.set_blocking(write_fd, False)
    previous = {s: signal.getsignal(s) for s in _SIGNALS}
    old_wakeup = signal.set_wakeup_fd(write_fd, warn_on_full_buffer=False)
    watcher = threading.Thread(target=guard._watch, args=(read_fd,), name="graphkit-signal-watch", daemon=True)
    watcher.start()
    try:
        for s in _SIGNALS:
            signal.signal(s, guard._handler)
        yield guard
    finally:
        for s, h in previous.items():
            # once stopping, stay stopping: a late or second signal must not turn the exit into a traceback or
            # a death by signal while the process winds down (the deadline still ends it)
            stopping = guard.signum is not None and not guard._cancelled.is_set()
            signal.signal(s, signal.SIG_IGN if stopping else (h if h is not None else signal.SIG_DFL))
        signal.set_wakeup_fd(old_wakeup)
        os.close(write_fd)  # the watcher reads end of file and returns
        watcher.join(timeout=1.0)
        os.close(read_fd)
