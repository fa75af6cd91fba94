"""Test hook for crash tests: with ``GRAPHKIT_TEST_FAULTS=1``, ``GRAPHKIT_FAULT=<point>[:action]`` acts at that point.

Both variables are needed, so that a stray ``GRAPHKIT_FAULT`` in an operator's environment never kills a run.
Actions: ``kill`` (the default) sends SIGKILL, as a machine losing power would; ``stop`` sends SIGSTOP, pausing the
process there until a test sends SIGCONT; ``raise`` raises an ``OSError`` (EIO), an I/O failure a task retries.
"""

from __future__ import annotations

import errno
import os
import signal

__all__ = ["fault_point", "FAULT_ACTIONS"]

FAULT_ACTIONS = ("kill", "stop", "raise")


def fault_point(name: str) -> None:
    """Act here when ``GRAPHKIT_TEST_FAULTS=1`` and ``GRAPHKIT_FAULT`` names this point; otherwise do nothing."""
    if os.environ.get("GRAPHKIT_TEST_FAULTS") != "1":
        return
    point, _, action = os.environ.get("GRAPHKIT_FAULT", "").partition(":")
    if point != name:
        return
    action = action or "kill"
    if action == "kill":
        os.kill(os.getpid(), signal.SIGKILL)  # no cleanup runs
    elif action == "stop":
        os.kill(os.getpid(), signal.SIGSTOP)  # carries on from here on SIGCONT
    elif action == "raise":
        raise OSError(errno.EIO, f"fault injected at {name}")
    else:
        raise ValueError(f"GRAPHKIT_FAULT={point}:{action}: the action must be one of {', '.join(FAULT_ACTIONS)}")
