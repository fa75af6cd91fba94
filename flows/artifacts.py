"""What a refresh run reports: one log line per stage, the run's markdown artifact, and progress sinks.

The stage dicts come from :mod:`graphkit.pipeline` (counts, seconds, tokens/s). Only :func:`console_progress`
touches Prefect (to share its console log handler with the bars), so the rest is tested with plain calls; the flow
passes its run logger in.

Progress sinks are callables ``sink(stage, done, total, unit)`` taking cumulative figures, the protocol of
``graphkit.progress`` (stages call ``graphkit.progress.report``; whoever runs them installs sinks with
``graphkit.progress.listen``). :class:`LogProgress` writes throttled log lines (the flow installs it);
:class:`ConsoleProgress` draws rich progress bars (the command line installs it, through :func:`console_progress`).
"""

from __future__ import annotations

import time
from contextlib import contextmanager, nullcontext
from datetime import datetime
from typing import Any, Callable

from graphkit import progress

__all__ = ["si", "duration", "stage_summary", "run_markdown", "LogProgress", "ConsoleProgress", "console_progress",
           "listen"]


# ---------------------------------------------------------------------------------------------------- formatting
def si(x: float) -> str:
    """``1234567 -> '1.23M'``: three significant digits with a k/M/G suffix (plain digits below 1000)."""
    x = float(x)
    for factor, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(x) >= factor * 0.9995:  # 999_900 rounds to "1M", not "1e+03k"
            return f"{x / factor:.3g}{suffix}"
    return str(int(x)) if x == int(x) else f"{x:.3g}"


def duration(seconds: float) -> str:
    """``75.2 -> '1 min 15 s'``; below a minute one decimal."""
    seconds = max(0.0, float(seconds))
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, secs = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {secs:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def _rate(n: float, seconds: float) -> float:
    return n / seconds if seconds > 0 else 0.0


def _scalars(metrics: dict[str, Any]) -> dict[str, float]:
    """The top-level numeric entries of a metrics dict (nested tables are left to the version's catalog row)."""
    return {k: v for k, v in metrics.items() if isinstance(v, (int, float)) and not isinstance(v, bool)}


def stage_summary(stage: str, result: dict[str, Any]) -> str:
    """One line with the figures that matter for ``stage`` (what the flow logs after each stage)."""
    if result.get("skipped"):
        return f"{stage}: skipped, finished by an earlier run"
    s = float(result.get("seconds", 0.0))
    kind = stage.removeprefix("eval_")
    if stage == "ingest":
        c = result["counts"]
        return (f"ingest: {si(c['rows'])} rows -> {si(c['edges'])} edges, {si(c['nodes'])} nodes in {duration(s)} "
                f"({si(_rate(c['rows'], s))} rows/s)")
    if stage == "graph":
        return (f"graph: {si(result['n_nodes'])} nodes, {si(result['adjacency_entries'])} adjacency entries, "
                f"max degree {result['max_degree']}, {result['isolated_nodes']} isolated")
    if kind == "walks":
        return (f"{stage}: {si(result['n_walks'])} walks, {si(result['n_tokens'])} tokens in "
                f"{len(result.get('shards', []))} shards in {duration(s)} "
                f"({si(_rate(result['n_tokens'], s))} tokens/s)")
    if kind == "train":
        return (f"{stage}: {si(result['tokens'])} tokens, dim {result['dim']} in {duration(s)} "
                f"({si(result['tokens_per_second'])} tokens/s)")
    if stage == "evaluate":
        figures = ", ".join(f"{k} {v:g}" for k, v in _scalars(result.get("metrics", {})).items())
        return f"evaluate: {figures or 'no figures'} in {duration(s)}"
    return f"{stage}: done in {duration(s)}"


def _figure(stage: str, result: dict[str, Any]) -> str:
    kind = stage.removeprefix("eval_")
    if stage == "ingest":
        return f"{si(result['counts']['edges'])} edges"
    if stage == "graph":
        return f"{si(result['n_nodes'])} nodes"
    if kind == "walks":
        return f"{si(result['n_tokens'])} tokens"
    if kind == "train":
        return f"{si(result['tokens_per_second'])} tokens/s"
    if stage == "publish":
        return f"version {result['version']}"
    return ""


def run_markdown(*, store: str, stages: dict[str, dict[str, Any]], version: int | None = None,
                 error: str | None = None, total_seconds: float | None = None) -> str:
    """The run's markdown artifact: outcome, counts, metrics and a per-stage timing table.

    Parameters
    ----------
    store : str
        The store folder.
    stages : dict
        ``{stage: {"status": "ran" | "cached" | "skipped" | "failed", "seconds": wall seconds of the task,
        "result": the stage's dict}}`` in run order; stages not reached are absent.
    version : int, optional
        The published version (None when the run failed).
    error : str, optional
        One line describing the failure.
    total_seconds : float, optional
        Wall time of the whole flow body.
    """
    lines = ["# graphkit refresh", ""]
    if version is not None:
        lines.append(f"Published **version {version}** to `{store}`.")
    else:
        lines.append(f"**Failed**, nothing published to `{store}`: {error or 'unknown error'}")
    if total_seconds is not None:
        lines.append(f"Run time {duration(total_seconds)}.")
    lines += ["", "## Stages", "", "| stage | status | task wall s | stage s | figure |", "|---|---|---:|---:|---|"]
    for name, rec in stages.items():
        res = rec.get("result") or {}
        inner = "" if rec["status"] in ("cached", "skipped", "failed") else f"{float(res.get('seconds', 0)):.2f}"
        figure = _figure(name, res) if res and rec["status"] != "failed" else ""
        lines.append(f"| {name} | {rec['status']} | {float(rec.get('seconds', 0.0)):.2f} | {inner} | {figure} |")

    counts = {}
    ingest = (stages.get("ingest") or {}).get("result") or {}
    graph = (stages.get("graph") or {}).get("result") or {}
    walks = (stages.get("walks") or {}).get("result") or {}
    train = (stages.get("train") or {}).get("result") or {}
    for key in ("rows", "edges", "nodes", "dropped_null_ids", "dropped_self_loops", "merged_duplicates"):
        if key in ingest.get("counts", {}):
            counts[key] = ingest["counts"][key]
    if "isolated_nodes" in graph:
        counts["isolated_nodes"] = graph["isolated_nodes"]
    if "n_walks" in walks:
        counts["walks"], counts["walk_tokens"] = walks["n_walks"], walks["n_tokens"]
    if "tokens" in train:
        counts["train_tokens"] = train["tokens"]
    if counts:
        lines += ["", "## Counts", "", "| count | value |", "|---|---:|"]
        lines += [f"| {k} | {v:,} |" for k, v in counts.items()]

    metrics = {}
    if walks.get("seconds") and stages["walks"]["status"] == "ran":
        metrics["walk_tokens_per_second"] = round(walks["n_tokens"] / walks["seconds"])
    if "tokens_per_second" in train:
        metrics["train_tokens_per_second"] = train["tokens_per_second"]
    if "dim" in train:
        metrics["dim"] = train["dim"]
    metrics.update(_scalars(((stages.get("evaluate") or {}).get("result") or {}).get("metrics", {})))
    if metrics:
        lines += ["", "## Metrics", "", "| metric | value |", "|---|---:|"]
        lines += [f"| {k} | {v:,} |" if isinstance(v, int) else f"| {k} | {v:.6g} |" for k, v in metrics.items()]
    warnings = ingest.get("warnings") or []
    if warnings:
        lines += ["", "## Input warnings", ""] + [f"- {w}" for w in warnings]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------------------------------- progress
def _new_pass(previous: tuple[int, int] | None, done: int, total: int) -> bool:
    """Whether a report starts a new pass of its stage (the walks and training of the link-prediction check run
    before the published ones under the same stage names)."""
    return previous is None or done < previous[0] or total != previous[1]


class LogProgress:
    """Progress sink writing one log line per stage at most every ``every`` seconds, plus the last one.

    Each line gives the share done, the rate since the stage's first report (units done before it, such as walk
    shards finished by an earlier run, are not counted as speed) and the time left at that rate.

    Parameters
    ----------
    logger : logging.Logger or logging.LoggerAdapter
        The Prefect run logger in the flow.
    every : float, default 15
        Seconds between two lines of one stage.
    clock : callable, default time.monotonic
    """

    def __init__(self, logger, every: float = 15.0, clock: Callable[[], float] = time.monotonic):
        self.logger, self.every, self.clock = logger, float(every), clock
        self._state: dict[str, dict] = {}

    def __call__(self, stage: str, done: int, total: int, unit: str) -> None:
        now = self.clock()
        st = self._state.get(stage)
        if _new_pass(st and (st["done"], st["total"]), done, total):
            self._state[stage] = {"t0": now, "done0": done, "logged": now, "done": done, "total": total,
                                  "finished": done >= total}
            if done:
                self.logger.info("%s: %s of %s %s already done", stage, si(done), si(total), unit)
            return
        st["done"] = done
        final = done >= total
        if st["finished"] or (not final and now - st["logged"] < self.every):
            return
        rate = _rate(done - st["done0"], now - st["t0"])
        left = f", {duration((total - done) / rate)} left" if rate > 0 and not final else ""
        finish = progress.finish_time(stage, (total - done) / rate) if rate > 0 and not final else None
        if finish is not None:  # a budgeted run: when the whole run is predicted to end, at this rate
            left += f", run finish predicted at {datetime.fromtimestamp(finish).strftime('%H:%M:%S')}"
        share = 100.0 * done / total if total else 100.0
        self.logger.info("%s: %.0f%% (%s of %s %s), %s %s/s%s", stage, share, si(done), si(total), unit, si(rate),
                         unit, left)
        st["logged"], st["finished"] = now, final


class ConsoleProgress:
    """Progress sink drawing one rich bar per stage pass with the rate (tokens/s) and the time left.

    Use it as a context manager: it starts and stops the live display, and meanwhile routes Prefect's console log
    handlers through the same rich console, so log lines scroll above the bars instead of breaking them.
    """

    def __init__(self, console=None):
        from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn, TimeRemainingColumn

        self.progress = Progress(TextColumn("{task.description:<8}"), BarColumn(), TaskProgressColumn(),
                                 TextColumn("{task.fields[figures]}"), TimeRemainingColumn(), console=console,
                                 transient=False)
        self._bars: dict[str, dict] = {}
        self._swapped: list[tuple[object, object]] = []

    def __enter__(self):
        import logging

        for handler in logging.getLogger("prefect").handlers + logging.getLogger().handlers:
            if hasattr(handler, "console") and hasattr(handler.console, "print"):  # Prefect's rich console handler
                self._swapped.append((handler, handler.console))
                handler.console = self.progress.console
        self.progress.start()
        return self

    def __exit__(self, *exc):
        self.progress.stop()
        for handler, console in self._swapped:
            handler.console = console
        self._swapped.clear()
        return False

    def __call__(self, stage: str, done: int, total: int, unit: str) -> None:
        now = time.monotonic()
        bar = self._bars.get(stage)
        if _new_pass(bar and (bar["done"], bar["total"]), done, total):
            n = bar["n"] + 1 if bar else 1
            label = stage if n == 1 else f"{stage} #{n}"
            task_id = self.progress.add_task(label, total=max(total, 1), completed=done,
                                             figures=f"{si(done)}/{si(total)} {unit}")
            self._bars[stage] = {"id": task_id, "n": n, "t0": now, "done0": done, "done": done, "total": total}
            return
        bar["done"] = done
        rate = _rate(done - bar["done0"], now - bar["t0"])
        figures = f"{si(done)}/{si(total)} {unit}, {si(rate)} {unit}/s"
        finish = progress.finish_time(stage, (total - done) / rate) if rate > 0 and done < total else None
        if finish is not None:  # a budgeted run: when the whole run is predicted to end, at this rate
            figures += f", run ends ~{datetime.fromtimestamp(finish).strftime('%H:%M:%S')}"
        self.progress.update(bar["id"], completed=done, figures=figures)


def listen(sink):
    """Install ``sink`` with ``graphkit.progress.listen`` for the ``with`` block.

    A no-op context while graphkit has no ``progress`` module: the stage summaries are logged either way.
    """
    try:
        from graphkit import progress
    except ImportError:
        return nullcontext(sink)
    return progress.listen(sink)


@contextmanager
def console_progress(console=None):
    """Progress bars on stderr for the command line, when stderr is a terminal (else nothing is drawn)."""
    from rich.console import Console

    console = console or Console(stderr=True)
    if not console.is_terminal:
        yield None
        return
    try:  # Prefect installs its console log handler lazily; have it now, so the bars can share it
        from prefect.logging import get_logger

        get_logger("graphkit")
    except ImportError:
        pass
    with ConsoleProgress(console) as bars, listen(bars):
        yield bars

