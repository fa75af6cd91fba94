"""Progress of long stages, reported without knowing who listens (the CLI draws bars, the flow logs)."""

from __future__ import annotations

import warnings
from contextlib import contextmanager
from contextvars import ContextVar

__all__ = ["report", "listen"]

_SINKS: ContextVar[tuple] = ContextVar("graphkit_progress_sinks", default=())


def report(stage: str, done: int, total: int, unit: str = "tokens") -> None:
    """Tell the installed sinks that ``done`` of ``total`` units of ``stage`` are finished (cumulative)."""
    for sink in _SINKS.get():
        try:
            sink(stage, int(done), int(total), unit)
        except Exception as exc:  # noqa: BLE001 - a broken display must never fail a refresh
            warnings.warn(f"progress sink {sink!r} failed: {exc}", RuntimeWarning, stacklevel=2)


@contextmanager
def listen(sink):
    """Install ``sink(stage, done, total, unit)`` for the ``with`` block, in this context only."""
    token = _SINKS.set(_SINKS.get() + (sink,))
    try:
        yield sink
    finally:
        _SINKS.reset(token)
