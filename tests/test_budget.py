"""The time budget (``[budget] minutes``): the sizing rule, the unit costs from lineage and from a calibration, the
decision recorded with the version, resuming with the same sizing, and a budget below the smallest sizing refused
with exit 2 and the store unchanged."""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import networkx as nx
import pytest

import graphkit.cli as cli
from conftest import FAST_DEMO, graph_from_nx
from graphkit import budget, progress
from graphkit.config import load_config
from graphkit.errors import ConfigError
from graphkit.pipeline import plan_run, refresh
from graphkit.store import list_versions

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_parquet" / "demo.toml"
#: The demo at a small size, evaluation on (the default holdout), with a generous budget and bounds to choose in.
BUDGETED = [o for o in FAST_DEMO if not o.startswith(("walks.per_node", "evaluate.link_holdout"))]


def costs(walk=1e-7, train=1e-6, tail=10.0, fixed=0.0):
    return budget.UnitCosts(walk_seconds_per_token=walk, train_seconds_per_token=train, train_fixed_seconds=fixed,
                            walk_fixed_seconds=fixed, tail_seconds=tail, source="test")


def total(n_nodes, length, passes, c, p, e):
    return sum(budget.predict(n_nodes, length, passes, c, p, e).values())


# ------------------------------------------------------------------------------------------------ the sizing rule
@pytest.mark.parametrize("minutes", [0.5, 1, 2, 5, 15])
@pytest.mark.parametrize("passes", [1, 2])
def test_the_sizing_is_the_most_tokens_that_fit_and_prefers_walks_at_equal_tokens(minutes, passes):
    n, length, elapsed, c = 100_000, 40, 12.0, costs()
    floor = budget.floor_sizing(length, 30, 4)
    assert floor == (4, 1)   # 160 visits per node: 4 walks of 40 nodes
    left = minutes * 60 * budget.SAFETY - elapsed
    s = budget.choose_sizing(minutes=minutes, elapsed=elapsed, n_nodes=n, length=length, passes=passes, costs=c,
                             max_per_node=30, max_epochs=4) if total(n, length, passes, c, *floor) <= left else None
    fitting = [(p, e) for p in range(4, 31) for e in range(1, 5) if total(n, length, passes, c, p, e) <= left]
    if not fitting:
        assert s is None
        return
    best = max(fitting, key=lambda pe: (pe[0] * pe[1], pe[0]))   # brute force over every candidate
    assert (s.per_node, s.epochs) == best
    assert s.predicted_seconds <= left
    assert s.predicted == budget.predict(n, length, passes, c, *best)
    assert set(s.predicted) == ({"walks", "train", "after_train"} | ({"eval_walks", "eval_train"} if passes == 2
                                                                     else set()))


def test_the_bounds_are_upper_bounds():
    s = budget.choose_sizing(minutes=600, elapsed=0, n_nodes=1000, length=10, passes=1, costs=costs(),
                             max_per_node=7, max_epochs=3)
    assert (s.per_node, s.epochs) == (7, 3)


def test_a_budget_below_the_floor_names_the_smallest_budget_that_fits():
    n, length, c = 1_000_000, 40, costs(train=1.5e-6, tail=60.0)
    with pytest.raises(ConfigError) as err:
        budget.choose_sizing(minutes=2, elapsed=30, n_nodes=n, length=length, passes=1, costs=c, max_per_node=10,
                             max_epochs=1)
    text = str(err.value)
    assert "\n" not in text and text.startswith("[budget] minutes = 2 is below the smallest sizing")
    assert "walks.per_node = 4" in text and "train.epochs = 1" in text
    need = float(text.rsplit("at least ", 1)[1])
    # the budget named fits, and a tenth of a minute less would not (it is rounded up to a tenth)
    s = budget.choose_sizing(minutes=need, elapsed=30, n_nodes=n, length=length, passes=1, costs=c,
                             max_per_node=10, max_epochs=1)
    assert s.per_node >= 4
    assert (30 + total(n, length, 1, c, 4, 1)) / budget.SAFETY / 60 > need - 0.1


@pytest.mark.parametrize("length, bounds, floor", [(40, (10, 1), (4, 1)), (20, (10, 3), (8, 1)), (80, (10, 1), (2, 1)),
                                                   (10, (4, 9), (4, 4)), (10, (2, 3), (2, 3)), (200, (5, 5), (1, 1))])
def test_the_smallest_sizing_gives_160_visits_per_node_within_the_bounds(length, bounds, floor):
    assert budget.floor_sizing(length, *bounds) == floor
    p, e = floor
    assert p * e * length >= budget.FLOOR_VISITS or (p, e) == bounds


def test_the_floor_follows_a_lower_bound():
    s = budget.choose_sizing(minutes=0.5, elapsed=0, n_nodes=100, length=10, passes=1, costs=costs(tail=1.0),
                             max_per_node=1, max_epochs=5)
    assert s.per_node == 1 and s.epochs == 5   # walks of 10 nodes, one per node: 16 epochs would be the floor


def test_seconds_after_each_stage_add_up_to_the_prediction():
    predicted = budget.predict(1000, 10, 2, costs(fixed=1.0), 3, 2)
    after = budget.seconds_after(predicted)
    assert list(after) == ["eval_walks", "eval_train", "walks", "train"]
    assert after["train"] == pytest.approx(predicted["after_train"])
    assert after["eval_walks"] + predicted["eval_walks"] == pytest.approx(sum(predicted.values()))


# ------------------------------------------------------------------------------------------------ unit costs
def _row(version, *, train=None, walks=None, walks_s=10.0, train_s=100.0, nodes=1000, tail=5.0):
    base_train = {"dim": 16, "window": 5, "negatives": 5, "objective": "negative_sampling", "threads": None,
                  "subsample": 0.0, "memmap": False}
    base_walks = {"length": 20, "weighted": True, "p": 1.0, "q": 1.0, "dead_end": "stop"}
    return {"version": version, "params": {"train": {**base_train, **(train or {})},
                                           "walks": {**base_walks, **(walks or {})}},
            "counts": {"walk_tokens": 200_000, "train_tokens": 400_000, "nodes": nodes},
            "timings": {"walks": walks_s, "train": train_s, "evaluate": tail, "publish": tail}}


def test_costs_come_from_the_newest_version_with_the_same_settings():
    cur_train = _row(0)["params"]["train"]
    cur_walks = _row(0)["params"]["walks"]
    rows = [_row(1, train_s=200.0), _row(2, train={"dim": 32}), _row(3, walks_s=0.0), _row(4, walks={"p": 0.5})]
    c = budget.costs_from_lineage(rows, cur_walks, cur_train, n_nodes=3000)
    assert c.source == "version 1"   # 2: another dim, 3: walks resumed (0 s), 4: second-order walks
    assert c.train_seconds_per_token == pytest.approx(200.0 / 400_000)
    assert c.walk_seconds_per_token == pytest.approx(10.0 / 200_000)
    assert c.tail_seconds == pytest.approx(10.0 * 3)   # scaled by the node count
    assert budget.costs_from_lineage(rows[1:], cur_walks, cur_train, 3000) is None


def test_the_calibration_measures_the_real_graph_quietly():
    g = graph_from_nx(nx.random_regular_graph(6, 2000, seed=3))
    heard = []
    walks = {"per_node": 10, "length": 20, "weighted": True, "p": 1.0, "q": 1.0, "dead_end": "stop"}
    train = {"dim": 16, "window": 5, "negatives": 5, "objective": "negative_sampling", "threads": 1,
             "learning_rate": 0.025, "subsample": 0.0}
    with progress.listen(lambda *a: heard.append(a)):
        c, seconds = budget.calibrate(g, walks, train, seed=0)
    assert heard == []
    assert c.source == "calibration" and seconds > 0
    assert 1e-9 < c.walk_seconds_per_token < 1e-4 and 1e-9 < c.train_seconds_per_token < 1e-3
    assert c.tail_seconds == pytest.approx(budget.TAIL_FIXED_SECONDS + budget.TAIL_SECONDS_PER_NODE * 2000)


# ------------------------------------------------------------------------------------------------ end to end
def _cfg(store, *extra):
    return load_config(DEMO, [f'store.path="{store}"', *BUDGETED, *extra])


@pytest.fixture(scope="module")
def budgeted_store(tmp_path_factory):
    """Two budgeted nights of the small demo: the first calibrates, the second sizes from the first's lineage."""
    store = tmp_path_factory.mktemp("budget") / "store"
    cfg = _cfg(store, "walks.per_node=6", "train.epochs=2", "budget.minutes=30")
    assert refresh(cfg) == 1
    assert refresh(_cfg(store, "walks.per_node=6", "train.epochs=2", "budget.minutes=30",
                        "walks.seed=8")) == 2
    return store


@pytest.mark.slow
def test_the_decision_and_its_outcome_are_recorded_with_the_version(budgeted_store):
    first, second = list_versions(budgeted_store)
    for row, source in ((first, "calibration"), (second, "version 1")):
        b = row["params"]["lineage"]["budget"]
        assert b["costs"]["source"] == source
        assert b["minutes"] == 30 and b["bounds"] == {"per_node": 6, "epochs": 2}
        # a generous budget buys the bounds, and the run used what was chosen
        assert (b["per_node"], b["epochs"]) == (6, 2)
        assert row["params"]["walks"]["per_node"] == 6 and row["params"]["train"]["epochs"] == 2
        assert set(b["predicted"]) == {"walks", "train", "after_train"}
        assert b["actual"]["train"] == row["timings"]["train"] > 0
        assert b["predicted_total_seconds"] > b["elapsed_at_sizing"]
        assert row["timings"]["budget"] >= 0
    assert second["params"]["lineage"]["budget"]["calibration_seconds"] == 0


@pytest.mark.slow
def test_a_tight_budget_trains_less_than_the_bounds(tmp_path, budgeted_store):
    store = Path(shutil.copytree(budgeted_store, tmp_path / "store"))
    rows = list_versions(store)
    b = rows[-1]["params"]["lineage"]["budget"]
    c = budget.UnitCosts(**{k: v for k, v in b["costs"].items()})
    # a budget that affords about nine walks per node at one epoch, from the same unit costs the run will use
    elapsed = 0.5 * b["elapsed_at_sizing"]
    seconds = elapsed + total(b["nodes"], 20, 1, c, 9, 1) + 0.25 * (total(b["nodes"], 20, 1, c, 10, 1)
                                                                   - total(b["nodes"], 20, 1, c, 9, 1))
    minutes = seconds / budget.SAFETY / 60
    s = budget.choose_sizing(minutes=minutes, elapsed=elapsed, n_nodes=b["nodes"], length=20, passes=1, costs=c,
                             max_per_node=40, max_epochs=4)
    assert s.per_node * s.epochs < 40 * 4
    assert s.predicted_seconds + elapsed <= minutes * 60 * budget.SAFETY


def test_the_later_stages_run_with_the_sizing_chosen(tmp_path, monkeypatch):
    """With unit costs that afford nine walks per node at one epoch, the corpus and the training are that size."""
    c = costs(walk=1e-5, train=1e-2, tail=1.0)
    monkeypatch.setattr(budget, "calibrate", lambda *a, **k: (c, 0.0))
    store = tmp_path / "store"
    cfg = _cfg(store, "walks.per_node=40", "train.epochs=4", "budget.minutes=30")
    n = 2999  # the demo's nodes
    from graphkit.pipeline import RUN_CLOCK

    # minutes such that 9 walks per node fit and 10 do not, whatever the run spent before the sizing (< 60 s here)
    t9, t10 = total(n, 20, 1, c, 9, 1), total(n, 20, 1, c, 10, 1)
    assert t10 - t9 > 60
    minutes = (t9 + 60) / budget.SAFETY / 60
    cfg = _cfg(store, "walks.per_node=40", "train.epochs=4", f"budget.minutes={minutes}")
    RUN_CLOCK.reset()
    assert refresh(cfg) == 1
    row = list_versions(store)[-1]
    b = row["params"]["lineage"]["budget"]
    assert (b["per_node"], b["epochs"]) == (9, 1) and b["nodes"] == n
    assert row["params"]["walks"]["per_node"] == 9 and row["params"]["train"]["epochs"] == 1
    assert row["counts"]["walks"] == 9 * n and row["counts"]["train_tokens"] == row["counts"]["walk_tokens"]


def test_a_rerun_after_a_failure_keeps_the_sizing_of_its_first_attempt(tmp_path, monkeypatch):
    from graphkit.io import read_json
    from graphkit.pipeline import RUN_CLOCK, execute

    store = tmp_path / "store"
    cfg = _cfg(store, "walks.per_node=5", "train.epochs=1", "budget.minutes=30")
    monkeypatch.setenv("GRAPHKIT_TEST_FAULTS", "1")
    monkeypatch.setenv("GRAPHKIT_FAULT", "train:raise")   # an I/O failure as training starts
    with pytest.raises(OSError):
        refresh(cfg)
    sizing = Path(plan_run(cfg)["budget_dir"]) / "sizing.json"
    chosen = {k: read_json(sizing)[k] for k in ("per_node", "epochs")}
    monkeypatch.delenv("GRAPHKIT_FAULT")
    record: dict = {}
    RUN_CLOCK.begin_flow()
    try:
        assert execute(cfg, plan_run(cfg), record=record) == 1
    finally:
        RUN_CLOCK.end_flow()
    # the rerun read the first attempt's decision and so found its walks under the same folder
    assert record["budget"]["status"] == "skipped" and record["walks"]["status"] == "skipped"
    assert record["train"]["status"] == "ran"
    b = list_versions(store)[-1]["params"]["lineage"]["budget"]
    assert {k: b[k] for k in chosen} == chosen
    assert not sizing.parent.exists()   # a finished run removes its folders, the sizing's too


def test_a_budget_below_the_smallest_sizing_fails_before_publishing(tmp_path):
    store = tmp_path / "store"
    with pytest.raises(ConfigError, match=r"^\[budget\] minutes = 0.01 is below the smallest sizing .* at least"):
        refresh(_cfg(store, "budget.minutes=0.01"))
    assert not (store / "catalog.duckdb").exists() or list_versions(store) == []


def _digest(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != ".lock"}


@pytest.mark.slow
def test_the_command_refuses_a_budget_the_lineage_says_cannot_fit(tmp_path, capsys, budgeted_store):
    store = Path(shutil.copytree(budgeted_store, tmp_path / "store"))
    before = _digest(store)
    code = cli.main(["refresh", str(DEMO), "--set", f'store.path="{store}"', *sum((["--set", o] for o in BUDGETED),
                                                                                  []),
                     "--set", "budget.minutes=0.02"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert "[budget] minutes = 0.02 is below the smallest sizing" in err and "from version 2" in err
    assert _digest(store) == before


@pytest.mark.parametrize("value", ["0", "-5", '"soon"', "20000"])
def test_bad_budget_values_are_refused_naming_the_key(tmp_path, value):
    with pytest.raises(ConfigError, match="budget.minutes"):
        _cfg(tmp_path / "store", f"budget.minutes={value}")


def test_the_default_has_no_budget_and_no_sizing_stage(tmp_path):
    cfg = load_config(DEMO, [f'store.path="{tmp_path / "store"}"'])
    assert cfg.budget.minutes is None and "budget_dir" not in plan_run(cfg)


def test_progress_lines_add_the_run_finish_predicted_at_the_current_rate(monkeypatch):
    import time as _time
    from datetime import datetime

    from graphkit.flows.artifacts import LogProgress

    lines = []

    class Logger:
        def info(self, msg, *args):
            lines.append(msg % args)

    monkeypatch.setattr(_time, "time", lambda: 1_000_000.0)
    progress.predict_finish(budget.seconds_after({"walks": 10.0, "train": 100.0, "after_train": 30.0}))
    try:
        now = [0.0]
        sink = LogProgress(Logger(), every=1, clock=lambda: now[0])
        sink("train", 0, 100, "tokens")
        now[0] = 10.0
        sink("train", 50, 100, "tokens")   # 5 tokens/s: 10 s left, then the 30 s after training
        sink("walks", 0, 10, "tokens")     # walks are followed by training (100 s) and the rest (30 s)
        now[0] = 11.0
        sink("walks", 5, 10, "tokens")
    finally:
        progress.predict_finish(None)
    at = datetime.fromtimestamp(1_000_000.0 + 10 + 30).strftime("%H:%M:%S")
    assert lines[0] == f"train: 50% (50 of 100 tokens), 5 tokens/s, 10.0 s left, run finish predicted at {at}"
    at_walks = datetime.fromtimestamp(1_000_000.0 + 1 + 130).strftime("%H:%M:%S")
    assert lines[1] == f"walks: 50% (5 of 10 tokens), 5 tokens/s, 1.0 s left, run finish predicted at {at_walks}"
    assert progress.finish_time("train", 1.0) is None
