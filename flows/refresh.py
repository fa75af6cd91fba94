"""The nightly refresh as a Prefect flow: one thin task per stage over graphkit.pipeline, resumable after a crash.

Resuming. Each stage's work folder under ``STORE/work/`` is named by a key built from the input fingerprint and the
parameters that stage depends on (:func:`graphkit.pipeline.plan_run`), so changing ``train.dim`` changes only the
train folder. A task's cache key is its folder name, and its persisted result is stored *inside* that folder
(``prefect-<task>.json``): a cached result lives and dies with the files it describes, and
:func:`graphkit.pipeline.finish_run` removes both once the version is published. The pipeline's completion markers
stay the source of truth: a stage whose marker is missing runs with ``refresh_cache=True`` even if a result record
survived, and a stage whose record is gone but whose marker exists runs and skips by the marker. Finished walk
shards are skipped inside the walks stage by the corpus writer.

The steps and their order are those of :func:`graphkit.pipeline.refresh`. Retries only on ingest and publish, and
only for I/O failures. Every run, failed or not, attaches a markdown artifact with its counts, metrics and
per-stage timings; the run logger carries one line of figures per stage and, through ``graphkit.progress``, the
walks' and training's progress with tokens/s and time left.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_markdown_artifact
from prefect.cache_policies import NO_CACHE, CachePolicy

from graphkit import pipeline
from graphkit.config import RefreshConfig, load_config
from graphkit.errors import GateFailure, InputError

from graphkit.flows.artifacts import LogProgress, listen, run_markdown, stage_summary

__all__ = ["refresh_flow", "ARTIFACT_KEY", "STAGES"]

#: Key of the run artifact (one per run; the UI groups them under this key).
ARTIFACT_KEY = "graphkit-refresh"
#: Resumable stage -> (plan entry of its work folder, completion marker that graphkit.pipeline writes last).
STAGES = {"ingest": ("ingest_dir", "ingest.json"), "graph": ("ingest_dir", "ingest.json"),
          "holdout": ("holdout_dir", "holdout.json"),
          "eval_walks": ("eval_walks_dir", "manifest.json"), "eval_train": ("eval_train_dir", "train.json"),
          "walks": ("walks_dir", "manifest.json"), "train": ("train_dir", "train.json")}


@dataclass
class StageFolderKey(CachePolicy):
    """Cache key ``<work-folder name>/prefect-<task name>.json``, relative to ``STORE/work``.

    The folder name already encodes the input fingerprint and the stage's parameters; Prefect stores the result
    record under the cache key, which puts it inside the stage's folder.
    """

    folder: str = "ingest_dir"

    def compute_key(self, task_ctx, inputs: dict[str, Any], flow_parameters: dict[str, Any], **kwargs) -> str:
        return f"{Path(inputs['plan'][self.folder]).name}/prefect-{task_ctx.task.name}.json"


def _io_failure(task, task_run, state) -> bool:
    """Retry condition: file, network and database I/O failures get another attempt; bad input
    (``InputError``), a failed quality gate and bugs do not, as they would fail the same way again."""
    import duckdb

    exc = state.result(raise_on_failure=False)
    return isinstance(exc, (OSError, duckdb.IOException)) and not isinstance(exc, InputError)


# The cache policy, the result storage and refresh_cache are set per call by _run_stage, together: a task called
# on its own (in a notebook, in another flow) is not cached and does not trust any record.
_PERSIST = {"persist_result": True, "result_serializer": "json", "cache_policy": NO_CACHE}


@task(name="ingest", retries=2, retry_delay_seconds=10, retry_condition_fn=_io_failure, **_PERSIST)
def ingest_task(cfg: RefreshConfig, plan: dict) -> dict:
    """Read the edge tables with DuckDB into the run's CSR graph and node dictionary."""
    return pipeline.stage_ingest(cfg, plan)


@task(name="graph", **_PERSIST)
def graph_task(cfg: RefreshConfig, plan: dict) -> dict:
    """Open and check the memory-mapped CSR graph."""
    return pipeline.stage_graph(cfg, plan)


@task(name="holdout", **_PERSIST)
def holdout_task(cfg: RefreshConfig, plan: dict) -> dict | None:
    """Hold out edges for the link-prediction check."""
    return pipeline.stage_holdout(cfg, plan)


@task(name="walks", task_run_name="walks-{which}", **_PERSIST)
def walks_task(cfg: RefreshConfig, plan: dict, which: str = "published") -> dict:
    """Write the walk corpus, shard by shard, on Dask (finished shards are kept)."""
    return pipeline.stage_walks(cfg, plan, which)


@task(name="train", task_run_name="train-{which}", **_PERSIST)
def train_task(cfg: RefreshConfig, plan: dict, which: str = "published") -> dict:
    """Train skip-gram vectors over the walk corpus."""
    return pipeline.stage_train(cfg, plan, which)


@task(name="evaluate", persist_result=False)  # recomputed by every run: nothing to keep in PREFECT_HOME
def evaluate_task(cfg: RefreshConfig, plan: dict, train: dict, eval_train: dict | None) -> dict:
    """Quality figures: link prediction on held-out edges, node classification, drift against the current version."""
    return pipeline.stage_evaluate(cfg, plan, train, eval_train)


@task(name="publish", retries=2, retry_delay_seconds=10, retry_condition_fn=_io_failure, persist_result=False)
def publish_task(cfg: RefreshConfig, plan: dict, ingest: dict, graph: dict, walks: dict, train: dict,
                 evaluation: dict | None, holdout: dict | None) -> int:
    """Check the quality gates and publish the vectors as a new current version."""
    return pipeline.stage_publish(cfg, plan, ingest, graph, walks, train, evaluation, holdout)


def _run_stage(stage: str, task_, plan: dict, log, record: dict, *args):
    """Run one stage's task, resuming where the markers allow; record its status and wall time in ``record``."""
    log.info("stage %s started", stage)
    options = {}
    if stage in STAGES:
        folder, marker = STAGES[stage]
        options = {"cache_policy": StageFolderKey(folder=folder),
                   "result_storage": Path(plan["work"]),  # a Path: local storage, no saved block
                   "refresh_cache": not (Path(plan[folder]) / marker).exists()}
    t0 = time.perf_counter()
    state = task_.with_options(**options)(*args, return_state=True)
    seconds = time.perf_counter() - t0
    try:
        result = state.result()
    except BaseException:
        record[stage] = {"status": "failed", "seconds": seconds, "result": None}
        raise
    if stage == "publish":
        record[stage] = {"status": "ran", "seconds": seconds, "result": {"version": result, "seconds": seconds}}
        return result
    cached = state.name == "Cached"
    if cached:  # the record is the dict of the run that did the work; this run did none of it
        result = {**result, "skipped": True}
    status = "cached" if cached else ("skipped" if result.get("skipped") else "ran")
    record[stage] = {"status": status, "seconds": seconds, "result": result}
    log.info("%s (task %s)", stage_summary(stage, result), status)
    return result


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
    record: dict[str, dict] = {}
    version, error, plan = None, None, None
    t0 = time.perf_counter()
    clock = pipeline.RUN_CLOCK
    clock.begin_flow()  # the version's timings add up to the run: see graphkit.pipeline.RunClock
    try:
        # inside the try: a scheduled run with a broken config or input still leaves its report
        with clock.span("plan"):
            cfg = load_config(config_path, overrides or [])
            plan = pipeline.plan_run(cfg, _scheduled_as_of())
        log.info("as_of %s (%s)", plan["as_of"], plan["as_of_source"])
        with pipeline.run_lock(cfg), listen(LogProgress(log)):
            pipeline.begin_run(plan)
            # the same steps, in the same order, as graphkit.pipeline.refresh
            ingest = _run_stage("ingest", ingest_task, plan, log, record, cfg, plan)
            for warning in ingest.get("warnings", []):
                log.warning(warning)
            graph = _run_stage("graph", graph_task, plan, log, record, cfg, plan)
            holdout, eval_train = None, None
            if plan.get("holdout_dir"):
                holdout = _run_stage("holdout", holdout_task, plan, log, record, cfg, plan)
                if not cfg.evaluate.publish_holdout_model:  # the full-graph model is published: a second pass
                    eval_walks = _run_stage("eval_walks", walks_task, plan, log, record, cfg, plan, "eval")
                    eval_train = _run_stage("eval_train", train_task, plan, log, record, cfg, plan, "eval")
                    for name, stage in (("eval_walks", eval_walks), ("eval_train", eval_train)):
                        clock.add(name, 0.0 if stage.get("skipped") else stage["seconds"])
            walks = _run_stage("walks", walks_task, plan, log, record, cfg, plan)
            train = _run_stage("train", train_task, plan, log, record, cfg, plan)
            if holdout is not None and cfg.evaluate.publish_holdout_model:
                eval_train = train  # the published vectors never saw the held-out edges
            evaluation = _run_stage("evaluate", evaluate_task, plan, log, record, cfg, plan, train, eval_train)
            try:
                version = _run_stage("publish", publish_task, plan, log, record, cfg, plan, ingest, graph, walks,
                                     train, evaluation, holdout)
            except GateFailure:
                pipeline.finish_run(plan)  # recorded as a failed version; nothing left to resume
                raise
            pipeline.finish_run(plan)
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
