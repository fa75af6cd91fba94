"""Test hook for crash tests: ``GRAPHKIT_FAULT=<point>`` kills the process with SIGKILL at that point."""

from __future__ import annotations

import os
import signal

__all__ = ["fault_point"]


def fault_point(name: str) -> None:
    """Die here, as a machine losing power would, when ``GRAPHKIT_FAULT`` names this point (no cleanup runs)."""
    if os.environ.get("GRAPHKIT_FAULT") == name:
        os.kill(os.getpid(), signal.SIGKILL)
