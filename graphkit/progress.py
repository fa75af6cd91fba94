"""Progress of long stages, reported without knowing who listens (the CLI draws bars, the flow logs)."""

from __future__ import annotations

import time
import warnings
from contextlib import contextmanager
from contextvars import ContextVar

__all__ = ["report", "listen", "quiet", "predict_finish", "finish_time"]

_SINKS: ContextVar[tuple] = ContextVar("graphkit_progress_sinks", default=())


#: The run's predicted timeline (process-wide, set by the budget's sizing): seconds predicted after each stage.
_AFTER: dict[str, float] = {}


def predict_finish(after: dict[str, float] | None) -> None:
    """Record the seconds predicted to follow each stage (``{"train": 60.0, ...}``), or forget them (None)."""
    _AFTER.clear()
    _AFTER.update(after or {})


def finish_time(stage: str, seconds_left: float) -> float | None:
    """The run's predicted finish (epoch seconds) when ``stage`` has ``seconds_left`` to go; None without a
    prediction for that stage."""
    if stage not in _AFTER:
        return None
    return time.time() + max(float(seconds_left), 0.0) + _AFTER[stage]


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


@contextmanager
def quiet():
    """No sink hears the reports of the ``with`` block (a calibration's short runs, for example)."""
    token = _SINKS.set(())
    try:
        yield
    finally:
        _SINKS.reset(token)
