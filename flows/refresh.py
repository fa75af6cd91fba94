"""The nightly refresh as a Prefect flow: one thin task per stage over the plain functions in graphkit.pipeline."""

from __future__ import annotations

from prefect import flow, get_run_logger, task

from graphkit import pipeline
from graphkit.config import RefreshConfig, load_config


@task(name="ingest", retries=2, retry_delay_seconds=5)
def ingest_task(cfg: RefreshConfig, plan: dict) -> dict:
    """Read the edge table with DuckDB into the run's CSR graph and node dictionary."""
    return pipeline.stage_ingest(cfg, plan)


@task(name="graph")
def graph_task(cfg: RefreshConfig, plan: dict) -> dict:
    """Open and check the memory-mapped CSR graph."""
    return pipeline.stage_graph(cfg, plan)


@task(name="walks")
def walks_task(cfg: RefreshConfig, plan: dict) -> dict:
    """Write the walk corpus, shard by shard, on Dask."""
    return pipeline.stage_walks(cfg, plan)


@task(name="train")
def train_task(cfg: RefreshConfig, plan: dict) -> dict:
    """Train skip-gram vectors over the walk corpus."""
    return pipeline.stage_train(cfg, plan)


@task(name="publish", retries=2, retry_delay_seconds=5)
def publish_task(cfg: RefreshConfig, plan: dict, ingest: dict, graph: dict, walks: dict, train: dict) -> int:
    """Publish the vectors as a new current version."""
    return pipeline.stage_publish(cfg, plan, ingest, graph, walks, train)


@flow(name="graphkit-refresh")
def refresh_flow(config_path: str = "sample_parquet/demo.toml", overrides: list[str] | None = None) -> int:
    """Refresh the node embeddings a config describes and publish them as a new version."""
    log = get_run_logger()
    cfg = load_config(config_path, overrides or [])
    plan = pipeline.plan_run(cfg)
    with pipeline.run_lock(cfg):
        ingest = ingest_task(cfg, plan)
        log.info("ingest: %s", ingest["counts"])
        for warning in ingest.get("warnings", []):
            log.warning(warning)
        graph = graph_task(cfg, plan)
        walks = walks_task(cfg, plan)
        log.info("walks: %d walks, %d tokens", walks["n_walks"], walks["n_tokens"])
        train = train_task(cfg, plan)
        log.info("train: %d tokens at %d tokens/s", train["tokens"], train["tokens_per_second"])
        version = publish_task(cfg, plan, ingest, graph, walks, train)
        pipeline.finish_run(plan)
    log.info("published version %d", version)
    return version


if __name__ == "__main__":
    import sys

    print(refresh_flow(*(sys.argv[1:2] or [])))
