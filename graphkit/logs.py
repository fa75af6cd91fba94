"""The run's log as a person reads it: one line per stage, each warning once, nothing from the machinery.

:func:`stage_line` words a stage's result (name, duration, its key figure); :mod:`graphkit.pipeline` logs it on
the ``graphkit.run`` logger. :func:`configure` is the command line's console setup for the commands that run
stages (``refresh``, ``schedule``, ``foldin``):

- ``info`` (the default): the stage lines, warnings and errors; Prefect's own bookkeeping ("Beginning flow run",
  "Finished in state Completed", the temporary server's start) and Dask's cluster messages stay out;
- ``warning`` (``--quiet``): warnings and errors only;
- ``debug``: also each stage's start, the run's ``as_of``, and Prefect's and Dask's own info lines (Prefect's
  debug lines with ``PREFECT_LOGGING_LEVEL=DEBUG``).

A Python warning raised during a stage is logged once, as one line without the source line
(:func:`pipeline.run_stages` records them). A failure the command reports itself (bad input: exit 2; a failed
quality gate: exit 3) is not logged again with a traceback; ``GRAPHKIT_DEBUG=1`` keeps everything.

Nothing here imports Prefect: :func:`adopt_prefect_console` is called once Prefect is loaded.
"""

from __future__ import annotations

import logging
import os
import sys
from datetime import datetime
from typing import Any

__all__ = ["LEVELS", "RUN_LOGGER", "stage_line", "configure", "adopt_prefect_console", "ExpectedOutcomeFilter"]

#: The values ``--log-level`` takes.
LEVELS = ("debug", "info", "warning", "error")
#: The logger the stage runner writes to.
RUN_LOGGER = "graphkit.run"


# ------------------------------------------------------------------------------------------------ the stage line
def _si(x: float) -> str:
    """``1234567 -> '1.23M'``: three significant digits with a k/M/G suffix (plain digits below 1000)."""
    x = float(x)
    for factor, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(x) >= factor * 0.9995:
            return f"{x / factor:.3g}{suffix}"
    return str(int(x)) if x == int(x) else f"{x:.3g}"


def _duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, secs = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {secs:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


#: Evaluation figures shown on the evaluate line, in this order, with their labels.
_EVALUATE_FIGURES = (("link_auc_cosine", "link AUC"), ("micro_f1_at_10", "micro-F1"),
                     ("neighbour_drift", "neighbour drift"))


def _figure(stage: str, result: Any) -> str:
    """The key figure of a stage's result (an empty string when it has none)."""
    if stage == "publish":
        return f"version {result}"
    if not isinstance(result, dict):
        return ""
    kind = stage.removeprefix("eval_")
    if stage == "ingest":
        c = result.get("counts", {})
        return f"{_si(c.get('edges', 0))} edges, {_si(c.get('nodes', 0))} nodes"
    if stage == "graph":
        return f"{_si(result.get('n_nodes', 0))} nodes, {result.get('isolated_nodes', 0)} isolated"
    if stage == "holdout":
        return f"{_si(result.get('n_held_out', 0))} edges held out"
    if kind == "walks":
        seconds = float(result.get("seconds") or 0.0)
        rate = result.get("n_tokens", 0) / seconds if seconds > 0 else 0.0
        return f"{_si(result.get('n_tokens', 0))} tokens, {_si(rate)} tokens/s"
    if kind == "train":
        return f"{_si(result.get('tokens_per_second', 0))} tokens/s, dim {result.get('dim')}"
    if stage == "budget":
        bounds = result.get("bounds", {})
        try:  # the console's clock: local time, like the log lines' own
            finish = datetime.fromisoformat(result["predicted_finish"]).astimezone().strftime("%H:%M:%S")
        except (KeyError, TypeError, ValueError):
            finish = "?"
        return (f"per_node {result.get('per_node')} of {bounds.get('per_node')}, epochs {result.get('epochs')} of "
                f"{bounds.get('epochs')}, finish predicted at {finish} "
                f"({_duration(float(result.get('predicted_total_seconds') or 0))} of {result.get('minutes'):g} min)")
    if stage == "evaluate":
        metrics = result.get("metrics", {})
        shown = [f"{label} {metrics[key]:.4f}" for key, label in _EVALUATE_FIGURES
                 if isinstance(metrics.get(key), (int, float))]
        return ", ".join(shown) or "no figures measured"
    return ""


def stage_line(stage: str, result: Any, seconds: float) -> str:
    """One line for a finished stage: its name, its wall time and its key figure.

    ``ingest  0.4 s  11.9k edges, 3k nodes``; a stage an earlier run finished reads
    ``walks  0.0 s  skipped: finished by an earlier run``.
    """
    if isinstance(result, dict) and result.get("skipped"):
        figure = "skipped: finished by an earlier run"
    else:
        figure = _figure(stage, result)
    return f"{stage:<10} {_duration(seconds):>9}  {figure}".rstrip()


# ------------------------------------------------------------------------------------------------ the console
class _Stderr(logging.StreamHandler):
    """Writes to whatever ``sys.stderr`` is at the time, so that lines scroll above live progress bars (which
    redirect it) and pytest's capture sees them."""

    def __init__(self):
        super().__init__()

    @property
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value):  # logging.StreamHandler.__init__ sets it
        pass


class _Formatter(logging.Formatter):
    """``07:02:13 ingest ...``; warnings and errors say so: ``07:02:13 warning: ...``."""

    def __init__(self):
        super().__init__(datefmt="%H:%M:%S")

    def format(self, record: logging.LogRecord) -> str:
        text = record.getMessage()
        if record.levelno >= logging.WARNING:
            text = f"{record.levelname.lower()}: {text}"
        if record.name.startswith("prefect") or not record.name.startswith("graphkit"):
            text = f"[{record.name}] {text}"
        line = f"{self.formatTime(record, self.datefmt)} {text}"
        if record.exc_info:
            line += "\n" + self.formatException(record.exc_info)
        return line


def _expected(record: logging.LogRecord) -> bool:
    """Whether a record is about an outcome the command reports in its own line (bad input, a failed gate)."""
    from .errors import GateFailure, InputError

    exc = record.exc_info[1] if record.exc_info else None
    if isinstance(exc, (InputError, GateFailure)):
        return True
    # Prefect's "Finished in state Failed('Task run encountered an exception GateFailure: ...')" has no exc_info
    message = record.getMessage() if record.name.startswith("prefect") else ""
    names = {"GateFailure", "InputError", *(c.__name__ for c in _subclasses(InputError))}
    return any(f"{name}:" in message or f"{name}(" in message for name in names)


def _subclasses(cls) -> list[type]:
    out = []
    for sub in cls.__subclasses__():
        out += [sub, *_subclasses(sub)]
    return out


class ExpectedOutcomeFilter(logging.Filter):
    """Drop log records about an expected outcome (bad input, a failed quality gate): the command prints its
    own one line for those. Inactive with ``GRAPHKIT_DEBUG=1``."""

    def filter(self, record: logging.LogRecord) -> bool:
        if os.environ.get("GRAPHKIT_DEBUG"):
            return True
        return not _expected(record)


class _MachineryFilter(logging.Filter):
    """Below ``debug``, drop what the machinery says at info level (Prefect's task and flow bookkeeping, the
    temporary server): only graphkit's own lines, and warnings and errors from anyone, reach the console."""

    def __init__(self, level: int):
        super().__init__()
        self.level = level

    def filter(self, record: logging.LogRecord) -> bool:
        if self.level <= logging.DEBUG or record.name.startswith("graphkit"):
            return True
        return record.levelno >= max(self.level, logging.WARNING)


_STATE: dict[str, Any] = {}


def configure(level: str = "info") -> callable:
    """Set up the console log of a command that runs stages; returns a function that undoes it.

    Parameters
    ----------
    level : {"debug", "info", "warning", "error"}
        ``info`` is the default, ``warning`` is ``--quiet``.
    """
    if level not in LEVELS:
        raise ValueError(f"level must be one of {', '.join(LEVELS)}, got {level!r}")
    numeric = getattr(logging, level.upper())
    handler = _Stderr()
    handler.setFormatter(_Formatter())
    handler.addFilter(ExpectedOutcomeFilter())
    handler.addFilter(_MachineryFilter(numeric))
    ours = logging.getLogger("graphkit")
    saved = {"level": ours.level, "propagate": ours.propagate,
             "env": {k: os.environ.get(k) for k in ("PREFECT_LOGGING_LEVEL", "DASK_LOGGING__DISTRIBUTED")}}
    ours.addHandler(handler)
    ours.setLevel(numeric)
    ours.propagate = False  # Prefect's console handler on the root logger would print each line a second time
    # Prefect's loggers below debug: warnings only (read when Prefect is first imported, also by the runs a
    # served deployment starts in child processes); a user's own setting wins
    # (Prefect's own debug level, its event traffic, is left to PREFECT_LOGGING_LEVEL=DEBUG)
    prefect_level = "INFO" if numeric <= logging.DEBUG else "WARNING"
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", prefect_level)
    os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "info" if numeric <= logging.DEBUG else "warning")
    import warnings

    shown = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None):  # one line, no source line
        ours.warning("%s", message)

    warnings.showwarning = show
    _STATE.update(level=numeric, handler=handler, adopted=[])
    if "prefect" in sys.modules and getattr(sys.modules["prefect"], "flow", None) is not None:
        adopt_prefect_console()  # already loaded (a test calling main() in-process)

    def undo() -> None:
        if warnings.showwarning is show:
            warnings.showwarning = shown
        ours.removeHandler(handler)
        ours.setLevel(saved["level"])
        ours.propagate = saved["propagate"]
        for name, value in saved["env"].items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value
        for target, old in _STATE.get("adopted", []):
            if isinstance(target, logging.Logger):
                target.setLevel(old)
            else:
                for f in old:
                    target.removeFilter(f)
        _STATE.clear()

    return undo


def adopt_prefect_console() -> None:
    """Once Prefect is loaded: have its console handlers follow the level of :func:`configure` and drop the
    records about expected outcomes. A no-op when :func:`configure` was not called (tracebacks then stay, as
    they do with ``GRAPHKIT_DEBUG=1``)."""
    if "level" not in _STATE:
        return
    level = _STATE["level"]
    prefect = logging.getLogger("prefect")
    if level > logging.DEBUG and prefect.getEffectiveLevel() < logging.WARNING \
            and os.environ.get("PREFECT_LOGGING_LEVEL", "").upper() == "WARNING":
        _STATE["adopted"].append((prefect, prefect.level))
        prefect.setLevel(logging.WARNING)  # Prefect was configured before this command's setting
    names = [n for n in logging.Logger.manager.loggerDict if n == "prefect" or n.startswith("prefect.")]
    for logger in [logging.getLogger(), *map(logging.getLogger, names), logging.getLogger("uvicorn")]:
        for handler in logger.handlers:
            if handler is _STATE["handler"] or any(isinstance(f, _MachineryFilter) for f in handler.filters):
                continue
            if type(handler).__name__ == "APILogHandler":  # the run's log in Prefect keeps everything
                continue
            added = [ExpectedOutcomeFilter(), _MachineryFilter(level)]
            for f in added:
                handler.addFilter(f)
            _STATE["adopted"].append((handler, added))
