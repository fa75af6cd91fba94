"""Sizing a run to a time budget (``[budget] minutes``).

With a budget, ``walks.per_node`` and ``train.epochs`` are upper bounds and the run picks the sizing
``(per_node, epochs)`` that the budget affords. The decision is taken once per run, right after the graph and the
link-prediction holdout are built (the first moment the node count is known), from:

* the seconds already spent by the run (start-up, preflight, server, ingest, graph, holdout: measured);
* per-unit costs: seconds per walk token and per trained token, and the seconds that follow training (evaluation,
  publishing, the report, what follows the version row). They come from the lineage of the store (the newest
  version trained with the same training and walk settings, its tail scaled by the node count), or, on a store
  without one, from a short timed calibration on the real graph (:func:`calibrate`): a few thousand walks with the
  run's walk settings, and one training call on them with the run's full-size matrices;
* the shape of the run: tokens per pass ``n_nodes * per_node * length`` (an upper bound: walks that stop at a dead
  end are shorter), two passes of walks and training when a separate evaluation model is trained
  (``[evaluate] publish_holdout_model = false``), ``epochs`` training passes over each corpus.

The rule that spends the budget (:func:`choose_sizing`): among the sizings whose predicted finish is within
:data:`SAFETY` of the budget, the one with the most trained tokens ``per_node * epochs``; at equal tokens, more walks
per node (new walks carry new information, a second epoch re-reads the same walks). The smallest sizing
(:func:`floor_sizing`) gives every node :data:`FLOOR_VISITS` visits: walks per node first, then epochs, within the
bounds. Below that the quality study (docs/quality.md) measured vectors that had not yet learnt the graph: on both
of its graphs, 80 visits per node (2 walks of 40 nodes) gave a Micro-F1 near chance and 160 the plateau. A budget
that cannot fit the smallest sizing is a
:class:`~graphkit.errors.ConfigError` naming the smallest budget that would fit, raised at preflight when the
store's lineage can predict it and at the sizing otherwise; nothing is published either way.

The decision, its inputs and the predicted seconds of every stage are recorded with the version (``params`` ->
``budget``), beside the stage timings actually measured, so that the next run (and a capacity planner) can compare
prediction and outcome.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from . import progress
from .errors import ConfigError

__all__ = ["UnitCosts", "Sizing", "choose_sizing", "costs_from_lineage", "calibrate", "smallest_budget_message",
           "floor_sizing", "FLOOR_VISITS", "SAFETY"]

#: Visits per node (walks per node x walk length x epochs) of the smallest sizing the budget may choose.
FLOOR_VISITS = 160
#: The chosen sizing's predicted finish is at most this share of the budget: room for run-to-run noise.
SAFETY = 0.93
#: Seconds that follow training on a store without lineage, per node and fixed: evaluation, publish, alignment,
#: report and what follows the version row measured at 54 s for 1,000,999 nodes (plus about 10 s at any size) on
#: the 2-core development machine (docs/bench/scale-nightly-1m-2026-12-04.json); rounded up.
TAIL_SECONDS_PER_NODE = 60e-6
TAIL_FIXED_SECONDS = 12.0
#: Fixed seconds of a walks stage (shard bookkeeping) beyond its per-token cost, and the factor from the in-process
#: kernel's cost per token to the stage's (Parquet shards, Dask scheduling); development-machine figures, rounded
#: up (docs/budget.md).
WALK_FIXED_SECONDS = 1.0
WALK_STAGE_FACTOR = 2.5
#: The factor from a training call on walks in memory to the train stage's, which decodes the Parquet corpus in a
#: background thread beside the trainer's threads: 1.13 at 1M nodes on the 2-core development machine (0.637M
#: tokens/s in the stage, 0.72M in memory), rounded up.
TRAIN_STAGE_FACTOR = 1.15
#: Tokens the calibration walks and trains on (walks of the run's length, several per node on a small graph).
CALIBRATION_TOKENS = 1_500_000
#: Timing keys of a version that make up the tail after training (see graphkit.pipeline.RunClock).
TAIL_KEYS = ("evaluate", "publish", "align", "report", "orchestration", "after_publish_estimate")
#: Settings that change the per-token cost of training and of the walks; lineage must match them.
TRAIN_COST_KEYS = ("dim", "window", "negatives", "objective", "threads", "subsample", "memmap")
WALK_COST_KEYS = ("length", "weighted", "p", "q", "dead_end")


@dataclass(frozen=True)
class UnitCosts:
    """What one unit of work costs on this machine for this graph's settings.

    Attributes
    ----------
    walk_seconds_per_token, train_seconds_per_token : float
        Seconds per walk token (walks stage) and per trained token (one epoch's token).
    train_fixed_seconds : float
        Seconds of one training call beyond its tokens (tables, allocating and initialising the matrices).
    walk_fixed_seconds : float
        Seconds of one walks stage beyond its tokens.
    tail_seconds : float
        Seconds after training: evaluation, publish, report and what follows the version row.
    source : str
        ``"version N"`` (the lineage) or ``"calibration"``.
    """

    walk_seconds_per_token: float
    train_seconds_per_token: float
    train_fixed_seconds: float
    walk_fixed_seconds: float
    tail_seconds: float
    source: str

    def to_dict(self) -> dict[str, Any]:
        return {k: (float(f"{v:.6g}") if isinstance(v, float) else v) for k, v in asdict(self).items()}


@dataclass(frozen=True)
class Sizing:
    """The chosen sizing and its prediction (seconds from the decision on, by stage)."""

    per_node: int
    epochs: int
    predicted: dict[str, float]

    @property
    def predicted_seconds(self) -> float:
        return float(sum(self.predicted.values()))


def predict(n_nodes: int, length: int, passes: int, costs: UnitCosts, per_node: int, epochs: int
            ) -> dict[str, float]:
    """Predicted seconds of the stages that follow the sizing, for one candidate."""
    tokens = float(n_nodes) * per_node * length
    walks = costs.walk_fixed_seconds + tokens * costs.walk_seconds_per_token
    train = costs.train_fixed_seconds + tokens * epochs * costs.train_seconds_per_token
    out = {"walks": walks, "train": train}
    if passes == 2:
        out = {"eval_walks": walks, "eval_train": train, **out}
    out["after_train"] = costs.tail_seconds
    return {k: round(v, 3) for k, v in out.items()}


def floor_sizing(length: int, max_per_node: int, max_epochs: int) -> tuple[int, int]:
    """The smallest sizing ``(per_node, epochs)``: :data:`FLOOR_VISITS` visits per node with walks of ``length``
    nodes, walks per node first, then epochs, each within its bound (the bounds themselves when they allow less)."""
    per_node = min(max(1, -(-FLOOR_VISITS // length)), max_per_node)
    epochs = min(max(1, -(-FLOOR_VISITS // (per_node * length))), max_epochs)
    return per_node, epochs


def smallest_budget_message(minutes: float, elapsed: float, floor: tuple[int, int], floor_seconds: float,
                            where: str) -> str:
    """The one-line error of a budget below the smallest sizing."""
    need = (elapsed + floor_seconds) / SAFETY / 60.0
    need = math.ceil(need * 10) / 10  # to a tenth of a minute, up
    return (f"[budget] minutes = {minutes:g} is below the smallest sizing (walks.per_node = {floor[0]}, "
            f"train.epochs = {floor[1]}), predicted at {(elapsed + floor_seconds) / 60:.1f} min {where}: "
            f"set [budget] minutes to at least {need:g}")


def choose_sizing(*, minutes: float, elapsed: float, n_nodes: int, length: int, passes: int, costs: UnitCosts,
                  max_per_node: int, max_epochs: int, where: str = "on this graph") -> Sizing:
    """The sizing the rest of the budget affords (module docstring: the rule and the floor).

    Parameters
    ----------
    minutes : float
        The budget, from the run's start.
    elapsed : float
        Seconds the run has spent so far.
    n_nodes, length : int
        Nodes of the graph and nodes per walk.
    passes : {1, 2}
        Walk-and-train passes (2 when a separate evaluation model is trained).
    costs : UnitCosts
    max_per_node, max_epochs : int
        The configured ``walks.per_node`` and ``train.epochs``: upper bounds.

    Raises
    ------
    ConfigError
        The smallest sizing does not fit; the message names the smallest budget that would.
    """
    left = minutes * 60.0 * SAFETY - elapsed
    floor = floor_sizing(length, max_per_node, max_epochs)
    floor_seconds = sum(predict(n_nodes, length, passes, costs, *floor).values())
    if floor_seconds > left:
        raise ConfigError(smallest_budget_message(minutes, elapsed, floor, floor_seconds, where))
    best = floor
    for epochs in range(floor[1], max_epochs + 1):
        # the largest per_node that fits at this epoch count (the prediction grows with per_node)
        lo, hi = floor[0] - 1, max_per_node
        while lo < hi:
            mid = (lo + hi + 1) // 2
            if sum(predict(n_nodes, length, passes, costs, mid, epochs).values()) <= left:
                lo = mid
            else:
                hi = mid - 1
        if lo < floor[0]:
            break  # more epochs only cost more
        if (lo * epochs, lo) > (best[0] * best[1], best[0]):
            best = (lo, epochs)
    return Sizing(per_node=best[0], epochs=best[1], predicted=predict(n_nodes, length, passes, costs, *best))


def _same(recorded: dict, current: dict, keys) -> bool:
    return all(recorded.get(k) == current.get(k) for k in keys)


def costs_from_lineage(rows: list[dict], walks: dict, train: dict, n_nodes: int) -> UnitCosts | None:
    """Unit costs from the newest version whose walks and training ran (not resumed) with the same cost-relevant
    settings (``walks``/``train``: the run's ``[walks]``/``[train]`` as dicts), its tail scaled to ``n_nodes``;
    None when there is none."""
    for row in sorted(rows, key=lambda r: -r["version"]):
        params, timings, counts = row.get("params") or {}, row.get("timings") or {}, row.get("counts") or {}
        if not (_same(params.get("train") or {}, train, TRAIN_COST_KEYS)
                and _same(params.get("walks") or {}, walks, WALK_COST_KEYS)):
            continue
        walk_s, train_s = float(timings.get("walks") or 0), float(timings.get("train") or 0)
        walk_tokens, train_tokens = counts.get("walk_tokens") or 0, counts.get("train_tokens") or 0
        nodes = counts.get("nodes") or 0
        if walk_s <= 0 or train_s <= 0 or not walk_tokens or not train_tokens or not nodes:
            continue  # resumed stages record 0 s
        tail = sum(float(timings.get(k) or 0) for k in TAIL_KEYS) * max(n_nodes, 1) / nodes
        return UnitCosts(walk_seconds_per_token=walk_s / walk_tokens, train_seconds_per_token=train_s / train_tokens,
                         train_fixed_seconds=0.0, walk_fixed_seconds=0.0, tail_seconds=tail,
                         source=f"version {row['version']}")
    return None


def calibrate(graph, walks: dict, train: dict, seed: int) -> tuple[UnitCosts, float]:
    """Unit costs measured on the real graph (``graph``: :class:`~graphkit.AdjacencyArrays`; ``walks``/``train``:
    the run's ``[walks]``/``[train]`` as dicts); returns them and the seconds the calibration took.

    About :data:`CALIBRATION_TOKENS` tokens of walks with the run's walk settings, then one training call on them with the run's
    training settings and full-size matrices (so that the cost of reaching rows spread over all nodes is in the
    figure), after a tiny call that loads the compiled kernels and one at full size that measures the fixed cost
    of a call. Their progress is not reported.
    """

    with progress.quiet():
        return _calibrate(graph, walks, train, seed)


def _calibrate(graph, walks: dict, train: dict, seed: int) -> tuple[UnitCosts, float]:
    from .train import train_vectors
    from .walks import walk_range

    t_start = time.perf_counter()
    n = graph.n_nodes
    passes = min(int(walks["per_node"]), -(-CALIBRATION_TOKENS // (n * walks["length"])))
    rows = min(n * passes, -(-CALIBRATION_TOKENS // walks["length"]))
    opts = dict(weighted=walks["weighted"], p=walks["p"], q=walks["q"], dead_end=walks["dead_end"])
    walk_range(graph, 0, min(rows, 64), per_node=passes, length=walks["length"], seed=seed, **opts)  # compiled
    t0 = time.perf_counter()
    sample = walk_range(graph, 0, rows, per_node=passes, length=walks["length"], seed=seed, **opts)
    walk_s = time.perf_counter() - t0
    tokens = int((sample >= 0).sum())
    settings = dict(dim=train["dim"], window=train["window"], objective=train["objective"],
                    negatives=train["negatives"], threads=train["threads"], learning_rate=train["learning_rate"],
                    subsample=train["subsample"], seed=seed)
    train_vectors(np.array([[0, 1, 2, 3], [3, 2, 1, 0]], dtype=np.int32), 4, epochs=1, **settings)  # compiled code
    t0 = time.perf_counter()
    train_vectors(sample[:2], n, epochs=1, **settings)   # the fixed cost of a call: tables, matrices
    fixed_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    train_vectors(sample, n, epochs=1, **settings)
    train_s = time.perf_counter() - t0
    per_token = TRAIN_STAGE_FACTOR * max(train_s - fixed_s, 1e-3) / max(tokens, 1)
    costs = UnitCosts(walk_seconds_per_token=WALK_STAGE_FACTOR * walk_s / max(tokens, 1),
                      train_seconds_per_token=per_token, train_fixed_seconds=fixed_s,
                      walk_fixed_seconds=WALK_FIXED_SECONDS,
                      tail_seconds=TAIL_FIXED_SECONDS + TAIL_SECONDS_PER_NODE * n, source="calibration")
    return costs, time.perf_counter() - t_start


def seconds_after(predicted: dict[str, float]) -> dict[str, float]:
    """For each predicted stage, the seconds predicted to follow it (for the progress lines' finish time)."""
    order = [k for k in ("eval_walks", "eval_train", "walks", "train") if k in predicted]
    tail = float(predicted.get("after_train", 0.0))
    return {k: tail + sum(float(predicted[j]) for j in order[i + 1:]) for i, k in enumerate(order)}
