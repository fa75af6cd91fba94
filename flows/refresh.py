"""The nightly refresh as a Prefect flow: :data:`graphkit.pipeline.STAGES` run by :func:`graphkit.pipeline.execute`,
each stage's call wrapped in a Prefect task named after the stage.

Resuming. Each stage's work folder under ``STORE/work/`` is named by a key built from the input fingerprint and the
parameters that stage depends on (:func:`graphkit.pipeline.plan_run`), and the stage writes its completion marker
there last. The markers are the only record of what a rerun skips: a stage whose marker exists returns the marker's
figures at once (``skipped``), and Prefect caches nothing. Finished walk shards are skipped inside the walks stage
by the corpus writer.

Retries (each stage's ``retries``: ingest and publish) only for I/O failures. Every run, failed or not, attaches a
markdown artifact with its counts, metrics and per-stage timings. The stage lines and warnings of
:mod:`graphkit.logs` go to the run's log in Prefect as well; through ``graphkit.progress`` the walks' and
training's progress is logged with tokens/s and time left.
"""

from __future__ import annotations

import logging
import time
from contextlib import contextmanager

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_markdown_artifact
from prefect.cache_policies import NO_CACHE

from graphkit import pipeline
from graphkit.config import load_config
from graphkit.errors import InputError
from graphkit.logs import RUN_LOGGER

from graphkit.flows.artifacts import LogProgress, listen, run_markdown

__all__ = ["refresh_flow", "ARTIFACT_KEY", "stage_task"]

#: Key of the run artifact (one per run; the UI groups them under this key).
ARTIFACT_KEY = "graphkit-refresh"


def _io_failure(task, task_run, state) -> bool:
    """Retry condition: file, network and database I/O failures get another attempt; bad input
    (``InputError``), a failed quality gate and bugs do not, as they would fail the same way again."""
    import duckdb

    exc = state.result(raise_on_failure=False)
    return isinstance(exc, (OSError, duckdb.IOException)) and not isinstance(exc, InputError)


def stage_task(stage: pipeline.Stage):
    """The Prefect task running one stage (:func:`graphkit.pipeline.run_stage`); nothing is cached or persisted."""
    return task(pipeline.run_stage, name=stage.name, task_run_name=stage.name, retries=stage.retries,
                retry_delay_seconds=10, retry_condition_fn=_io_failure if stage.retries else None,
                cache_policy=NO_CACHE, persist_result=False)


def _call_in_task(stage: pipeline.Stage, cfg, plan: dict, *inputs):
    return stage_task(stage)(stage, cfg, plan, *inputs)


def _in_a_run(record) -> bool:
    from prefect.context import FlowRunContext, TaskRunContext

    return FlowRunContext.get() is not None or TaskRunContext.get() is not None  # else: another thread's line


@contextmanager
def _to_run_log():
    """graphkit's own log lines (the stage lines, warnings) also go to the run's log in Prefect; at info level
    unless the command line set a level (:func:`graphkit.logs.configure`)."""
    from prefect.logging.handlers import APILogHandler

    handler = APILogHandler()
    handler.addFilter(_in_a_run)
    logger = logging.getLogger("graphkit")
    level = logger.level
    if level == logging.NOTSET:
        logger.setLevel(logging.INFO)
    logger.addHandler(handler)
    try:
        yield
    finally:
        logger.removeHandler(handler)
        logger.setLevel(level)


def _attach_artifact(log, store: str, record: dict, version: int | None, error: str | None, seconds: float) -> None:
    try:
        create_markdown_artifact(markdown=run_markdown(store=store, stages=record, version=version, error=error,
                                                       total_seconds=seconds),
                                 key=ARTIFACT_KEY, description=f"graphkit refresh of {store}")
    except Exception as exc:  # noqa: BLE001 - the report must not turn a published run into a failed one
        log.warning("could not attach the run artifact: %s: %s", type(exc).__name__, exc)


def _scheduled_as_of():
    """The scheduled start time of a deployment run (a retry or a rerun of that flow run gets the same one), or
    None for a run started directly, such as ``graphkit refresh`` (see :func:`graphkit.pipeline.plan_run`)."""
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    run = ctx.flow_run if ctx else None
    if run is None or run.deployment_id is None:
        return None
    return run.expected_start_time


@flow(name="graphkit-refresh", persist_result=True)
def refresh_flow(config_path: str = "sample_parquet/demo.toml", overrides: list[str] | None = None) -> int:
    """Refresh the node embeddings a config describes and publish them as a new version."""
    log = get_run_logger()
    run_log = logging.getLogger(RUN_LOGGER)
    record: dict[str, dict] = {}
    version, error, plan = None, None, None
    t0 = time.perf_counter()
    clock = pipeline.RUN_CLOCK
    clock.begin_flow()  # the version's timings add up to the run: see graphkit.pipeline.RunClock
    try:
        with _to_run_log():
            # inside the try: a scheduled run with a broken config or input still leaves its report
            with clock.span("plan"):
                cfg = load_config(config_path, overrides or [])
                plan = pipeline.plan_run(cfg, _scheduled_as_of())
            run_log.debug("as_of %s (%s)", plan["as_of"], plan["as_of_source"])
            with listen(LogProgress(log)):
                version = pipeline.execute(cfg, plan, call=_call_in_task, record=record)
    except BaseException as exc:
        error = f"{type(exc).__name__}: {(str(exc).splitlines() or [''])[0]}"
        raise
    finally:
        _attach_artifact(log, plan["store"] if plan else str(config_path), record, version, error,
                         time.perf_counter() - t0)
        clock.end_flow()  # what followed the version row, measured for the next run's estimate
    log.info("published version %d to %s in %.1f s", version, plan["store"], time.perf_counter() - t0)
    return version


if __name__ == "__main__":
    import sys

    print(refresh_flow(*(sys.argv[1:2] or [])))
