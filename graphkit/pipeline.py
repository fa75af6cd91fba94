"""The refresh as plain functions, one per stage, and the stage list :data:`STAGES` that orders them.

:func:`refresh` runs the list in plain Python; the Prefect flow (``graphkit.flows.refresh``) runs the same list
through :func:`execute`, wrapping each stage's call in a task. There is no other copy of the order.

Every stage reads and writes files under ``STORE/work/`` and returns a small JSON-serialisable dict (paths,
counts, seconds), never arrays. A stage's folder is named by a key built from the input fingerprint and the
parameters that stage depends on, and its completion marker is written last, so a rerun after a crash skips what
already finished (changing the training dimension does not redo the walks).
"""

from __future__ import annotations

import os
import shutil
import time
from datetime import datetime, timedelta, timezone
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow.parquet as pq

from . import budget, progress
from .config import RefreshConfig
from .errors import GateFailure
from .faults import fault_point
from .graph import AdjacencyArrays
from .ingest import ingest_tables, validate_edge_tables
from .ids import salt_from_env
from .io import atomic_output, digest, fingerprint_files, read_json, write_json_atomic
from .quality import check_labels_table

__all__ = ["plan_run", "preflight", "stage_ingest", "stage_graph", "stage_holdout", "stage_walks", "stage_train",
           "stage_evaluate", "stage_eval_walks", "stage_eval_train", "begin_run", "stage_publish", "finish_run", "refresh",
           "run_lock", "fault_point", "RUN_CLOCK", "RunClock", "Stage", "STAGES", "run_stage", "run_stages", "execute"]

#: Name of the file in ``STORE/reports/`` holding the measured after-publish cost of the store's last run.
TAIL_FILE = ".timing-tail.json"
#: After-publish estimate (s) for a store whose last run left no measurement: cleanup, the run artifact, Prefect's
#: flow teardown, the temporary server's stop and the interpreter's exit, measured at about 7 s on the 2-core
#: development machine (docs/evaluation.md).
DEFAULT_TAIL_SECONDS = {"flow": 0.5, "command": 7.0}


class RunClock:
    """Wall-time accounting of one refresh, so that the timings recorded with a version add up to the run.

    Three kinds of entries end up in the version's ``timings``:

    - costs before the flow starts, added by the command line (:meth:`begin_command`, :meth:`span`):
      ``startup`` (from the process's own start, read with ``psutil.Process().create_time()``, to the flow:
      interpreter start-up, imports, the config, and whatever is not timed separately), ``preflight``,
      ``server_start``;
    - costs inside the flow: each stage's own seconds (computed by :func:`stage_publish` from the stage dicts),
      ``plan``, ``lock_wait``, ``align``, ``report`` and ``orchestration`` (the rest of the flow's wall time up to
      the version row: Prefect's task bookkeeping, loading the node ids, the gates);
    - ``after_publish_estimate``: what follows the row (catalog switch, diagnostics, cleanup, the run artifact,
      Prefect's teardown and, from the command line, the temporary server's stop and the interpreter's exit),
      which cannot be measured before the row is written. It is the value measured at the end of the store's
      previous run (``STORE/reports/.timing-tail.json``), or :data:`DEFAULT_TAIL_SECONDS` for a first run.

    One instance (:data:`RUN_CLOCK`) serves the process; a flow consumes the command's entries when it starts, so
    a second flow in the same process starts from nothing.
    """

    def __init__(self):
        self.reset()

    def reset(self) -> None:
        self.command_start = None  # epoch seconds of the process start, when a command line began this run
        self.before: dict[str, float] = {}
        self.during: dict[str, float] = {}
        self.flow_start = None
        self.from_command = False
        self.row_at = None  # epoch seconds when the version row's timings were frozen
        self.row_store = None
        self.row_publish = 0.0

    def begin_command(self) -> None:
        """Called first by ``graphkit refresh``: the run's clock starts at the process's own start."""
        import atexit

        import psutil

        self.reset()
        self.command_start = psutil.Process().create_time()
        if not getattr(self, "_at_exit", False):  # once per process, however many commands run in it
            # registered before the temporary server starts, so that it runs after Prefect's exit handler stops it
            atexit.register(self._record_tail, "command")
            self._at_exit = True

    @contextmanager
    def span(self, name: str):
        """Time a block and add it under ``name`` (before the flow: to the command's costs)."""
        t0 = time.time()
        try:
            yield
        finally:
            self.add(name, time.time() - t0)

    def add(self, name: str, seconds: float) -> None:
        target = self.during if self.flow_start is not None else self.before
        target[name] = target.get(name, 0.0) + max(float(seconds), 0.0)

    def begin_flow(self) -> None:
        """Called when the flow body (or :func:`refresh`) starts."""
        now = time.time()
        if self.command_start is None:
            self.reset()
        else:
            self.before["startup"] = max(now - self.command_start - sum(self.before.values()), 0.0)
            self.command_start, self.from_command = None, True
        self.flow_start = now
        self.during = {}
        self.row_at = None
        progress.predict_finish(None)  # a finish predicted for an earlier run of this process

    def elapsed(self) -> float:
        """Seconds since the run started: the process's start for a command, else the flow's (0 outside a run)."""
        now = time.time()
        if self.command_start is not None:  # before the flow: the command's own clock
            return max(now - self.command_start, 0.0)
        if self.flow_start is None:
            return 0.0
        return sum(self.before.values()) + max(now - self.flow_start, 0.0)

    def row_timings(self, stage_seconds: float) -> dict[str, float]:
        """The entries beyond the stages' own seconds, frozen now (just before the version row is written)."""
        if self.flow_start is None:
            return {}
        now = time.time()
        rest = now - self.flow_start - sum(self.during.values()) - stage_seconds
        out = {**self.before, **self.during, "orchestration": max(rest, 0.0)}
        self.row_at = now
        return {k: round(v, 3) for k, v in out.items()}

    def tail_estimate(self, store) -> float:
        which = "command" if self.from_command else "flow"
        try:
            return float(read_json(Path(store) / "reports" / TAIL_FILE)[which])
        except (OSError, ValueError, KeyError, TypeError):
            return DEFAULT_TAIL_SECONDS[which]

    def row_written(self, store, publish_seconds: float) -> None:
        self.row_store, self.row_publish = str(store), float(publish_seconds)

    def end_flow(self) -> None:
        """Called last in the flow: measure what followed the version row (for the next run's estimate)."""
        if not self.from_command:
            self._record_tail("flow")

    def _record_tail(self, which: str) -> None:
        if self.row_at is None or self.row_store is None:
            return
        since = self.row_at + self.row_publish  # the row's own "publish" seconds are measured, not estimated
        path = Path(self.row_store) / "reports" / TAIL_FILE
        self.row_at = None
        try:
            if which == "flow":
                _write_tail(str(path), which, time.time() - since)
                return
            # From the command line, the interpreter's own shutdown still follows (several seconds with Prefect,
            # Dask and numba loaded, in C code after every exit handler): a detached helper holding a pipe whose
            # only writer is this process takes the time when the pipe closes, i.e. when this process has ended.
            import subprocess
            import sys

            read_fd, write_fd = os.pipe()  # non-inheritable: only the helper gets the read end
            subprocess.Popen([sys.executable, "-I", "-S", "-c", _TAIL_HELPER, str(read_fd), str(path), which,
                              repr(since)], pass_fds=(read_fd,), start_new_session=True, stdin=subprocess.DEVNULL,
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            os.close(read_fd)
            _KEEP_OPEN.append(write_fd)  # closed by the kernel when this process ends
        except (OSError, ValueError):  # a measurement for the next run's estimate; never fail a run over it
            pass


_KEEP_OPEN: list[int] = []
#: The helper of :meth:`RunClock._record_tail`: waits for end of file, then records the seconds since ``since``.
_TAIL_HELPER = """
import json, os, sys, time
fd, path, which, since = int(sys.argv[1]), sys.argv[2], sys.argv[3], float(sys.argv[4])
with os.fdopen(fd, "rb") as pipe:
    pipe.read()
seconds = time.time() - since
try:
    with open(path) as f:
        data = json.load(f)
except (OSError, ValueError):
    data = {}
data[which] = round(max(seconds, 0.0), 3)
tmp = path + ".tmp-" + str(os.getpid())
with open(tmp, "w") as f:
    os.fchmod(f.fileno(), 0o644)  # like the rest of the store, whatever umask the run left
    json.dump(data, f)
os.replace(tmp, path)
"""


def _write_tail(path: str, which: str, seconds: float) -> None:
    p = Path(path)
    try:
        data = read_json(p) if p.exists() else {}
    except ValueError:
        data = {}
    data[which] = round(max(seconds, 0.0), 3)
    write_json_atomic(p, data)
    os.chmod(p, 0o644)  # written after the run's umask is restored: no group/world write bits, like the store


#: The process's run clock (see :class:`RunClock`).
RUN_CLOCK = RunClock()


def preflight(cfg: RefreshConfig, as_of: datetime | None = None) -> dict[str, Any]:
    """Checks that must fail within seconds, before any work: the store path and its lock, the id-hashing key,
    the labels table, and the edge tables' files, format, columns and rows (counted in the window ending at
    ``as_of``, default now)."""
    from .store import check_store_writable

    check_store_writable(cfg.store_path)
    if cfg.input.hash_ids:
        salt_from_env(cfg.input.hash_salt_env)
    info = validate_edge_tables(cfg.tables(), drop_null_ids=cfg.input.drop_null_ids,
                                window=cfg.input.time_window(as_of))
    if cfg.labels_path is not None:
        check_labels_table(cfg.labels_path, id_column=cfg.evaluate.label_id_column,
                           label_column=cfg.evaluate.label_column, kind=cfg.evaluate.label_kind,
                           kinds={k for t in cfg.tables() for k in (t.source_kind, t.target_kind)})
    if cfg.budget.minutes is not None:
        _check_budget_from_lineage(cfg, int((info.get("counts") or {}).get("rows") or 0))
    return info


def _check_budget_from_lineage(cfg: RefreshConfig, rows_now: int) -> None:
    """Refuse a budget below the smallest sizing before any work, when the store's newest matching version can
    predict the run (its node count and the stages before the sizing scaled by the input's row count)."""
    from .store import CATALOG, list_versions

    if not (cfg.store_path / CATALOG).exists():
        return
    rows = list_versions(cfg.store_path)
    walks, train = cfg.walks.model_dump(), cfg.train.model_dump()
    for row in sorted(rows, key=lambda r: -r["version"]):
        counts, timings = row.get("counts") or {}, row.get("timings") or {}
        if not counts.get("rows") or not counts.get("nodes") or not rows_now:
            continue
        scale = rows_now / counts["rows"]
        n_nodes = max(int(counts["nodes"] * scale), 1)
        costs = budget.costs_from_lineage([row], walks, train, n_nodes)
        if costs is None:
            continue
        before = sum(float(timings.get(k) or 0) for k in ("server_start", "ingest", "graph", "holdout", "plan",
                                                           "lock_wait"))
        elapsed = RUN_CLOCK.elapsed() + before * scale
        budget.choose_sizing(minutes=cfg.budget.minutes, elapsed=elapsed, n_nodes=n_nodes, length=cfg.walks.length,
                             passes=2 if _passes_twice(cfg) else 1, costs=costs, max_per_node=cfg.walks.per_node,
                             max_epochs=cfg.train.epochs,
                             where=f"from version {row['version']} of the store, scaled to {rows_now:,} rows")
        return


#: A manual run resumes an unfinished run of the same input only while that run's ``as_of`` is younger than this.
RESUME_WITHIN_HOURS = 24.0
#: ``STORE/work/run-<input key>.json``: the ``as_of`` of a run that has started and not finished.
RUN_RECORD_PREFIX = "run-"


def _utc(moment: datetime) -> datetime:
    return (moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)).astimezone(timezone.utc)


def _choose_as_of(cfg: RefreshConfig, record: Path, as_of: datetime | None, now: datetime | None
                  ) -> tuple[datetime, str]:
    """The run's reference time and where it comes from (see :func:`plan_run`)."""
    window = cfg.input.time_window()
    if window["until"] is not None:
        return window["until"], "until"
    if as_of is not None:
        return _utc(as_of), "scheduled"
    now = _utc(now or datetime.now(timezone.utc)).replace(microsecond=0)
    try:
        previous = datetime.fromisoformat(read_json(record)["as_of"])
    except (OSError, ValueError, KeyError, TypeError):
        previous = None
    if previous is not None and timedelta(0) <= now - _utc(previous) < timedelta(hours=RESUME_WITHIN_HOURS):
        return _utc(previous), "resumed"
    return now, "now"


def plan_run(cfg: RefreshConfig, as_of: datetime | None = None, *, now: datetime | None = None) -> dict[str, Any]:
    """Work folders and stage keys for a config (reads the input files once to fingerprint them).

    The run's reference time ``as_of`` (the end of a ``last_days`` window, the age reference of
    ``half_life_days``) is fixed here, once per run, and recorded in the plan (``as_of``, ``as_of_source``):

    - ``[input] until`` when the config sets it (``"until"``);
    - else the ``as_of`` given, which the flow passes for a deployment run: its scheduled start time
      (``"scheduled"``);
    - else the ``as_of`` of an unfinished run of the same input (same files, same content, same ``[input]``
      settings) recorded in ``STORE/work/run-<key>.json`` by :func:`begin_run`, if it is less than
      :data:`RESUME_WITHIN_HOURS` old (``"resumed"``): a rerun after a kill resumes from its finished stages;
    - else now, to the second (``"now"``).
    """
    store = cfg.store_path
    work = store / "work"
    files = [f for fs in preflight(cfg, as_of)["files"] for f in fs]
    fingerprint = fingerprint_files(files)
    inp = cfg.input
    input_key = digest({"fingerprint": fingerprint, "input": cfg.input.model_dump(exclude={"tables"}),
                        "tables": [t.model_dump() for t in cfg.tables()]})
    record = work / f"{RUN_RECORD_PREFIX}{input_key}.json"
    as_of, as_of_source = _choose_as_of(cfg, record, as_of, now)
    window = cfg.input.time_window(as_of)
    windowed = any(v is not None for v in (inp.since, inp.until, inp.last_days, inp.half_life_days))
    # as_of shapes the result only through a last_days window (already in since) or the weight decay
    key_window = None if not windowed else {**window, "as_of": as_of if inp.half_life_days is not None else None}
    ingest_key = digest({"fingerprint": fingerprint, "input": cfg.input.model_dump(exclude={"tables"}),
                         "tables": [t.model_dump() for t in cfg.tables()], "window": key_window})

    warm_from = None
    if cfg.train.warm_start:  # the start depends on the version current now
        from .store import current_version

        warm_from = current_version(store)
    ev = cfg.evaluate
    holdout_key = None
    if ev.link_holdout > 0:
        holdout_key = digest({"ingest": ingest_key, "fraction": ev.link_holdout, "seed": ev.seed,
                              "max_edges": ev.max_holdout_edges})
    keys = {"ingest": ingest_key, "holdout": holdout_key, "warm_from": warm_from}
    ingest_dir = work / f"ingest-{ingest_key}"
    budget_dir = {}
    if cfg.budget.minutes is not None:  # keyed by the bounds: a rerun finds the sizing its first attempt chose
        budget_key = digest({**keys, "budget": cfg.budget.model_dump(), "walks": cfg.walks.model_dump(),
                             "train": cfg.train.model_dump()})
        budget_dir = {"budget_dir": str(work / f"budget-{budget_key}")}
    return {
        "store": str(store),
        "work": str(work),
        "keep_work_days": cfg.store.keep_work_days,
        "fingerprint": fingerprint,
        "as_of": as_of.isoformat(),
        "as_of_source": as_of_source,
        "run_record": str(record),
        "ingest_dir": str(ingest_dir),
        "keys": keys,
        **budget_dir,
        **model_dirs(cfg, work, keys),
        "params": cfg.to_public_dict(),
        "window": {k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in window.items()},
    }


def model_dirs(cfg: RefreshConfig, work: Path, keys: dict) -> dict[str, str]:
    """The graph, walks and train folders of the published model and, with a holdout, of the evaluation model,
    keyed by the input and the parameters each stage depends on (``keys``: the plan's ingest and holdout keys and
    the version a warm start starts from)."""
    def chain(graph_key: str) -> tuple[str, str]:
        walks_key = digest({"graph": graph_key, "walks": cfg.walks.model_dump()})
        train_key = digest({"walks": walks_key, "train": cfg.train.model_dump(exclude={"threads", "memmap"}),
                            "warm_from": keys["warm_from"]})
        return str(work / f"walks-{walks_key}"), str(work / f"train-{train_key}")

    walks_dir, train_dir = chain(keys["ingest"])
    out = {"graph_dir": str(work / f"ingest-{keys['ingest']}" / "graph"), "walks_dir": walks_dir,
           "train_dir": train_dir}
    if keys["holdout"] is not None:
        holdout_dir = work / f"holdout-{keys['holdout']}"
        eval_walks, eval_train = chain(keys["holdout"])
        out.update(holdout_dir=str(holdout_dir), eval_walks_dir=eval_walks, eval_train_dir=eval_train)
        if cfg.evaluate.publish_holdout_model:  # one run: the published vectors are the evaluated ones
            out.update(graph_dir=str(holdout_dir / "graph"), walks_dir=eval_walks, train_dir=eval_train)
    return out


def stage_ingest(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """DuckDB ingest into ``ingest_dir`` (skipped when its ``ingest.json`` exists)."""
    out = Path(plan["ingest_dir"])
    if (out / "ingest.json").exists():
        return {**read_json(out / "ingest.json"), "skipped": True}
    shutil.rmtree(out, ignore_errors=True)  # leftovers of a dead run
    window = {k: (datetime.fromisoformat(v) if isinstance(v, str) else v) for k, v in plan["window"].items()}
    hash_key = salt_from_env(cfg.input.hash_salt_env) if cfg.input.hash_ids else None  # fails before long stages
    return ingest_tables(cfg.tables(), out, directed=cfg.input.directed, drop_null_ids=cfg.input.drop_null_ids,
                         window=window, hash_key=hash_key)


def stage_graph(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """Open the memory-mapped CSR written by ingest and check its invariants."""
    t0 = time.perf_counter()
    folder = Path(plan["ingest_dir"]) / "graph"
    graph = AdjacencyArrays.load(folder)
    graph.validate()
    deg = graph.degrees()
    return {"graph_dir": str(folder), "n_nodes": graph.n_nodes, "adjacency_entries": graph.n_edges,
            "isolated_nodes": int(np.count_nonzero(deg == 0)), "max_degree": int(deg.max(initial=0)),
            "seconds": round(time.perf_counter() - t0, 3)}


#: Bytes per walk token on disk, measured for zstd Parquet on a uniform random graph (stack-facts §5: 3.12 GB per
#: 1e9 tokens, the worst case); plus a margin for the count files and temporary files.
CORPUS_BYTES_PER_TOKEN = 3.2
FREE_SPACE_MARGIN = 1.2


def graph_nodes(plan: dict) -> int:
    return int(read_json(Path(plan["ingest_dir"]) / "graph" / "graph.json")["n_nodes"])


def check_free_space(folder, *, n_walks: int, length: int) -> int:
    """Refuse (``StoreError``) when the disk holding ``folder`` has less room than the walk corpus needs."""
    from .store import StoreError

    need = int(n_walks * length * CORPUS_BYTES_PER_TOKEN * FREE_SPACE_MARGIN)
    probe = Path(folder)
    while not probe.exists():
        probe = probe.parent
    free = shutil.disk_usage(probe).free
    if free < need:
        raise StoreError(f"{folder}: the walk corpus needs about {need / 1e9:.2f} GB ({n_walks} walks x {length} "
                         f"nodes) but only {free / 1e9:.2f} GB are free there")
    return need


def _walk_options(w) -> dict:
    """Walk options beyond DeepWalk's: weights, node2vec p and q, what happens at a dead end."""
    return {"weighted": w.weighted, "p": w.p, "q": w.q, "dead_end": w.dead_end}


def _dirs(plan: dict, which: str) -> tuple[str, str, str]:
    """(graph, walks, train) folders of the published model (``which="published"``) or of the evaluation model
    trained without the held-out edges (``which="eval"``)."""
    if which == "published":
        return plan["graph_dir"], plan["walks_dir"], plan["train_dir"]
    if which == "eval":
        return str(Path(plan["holdout_dir"]) / "graph"), plan["eval_walks_dir"], plan["eval_train_dir"]
    raise ValueError(f"which must be 'published' or 'eval', got {which!r}")


def stage_walks(cfg: RefreshConfig, plan: dict, which: str = "published") -> dict[str, Any]:
    """Random walks sharded over Dask into the Parquet walk corpus (finished shards are kept on a rerun)."""
    from .corpus import write_walk_corpus

    graph_dir, walks_dir, _ = _dirs(plan, which)
    out = Path(walks_dir)
    if (out / "manifest.json").exists():
        return {**read_json(out / "manifest.json"), "skipped": True}
    t0 = time.perf_counter()
    w = cfg.walks
    check_free_space(out, n_walks=w.per_node * graph_nodes(plan), length=w.length)
    manifest = write_walk_corpus(graph_dir, out, per_node=w.per_node, length=w.length,
                                 seed=w.seed, dask_address=cfg.dask.address, n_workers=cfg.dask.workers,
                                 **_walk_options(w))
    return {**manifest, "seconds": round(time.perf_counter() - t0, 3)}


def previous_dir(plan: dict) -> Path:
    """Where the run keeps the current version's rows matched to its nodes, read once and shared by warm start,
    drift and alignment (:func:`graphkit.store.match_current`); removed with the ingest folder."""
    return Path(plan["ingest_dir"]) / "previous"


def _warm_start_rows(cfg: RefreshConfig, plan: dict):
    """(rows, vectors) of the nodes the current version has (trained rows only), for ``[train] warm_start``."""
    from .store import match_current

    node_ids, node_kinds = _published_ids(cfg, plan)
    match = match_current(plan["store"], node_ids, node_kinds, cfg.train.dim, cache_dir=previous_dir(plan))
    if match is None or match["new_rows"].size == 0:
        return None, 0
    return (match["new_rows"], match["old_vectors"]), int(match["new_rows"].size)


def stage_train(cfg: RefreshConfig, plan: dict, which: str = "published") -> dict[str, Any]:
    """Skip-gram over the walk corpus, chunk by chunk; writes ``vectors.npy`` (float32 [n_nodes, dim])."""
    from .corpus import WalkCorpus
    from .train import train_vectors

    _, walks_dir, train_dir = _dirs(plan, which)
    out = Path(train_dir)
    done = out / "train.json"
    fault_point("train")
    if done.exists():
        return {**read_json(done), "skipped": True}
    t0 = time.perf_counter()
    corpus = WalkCorpus(walks_dir)
    t = cfg.train
    init, warm = None, 0
    if t.warm_start and which == "published":  # the evaluation model must not start from vectors that saw
        init, warm = _warm_start_rows(cfg, plan)   # its held-out edges
    out.mkdir(parents=True, exist_ok=True)
    vectors = train_vectors(corpus, corpus.n_nodes, dim=t.dim, window=t.window, objective=t.objective,
                            negatives=t.negatives, epochs=t.epochs, seed=cfg.walks.seed, threads=t.threads,
                            learning_rate=t.learning_rate, subsample=t.subsample, init=init,
                            memmap_dir=str(out / "memmap") if t.memmap else None)
    with atomic_output(out / "vectors.npy") as tmp, open(tmp, "wb") as fh:
        np.save(fh, vectors)
    seconds = time.perf_counter() - t0
    tokens = int(corpus.n_tokens) * t.epochs
    result = {"vectors": str(out / "vectors.npy"), "n_nodes": int(vectors.shape[0]), "dim": int(vectors.shape[1]),
              "warm_started_nodes": warm,
              "tokens": tokens, "tokens_per_second": round(tokens / max(seconds, 1e-9)),
              "seconds": round(seconds, 3)}
    write_json_atomic(done, result)
    return result


def stage_holdout(cfg: RefreshConfig, plan: dict) -> dict[str, Any] | None:
    """Hold out edges for link prediction (``[evaluate] link_holdout``); None when switched off."""
    from .quality import make_holdout

    if not plan.get("holdout_dir"):
        return None
    return make_holdout(Path(plan["ingest_dir"]) / "graph", plan["holdout_dir"],
                        fraction=cfg.evaluate.link_holdout, seed=cfg.evaluate.seed,
                        max_edges=cfg.evaluate.max_holdout_edges)


def _published_ids(cfg: RefreshConfig, plan: dict):
    """(ids as published, node kinds) in node_idx order; with ``hash_ids`` the pseudonyms ingest stored."""
    from .ids import hash_ids

    path = Path(plan["ingest_dir"]) / "nodes.parquet"
    has_pseudonyms = "node_pseudonym" in pq.read_schema(path).names
    columns = ["node_idx", "node_kind", "node_id"] + (["node_pseudonym"] if cfg.input.hash_ids and has_pseudonyms
                                                      else [])
    nodes = pq.read_table(path, columns=columns)
    idx = nodes.column("node_idx").to_numpy()
    if not np.array_equal(idx, np.arange(idx.size)):
        raise RuntimeError("node dictionary is not in node_idx order")
    node_ids = nodes.column("node_id").combine_chunks()
    if cfg.input.hash_ids:
        key = salt_from_env(cfg.input.hash_salt_env)
        stored = nodes.column("node_pseudonym").combine_chunks() if has_pseudonyms else None
        # one id re-hashed tells whether the key is still the one ingest used (a resumed run may have another)
        if stored is not None and (len(stored) == 0 or hash_ids(node_ids.slice(0, 1), key).equals(stored.slice(0, 1))):
            node_ids = stored
        else:
            node_ids = hash_ids(node_ids, key)
    return node_ids, nodes.column("node_kind").combine_chunks()


published_ids = _published_ids  # public: graphkit.foldin publishes the same ids


def stage_evaluate(cfg: RefreshConfig, plan: dict, train: dict, eval_train: dict | None = None) -> dict[str, Any]:
    """Quality figures of the run: link prediction (held-out edges), node classification (labels), drift."""
    from .quality import evaluate_vectors

    t0 = time.perf_counter()
    node_ids, node_kinds = _published_ids(cfg, plan)
    # memory-mapped, and one map when the published model is the evaluated one: the measures read row blocks
    published = np.load(train["vectors"], mmap_mode="r")
    same = eval_train is not None and Path(eval_train["vectors"]) == Path(train["vectors"])
    eval_vectors = published if same else np.load(eval_train["vectors"], mmap_mode="r") if eval_train else None
    metrics = evaluate_vectors(cfg, plan, published_vectors=published, eval_vectors=eval_vectors,
                               node_ids=node_ids, node_kinds=node_kinds)
    return {"metrics": metrics, "seconds": round(time.perf_counter() - t0, 3)}


def run_id_of(plan: dict, train: dict) -> str:
    """The id a run records in its version row, the same for every attempt of its publish.

    ``plan["run_id"]`` when the plan carries one; otherwise derived from what the plan says about the input,
    parameters and stage folders, and from the training result the vectors come from (its marker's figures and the vectors file's modification time), so a retry of the publish
    task, or a rerun that resumes from the same trained vectors, recognises the version they published, while a
    run that trains again gets a new id.
    """
    if plan.get("run_id"):
        return str(plan["run_id"])
    what = {k: plan.get(k) for k in _RUN_ID_KEYS}  # not the plan's clock readings: a rerun plans anew
    marker = {k: v for k, v in train.items() if k != "skipped"}
    return digest({"plan": what, "train": marker, "vectors_mtime_ns": os.stat(train["vectors"]).st_mtime_ns}, 32)


#: The plan entries that say which vectors a run publishes: the store, the input, the parameters, the stage folders.
_RUN_ID_KEYS = ("store", "fingerprint", "params", "ingest_dir", "graph_dir", "walks_dir", "train_dir", "holdout_dir",
                "eval_walks_dir", "eval_train_dir")


def stage_publish(cfg: RefreshConfig, plan: dict, ingest: dict, graph: dict, walks: dict, train: dict,
                  evaluation: dict | None = None, holdout: dict | None = None) -> int:
    """Check the gates and publish the trained vectors as a new current version; returns its number.

    The run's HTML report is rendered before the version row is written (so that its cost is in the row) and
    moved into ``STORE/reports/`` after; the per-node diagnostics are written inside the version before it
    becomes visible. A run that fails a gate is recorded as a ``failed`` version with the reasons and figures,
    the current version stays current, and :class:`GateFailure` is raised. The caller holds the store lock
    (see :func:`run_lock`). Idempotent per run (:func:`run_id_of`): a retry after a failure past the catalog
    switch returns the version the first attempt published.
    """
    from .quality import failed_gates
    from .store import (align_to_current, diagnostic_arrays, list_versions, publish_embeddings, record_failed_run,
                        version_of_run)

    run_id = run_id_of(plan, train)
    done_before = version_of_run(plan["store"], run_id)
    node_ids, node_kinds = _published_ids(cfg, plan)
    vectors = np.load(train["vectors"])
    alignment = {"aligned_to": None}
    if cfg.store.align and done_before is None:  # a retry is not aligned onto the version it published itself
        with RUN_CLOCK.span("align"):
            vectors, alignment = align_to_current(plan["store"], node_ids, node_kinds, vectors,
                                                  cache_dir=previous_dir(plan))
    counts = {**ingest["counts"], "isolated_nodes": graph["isolated_nodes"],
              "walks": walks["n_walks"], "walk_tokens": walks["n_tokens"], "train_tokens": train["tokens"]}
    if holdout:
        counts["link_holdout"] = {k: v for k, v in holdout.items() if k.startswith("n_")}
    stages = (("ingest", ingest), ("graph", graph), ("holdout", holdout), ("walks", walks), ("train", train),
              ("evaluate", evaluation))
    timings = {name: (0.0 if stage.get("skipped") else stage["seconds"]) for name, stage in stages if stage}
    metrics = {"train_tokens_per_second": train["tokens_per_second"], **(evaluation or {}).get("metrics", {})}
    if cfg.train.warm_start:
        counts["warm_started_nodes"] = train.get("warm_started_nodes", 0)
    if alignment.get("residual") is not None:
        metrics["align_residual"] = round(alignment["residual"], 6)
    if walks.get("diagnostics"):
        metrics["walk_diagnostics"] = walks["diagnostics"]
    lineage = {"warnings": ingest.get("warnings", []), "window": ingest.get("window", {}),
               "hashed_ids": cfg.input.hash_ids, "alignment": alignment}
    reasons = failed_gates(metrics, cfg.gates)
    figures = _report_figures(cfg, plan)
    rows = list_versions(plan["store"]) if Path(plan["store"], "catalog.duckdb").exists() else []
    # the lock is held: nobody else numbers a version meanwhile
    version = done_before[0] if done_before else max((r["version"] for r in rows), default=0) + 1
    t0 = time.time()
    report = _render_report(cfg, plan, version, graph, figures, rows, status="failed" if reasons else "complete",
                            counts=counts, metrics=metrics, timings=timings, vectors=None if reasons else vectors)
    RUN_CLOCK.add("report", time.time() - t0)
    timings.update(RUN_CLOCK.row_timings(sum(timings.values())))
    if plan.get("budget"):  # prediction beside outcome, for the stages the sizing predicted
        lineage["budget"] = {**plan["budget"], "actual": {k: timings.get(k) for k in plan["budget"]["predicted"]
                                                          if k in timings}}
    if RUN_CLOCK.flow_start is not None:
        timings["after_publish_estimate"] = round(RUN_CLOCK.tail_estimate(plan["store"]), 3)
    record = dict(params={**plan["params"], "lineage": lineage}, fingerprint=plan["fingerprint"], counts=counts,
                  timings=timings, metrics=metrics, objective=cfg.train.objective, run_id=run_id)
    if reasons:
        message = "failed quality gates: " + "; ".join(reasons)
        version = record_failed_run(plan["store"], message=message, **record)
        RUN_CLOCK.row_written(plan["store"], 0.0)
        _place_report(plan, version, report)
        raise GateFailure(f"{cfg.store_path}: run recorded as version {version}, not published: "
                          + "; ".join(reasons), version=version, metrics=metrics)
    diagnostics = diagnostic_arrays(**figures) if figures is not None else None
    version = publish_embeddings(plan["store"], node_ids, vectors, node_kinds=node_kinds, keep=cfg.store.keep,
                                 diagnostics=diagnostics, neighbours=cfg.store.neighbours, **record)
    published = next((r for r in list_versions(plan["store"]) if r["version"] == version), {})
    RUN_CLOCK.row_written(plan["store"], float((published.get("timings") or {}).get("publish", 0.0)))
    _place_report(plan, version, report)
    return version


def _warn_report(exc: Exception) -> None:
    import warnings

    # one warning: the stage runner logs it once (graphkit.pipeline.run_stages)
    warnings.warn(f"could not write the run report: {exc}", RuntimeWarning, stacklevel=3)


def _report_figures(cfg: RefreshConfig, plan: dict) -> dict | None:
    """Per-node degree, walk visits and first label of the run, for the version's diagnostics and the report;
    None (with a warning) when they cannot be read: they are a convenience, the version is what matters."""
    try:
        degrees = AdjacencyArrays.load(Path(plan["ingest_dir"]) / "graph").degrees()
        visits = None
        counts_path = Path(plan["walks_dir"])
        if (counts_path / "manifest.json").exists():
            from .corpus import WalkCorpus

            visits = WalkCorpus(counts_path).visit_counts()
        return {"degrees": degrees, "visit_counts": visits, "labels": _first_labels(cfg, plan, degrees.size)}
    except Exception as exc:  # noqa: BLE001 - see above
        _warn_report(exc)
        return None


def _render_report(cfg: RefreshConfig, plan: dict, version: int, graph: dict, figures: dict | None, rows: list, *,
                   status: str, counts: dict, metrics: dict, timings: dict, vectors=None) -> dict | None:
    """Render the run's HTML report into a hidden file beside its final place, before the version row exists
    (the row for this run is drawn from the figures at hand; its report time and after-publish estimate are in
    the catalog, not in its own chart). Returns what :func:`_place_report` needs; None when it failed (a report
    never fails the run)."""
    from datetime import timezone

    from .report import report_title, write_report

    if figures is None:
        return None
    try:
        this = {"version": version, "status": status, "created_at": datetime.now(timezone.utc).replace(tzinfo=None),
                "is_current": status == "complete", "n_nodes": graph["n_nodes"],
                "dim": None if vectors is None else int(vectors.shape[1]), "counts": counts, "metrics": metrics,
                "timings": timings, "params": plan["params"]}
        shown = [{**r, "is_current": r["is_current"] and status != "complete"} for r in rows
                 if r["version"] != version] + [this]
        final = Path(plan["store"]) / "reports" / f"version-{version:06d}.html"
        tmp = final.with_name(f".{final.name}.render-{os.getpid()}")
        write_report(tmp, versions=shown, degrees=figures["degrees"], visit_counts=figures["visit_counts"],
                     vectors=vectors, labels=figures["labels"],
                     title=report_title(plan["store"], version))
        return {"tmp": tmp}
    except Exception as exc:  # noqa: BLE001 - the report is a convenience; the version is what matters
        _warn_report(exc)
        return None


def _place_report(plan: dict, version: int, report: dict | None) -> None:
    """Move the rendered report into ``STORE/reports/`` (outside the version, so after the switch)."""
    if report is None:
        return
    try:
        from .store import replace_durably

        replace_durably(report["tmp"], Path(plan["store"]) / "reports" / f"version-{version:06d}.html")
    except Exception as exc:  # noqa: BLE001
        _warn_report(exc)


def _first_labels(cfg: RefreshConfig, plan: dict, n_nodes: int):
    """One label per node, for colouring the report's projection: of a node's labels, the one of the smallest
    class (so that a small class drawn over a large one, such as a ring inside circles, shows; ties: the first
    label); None without a labels table."""
    if not cfg.labels_path:
        return None
    from .quality import load_labels

    ev = cfg.evaluate
    idx, labels, _ = load_labels(cfg.labels_path, Path(plan["ingest_dir"]) / "nodes.parquet",
                                 id_column=ev.label_id_column, label_column=ev.label_column, kind=ev.label_kind)
    out = np.full(n_nodes, None, dtype=object)
    keep = idx >= 0
    names, sizes = np.unique(labels[keep].astype(str), return_counts=True)
    size = dict(zip(names.tolist(), sizes.tolist()))
    for i, lab in zip(idx[keep], labels[keep]):
        if out[i] is None or size[str(lab)] < size[str(out[i])]:
            out[i] = lab
    return out


@contextmanager
def run_lock(cfg: RefreshConfig):
    """Hold the store's writer lock for a whole run and clear what dead runs left behind."""
    from .store import clean_stale, store_lock

    old_mask = os.umask(0o022)  # nothing in the store is world- or group-writable, whatever the caller's umask
    t0 = time.time()
    try:
        with store_lock(cfg.store_path):
            clean_stale(cfg.store_path)
            RUN_CLOCK.add("lock_wait", time.time() - t0)  # taking the lock and clearing what dead runs left
            yield
    finally:
        os.umask(old_mask)


def begin_run(plan: dict) -> None:
    """Record the run's ``as_of`` in ``STORE/work/run-<key>.json`` (call it holding the run lock), so that a rerun
    of the same input after a kill takes the same ``as_of``, finds the same stage folders and resumes."""
    if plan.get("run_record"):
        write_json_atomic(plan["run_record"], {"as_of": plan["as_of"], "as_of_source": plan["as_of_source"],
                                               "started_at": datetime.now(timezone.utc).isoformat(),
                                               "pid": os.getpid()})


def finish_run(plan: dict) -> list[str]:
    """Remove the run's work folders and run record once its version is published or recorded as failed (the walk
    corpus can be large), and the folders and records of unfinished runs older than ``[store] keep_work_days``.
    Returns the removed paths."""
    removed = []
    for key in ("ingest_dir", "walks_dir", "train_dir", "holdout_dir", "eval_walks_dir", "eval_train_dir",
                "budget_dir"):
        if plan.get(key) and Path(plan[key]).exists():
            shutil.rmtree(plan[key], ignore_errors=True)
            removed.append(plan[key])
    record = plan.get("run_record")
    if record and Path(record).exists():
        Path(record).unlink(missing_ok=True)
        removed.append(record)
    from .store import clean_work

    keep_days = plan.get("keep_work_days", 7.0)
    cutoff = time.time() - keep_days * 86400.0
    for stale in sorted(Path(plan["work"]).glob(f"{RUN_RECORD_PREFIX}*.json")):
        if not stale.is_symlink() and stale.is_file() and stale.stat().st_mtime <= cutoff:
            stale.unlink(missing_ok=True)
            removed.append(str(stale))
    return removed + clean_work(plan["store"], older_than_days=keep_days)


def stage_eval_walks(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """The walks of the evaluation model (on the holdout graph), when the published model is the full graph's."""
    return stage_walks(cfg, plan, "eval")


def stage_eval_train(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """The training of the evaluation model, when the published model is the full graph's."""
    return stage_train(cfg, plan, "eval")


def _evaluate(cfg: RefreshConfig, plan: dict, train: dict, eval_train: dict | None, holdout: dict | None
              ) -> dict[str, Any]:
    if holdout is not None and eval_train is None:  # publish_holdout_model: the published vectors never saw the
        eval_train = train                          # held-out edges, so they are the evaluated ones
    return stage_evaluate(cfg, plan, train, eval_train)


def _has_holdout(cfg: RefreshConfig, plan: dict) -> bool:
    return bool(plan.get("holdout_dir"))


def _passes_twice(cfg: RefreshConfig) -> bool:
    """A separate evaluation model is walked and trained besides the published one."""
    return cfg.evaluate.link_holdout > 0 and not cfg.evaluate.publish_holdout_model


def _second_pass(cfg: RefreshConfig, plan: dict) -> bool:
    return _passes_twice(cfg)


def _has_budget(cfg: RefreshConfig, plan: dict) -> bool:
    return bool(plan.get("budget_dir"))


def stage_budget(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """Size the run to ``[budget] minutes`` (:mod:`graphkit.budget`): the walks per node and epochs the rest of the
    budget affords, from the store's lineage or a short calibration on the graph; writes ``sizing.json``."""
    from .store import CATALOG, list_versions

    t0 = time.perf_counter()
    n_nodes = graph_nodes(plan)
    walks, train = cfg.walks.model_dump(), cfg.train.model_dump()
    store = Path(plan["store"])
    rows = list_versions(store) if (store / CATALOG).exists() else []
    costs, calibration = budget.costs_from_lineage(rows, walks, train, n_nodes), 0.0
    if costs is None:
        costs, calibration = budget.calibrate(AdjacencyArrays.load(plan["graph_dir"]), walks, train, cfg.walks.seed)
    elapsed = RUN_CLOCK.elapsed()
    passes = 2 if _second_pass(cfg, plan) else 1
    sizing = budget.choose_sizing(minutes=cfg.budget.minutes, elapsed=elapsed, n_nodes=n_nodes,
                                  length=cfg.walks.length, passes=passes, costs=costs,
                                  max_per_node=cfg.walks.per_node, max_epochs=cfg.train.epochs)
    finish = time.time() + sizing.predicted_seconds
    result = {"minutes": cfg.budget.minutes, "per_node": sizing.per_node, "epochs": sizing.epochs,
              "bounds": {"per_node": cfg.walks.per_node, "epochs": cfg.train.epochs},
              "nodes": n_nodes, "passes": passes, "costs": costs.to_dict(),
              "calibration_seconds": round(calibration, 3), "elapsed_at_sizing": round(elapsed, 3),
              "predicted": sizing.predicted,
              "predicted_total_seconds": round(elapsed + sizing.predicted_seconds, 3),
              "predicted_finish": datetime.fromtimestamp(finish, timezone.utc).isoformat(timespec="seconds"),
              "seconds": round(time.perf_counter() - t0, 3)}
    out = Path(plan["budget_dir"])
    out.mkdir(parents=True, exist_ok=True)
    write_json_atomic(out / "sizing.json", result)
    return result


def apply_sizing(cfg: RefreshConfig, plan: dict, sizing: dict) -> RefreshConfig:
    """The config the rest of the run uses: ``walks.per_node`` and ``train.epochs`` as the budget chose them.
    Updates the plan in place (its walk and train folders, the recorded parameters, the decision)."""
    sized = cfg.model_copy(update={"walks": cfg.walks.model_copy(update={"per_node": int(sizing["per_node"])}),
                                   "train": cfg.train.model_copy(update={"epochs": int(sizing["epochs"])})})
    plan.update(model_dirs(sized, Path(plan["work"]), plan["keys"]))
    plan["params"] = sized.to_public_dict()
    plan["budget"] = {k: v for k, v in sizing.items() if k != "skipped"}
    progress.predict_finish(budget.seconds_after(sizing["predicted"]))
    return sized


@dataclass(frozen=True)
class Stage:
    """One step of the refresh, as data: what runs, on which earlier results, and how a rerun knows it is done.

    Attributes
    ----------
    name : str
        The stage's name in logs, timings and the run artifact.
    function : callable
        ``function(cfg, plan, *inputs)``, returning a small JSON-serialisable dict (publish: the version number).
    inputs : tuple of str
        Names of earlier stages whose results are passed after ``cfg`` and ``plan``, in this order (None for a
        stage that did not run).
    folder, marker : str or None
        The plan entry of the stage's work folder and the file the stage writes there last. When the marker
        exists the stage is finished: its result is read from the marker and the function is not called. The
        markers are the only record of what a rerun can skip. None for stages that always run.
    when : callable or None
        ``when(cfg, plan) -> bool``; the stage runs only when it is true (None: always).
    retries : int
        Extra attempts after an I/O failure, under Prefect (the plain runner does not retry).
    clock : bool
        Add the stage's seconds to :data:`RUN_CLOCK` (for stages whose result :func:`stage_publish` does not get).
    adjusts : callable or None
        ``adjusts(cfg, plan, result) -> cfg``: the config the later stages get, for a stage that decides
        parameters (the budget's sizing); it may update the plan in place.
    """

    name: str
    function: Callable[..., Any]
    inputs: tuple[str, ...] = ()
    folder: str | None = None
    marker: str | None = None
    when: Callable[[RefreshConfig, dict], bool] | None = None
    retries: int = 0
    clock: bool = False
    adjusts: Callable[[RefreshConfig, dict, Any], RefreshConfig] | None = None

    def marker_path(self, plan: dict) -> Path | None:
        if self.marker is None or not plan.get(self.folder):
            return None
        return Path(plan[self.folder]) / self.marker

    def is_done(self, plan: dict) -> bool:
        path = self.marker_path(plan)
        return path is not None and path.is_file()


#: The refresh, in order. Both :func:`refresh` and the Prefect flow (``graphkit.flows.refresh``) run this list.
STAGES: tuple[Stage, ...] = (
    Stage("ingest", stage_ingest, folder="ingest_dir", marker="ingest.json", retries=2),
    Stage("graph", stage_graph),
    Stage("holdout", stage_holdout, folder="holdout_dir", marker="holdout.json", when=_has_holdout),
    Stage("budget", stage_budget, folder="budget_dir", marker="sizing.json", when=_has_budget, clock=True,
          adjusts=apply_sizing),
    Stage("eval_walks", stage_eval_walks, folder="eval_walks_dir", marker="manifest.json", when=_second_pass,
          clock=True),
    Stage("eval_train", stage_eval_train, folder="eval_train_dir", marker="train.json", when=_second_pass,
          clock=True),
    Stage("walks", stage_walks, folder="walks_dir", marker="manifest.json"),
    Stage("train", stage_train, folder="train_dir", marker="train.json"),
    Stage("evaluate", _evaluate, inputs=("train", "eval_train", "holdout")),
    Stage("publish", stage_publish, inputs=("ingest", "graph", "walks", "train", "evaluate", "holdout"), retries=2),
)


def run_stage(stage: Stage, cfg: RefreshConfig, plan: dict, *inputs) -> Any:
    """Run one stage, or read its result from its completion marker when an earlier run finished it."""
    if stage.is_done(plan):
        return {**read_json(stage.marker_path(plan)), "skipped": True}
    return stage.function(cfg, plan, *inputs)


@contextmanager
def _warnings_once(log):
    """Log each distinct warning raised inside the block once, as one line (no source line)."""
    import warnings

    seen: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        finally:
            for w in caught:
                text = str(w.message)
                if text not in seen:
                    seen.append(text)
                    log.warning("%s", text)


def run_stages(cfg: RefreshConfig, plan: dict, *, call: Callable[..., Any] | None = None,
               record: dict | None = None) -> dict[str, Any]:
    """Run :data:`STAGES` in order; returns ``{stage name: result}`` of the stages that ran.

    Parameters
    ----------
    call : callable, optional
        ``call(stage, cfg, plan, *inputs)`` runs one stage; default :func:`run_stage` (the flow passes one that
        wraps it in a Prefect task).
    record : dict, optional
        Filled as the stages go, also when one fails: ``{name: {"status": "ran" | "skipped" | "failed",
        "seconds": wall seconds, "result": the result}}`` (for the run artifact).

    Each stage logs one line (:func:`graphkit.logs.stage_line`) on the ``graphkit.run`` logger, its start at
    debug level, and each warning it raised once.
    """
    import logging

    from .logs import RUN_LOGGER, stage_line

    log = logging.getLogger(RUN_LOGGER)
    call = call or run_stage
    record = {} if record is None else record
    results: dict[str, Any] = {}
    for stage in STAGES:
        if stage.when is not None and not stage.when(cfg, plan):
            continue
        log.debug("stage %s started", stage.name)
        t0 = time.perf_counter()
        try:
            with _warnings_once(log):
                result = call(stage, cfg, plan, *(results.get(name) for name in stage.inputs))
        except BaseException:
            record[stage.name] = {"status": "failed", "seconds": time.perf_counter() - t0, "result": None}
            raise
        seconds = time.perf_counter() - t0
        results[stage.name] = result
        if isinstance(result, dict):
            status, shown = ("skipped" if result.get("skipped") else "ran"), result
            if stage.clock:
                RUN_CLOCK.add(stage.name, 0.0 if result.get("skipped") else result["seconds"])
        else:  # publish: the version number
            status, shown = "ran", {"version": result, "seconds": seconds}
        record[stage.name] = {"status": status, "seconds": seconds, "result": shown}
        log.info("%s", stage_line(stage.name, result, seconds))
        if stage.adjusts is not None:
            cfg = stage.adjusts(cfg, plan, result)
    return results


def execute(cfg: RefreshConfig, plan: dict, *, call: Callable[..., Any] | None = None,
            record: dict | None = None) -> int:
    """The run under the store lock: record its ``as_of``, run the stages, remove its work folders once the
    version is published or recorded as failed (:class:`GateFailure`); returns the version published."""
    with run_lock(cfg):
        begin_run(plan)
        try:
            results = run_stages(cfg, plan, call=call, record=record)
        except GateFailure:
            finish_run(plan)  # the run is over and recorded; its scratch is not needed for a resume
            raise
        finish_run(plan)
    return results["publish"]


def refresh(cfg: RefreshConfig) -> int:
    """Run every stage in order without Prefect (what the flow does, for notebooks and tests)."""
    import logging

    from .logs import RUN_LOGGER

    RUN_CLOCK.begin_flow()
    try:
        with RUN_CLOCK.span("plan"):
            plan = plan_run(cfg)
        logging.getLogger(RUN_LOGGER).debug("as_of %s (%s)", plan["as_of"], plan["as_of_source"])
        return execute(cfg, plan)
    finally:
        RUN_CLOCK.end_flow()  # what followed the version row, measured for the next run's estimate
