"""The run's log (graphkit.logs) and the stage runner's part in it (graphkit.pipeline.run_stages).

Fast checks call the runner on stand-in stages; one slow test runs the demo refresh through the real command
line three times (default, ``--quiet``, ``--log-level debug``) and reads what a person would read at 7 am.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import os
import re
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

from graphkit import logs, pipeline
from graphkit.errors import GateFailure, GraphDataWarning

from conftest import FAST_DEMO

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_parquet" / "demo.toml"
LINE = re.compile(r"^\d\d:\d\d:\d\d ")


def test_stage_line_names_the_stage_its_duration_and_key_figure():
    assert logs.stage_line("ingest", {"counts": {"edges": 11_900, "nodes": 3_000}}, 0.42) == \
        "ingest         0.4 s  11.9k edges, 3k nodes"
    assert logs.stage_line("train", {"tokens_per_second": 605_000, "dim": 16}, 75.2) == \
        "train      1 min 15 s  605k tokens/s, dim 16"
    assert logs.stage_line("evaluate", {"metrics": {"link_auc_cosine": 0.81234, "evaluate_seconds": 2}}, 2) == \
        "evaluate       2.0 s  link AUC 0.8123"
    assert logs.stage_line("publish", 7, 3.0) == "publish        3.0 s  version 7"
    assert logs.stage_line("walks", {"skipped": True, "n_tokens": 5}, 0.01).endswith(
        "skipped: finished by an earlier run")


def _stand_in_stages(tmp_path, calls):
    """Three stages: one with a marker already written, one warning twice, one returning a version."""
    def finished(cfg, plan):
        calls.append("finished")
        return {"seconds": 1.0}

    def noisy(cfg, plan, first):
        calls.append("noisy")
        for _ in range(2):
            warnings.warn("3 self-loops dropped", GraphDataWarning)
        warnings.warn("another thing", GraphDataWarning)
        return {"seconds": 0.1, "counts": {"edges": 10, "nodes": 4}}

    def publish(cfg, plan, first, second):
        calls.append(("publish", first, second["counts"]["edges"]))
        return 3

    (tmp_path / "done").mkdir()
    (tmp_path / "done" / "marker.json").write_text(json.dumps({"seconds": 9.0, "from": "marker"}))
    return (pipeline.Stage("walks", finished, folder="done_dir", marker="marker.json"),
            pipeline.Stage("ingest", noisy, inputs=("walks",)),
            pipeline.Stage("skipped_by_when", noisy, when=lambda cfg, plan: False),
            pipeline.Stage("publish", publish, inputs=("walks", "ingest")))


def test_runner_skips_by_marker_logs_one_line_per_stage_and_each_warning_once(tmp_path, monkeypatch, caplog):
    calls = []
    monkeypatch.setattr(pipeline, "STAGES", _stand_in_stages(tmp_path, calls))
    record = {}
    with caplog.at_level(logging.DEBUG, logger="graphkit"):
        results = pipeline.run_stages(None, {"done_dir": str(tmp_path / "done")}, record=record)
    # the marker is the record of a finished stage: its function is not called, its figures are the marker's
    assert calls == ["noisy", ("publish", {"seconds": 9.0, "from": "marker", "skipped": True}, 10)]
    assert results["publish"] == 3 and "skipped_by_when" not in results
    assert {k: v["status"] for k, v in record.items()} == {"walks": "skipped", "ingest": "ran", "publish": "ran"}
    info = [r.getMessage() for r in caplog.records if r.levelno == logging.INFO]
    assert [m.split()[0] for m in info] == ["walks", "ingest", "publish"]
    assert info[2].endswith("version 3")
    warned = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING]
    assert warned == ["3 self-loops dropped", "another thing"]
    started = [r.getMessage() for r in caplog.records if r.levelno == logging.DEBUG]
    assert started == ["stage walks started", "stage ingest started", "stage publish started"]


def test_a_failing_stage_is_recorded_and_stops_the_run(tmp_path, monkeypatch):
    def gate(cfg, plan):
        raise GateFailure("link_auc_cosine = 0.5 is below [gates] min_link_auc = 0.7", version=2, metrics={})

    later = []
    monkeypatch.setattr(pipeline, "STAGES", (pipeline.Stage("publish", gate),
                                             pipeline.Stage("after", lambda c, p: later.append(1))))
    record = {}
    with pytest.raises(GateFailure):
        pipeline.run_stages(None, {}, record=record)
    assert record["publish"]["status"] == "failed" and "after" not in record and later == []


def test_the_stage_list_is_the_one_order():
    """The order both runners follow (the flow has no copy of it)."""
    import inspect

    from graphkit.flows import refresh

    assert [s.name for s in pipeline.STAGES] == ["ingest", "graph", "holdout", "budget", "eval_walks", "eval_train",
                                                 "walks", "train", "evaluate", "publish"]
    source = inspect.getsource(refresh.refresh_flow)
    assert "pipeline.execute(" in source and "stage_ingest" not in source and "stage_walks" not in source
    markers = {s.name: s.marker for s in pipeline.STAGES if s.marker}
    assert markers == {"ingest": "ingest.json", "holdout": "holdout.json", "budget": "sizing.json",
                       "eval_walks": "manifest.json",
                       "eval_train": "train.json", "walks": "manifest.json", "train": "train.json"}


def test_expected_outcomes_are_not_logged_again():
    f = logs.ExpectedOutcomeFilter()
    try:
        raise GateFailure("x", version=1, metrics={})
    except GateFailure:
        gate = logging.LogRecord("prefect.task_runs", logging.ERROR, "", 0, "failed", None, sys.exc_info())
    state = logging.LogRecord("prefect.flow_runs", logging.ERROR, "", 0,
                              "Finished in state Failed('Flow run encountered an exception: GateFailure: x')",
                              None, None)
    bug = logging.LogRecord("prefect.flow_runs", logging.ERROR, "", 0, "ZeroDivisionError: x", None, None)
    assert not f.filter(gate) and not f.filter(state) and f.filter(bug)


def test_configure_is_undone(monkeypatch):
    monkeypatch.delenv("PREFECT_LOGGING_LEVEL", raising=False)
    ours = logging.getLogger("graphkit")
    before = (list(ours.handlers), ours.level, ours.propagate, warnings.showwarning)
    undo = logs.configure("warning")
    assert os.environ["PREFECT_LOGGING_LEVEL"] == "WARNING" and ours.level == logging.WARNING
    undo()
    assert (list(ours.handlers), ours.level, ours.propagate, warnings.showwarning) == before
    assert "PREFECT_LOGGING_LEVEL" not in os.environ
    with pytest.raises(ValueError, match="level must be one of"):
        logs.configure("loud")


def _cli_refresh(store, *options, own_server=False):
    """``graphkit refresh`` of the demo as a separate process (its terminal output is what is checked): on the
    shared test server, or with ``own_server`` on a temporary server of its own, as a user's first run."""
    sets = [a for s in [*FAST_DEMO, f'store.path="{store}"'] for a in ("--set", s)]
    drop = ("GRAPHKIT_DEBUG", "GRAPHKIT_FAULT", "PREFECT_LOGGING_LEVEL") + (("PREFECT_API_URL",) if own_server else ())
    env = {k: v for k, v in os.environ.items() if k not in drop}
    r = subprocess.run([sys.executable, "-m", "graphkit.cli", "refresh", str(DEMO), *sets, *options],
                       capture_output=True, text=True, timeout=600, cwd=ROOT, env=env)
    assert r.returncode == 0, r.stderr[-3000:]
    return r.stdout.splitlines(), [line for line in r.stderr.splitlines() if line.strip()]


@pytest.mark.slow
def test_the_demo_log_is_one_line_per_stage_and_each_warning_once(tmp_path, prefect_api):
    """The demo refresh (conftest's FAST_DEMO: no holdout) through the command line, not on a terminal: first on
    a temporary server of its own (no server lines either), then ``--quiet`` and ``--log-level debug`` on the
    shared test server."""
    store = tmp_path / "store"
    out, err = _cli_refresh(store, own_server=True)
    assert out == [f"published version 1 to {store}"]  # the final line
    assert all(LINE.match(line) for line in err), err  # no Prefect, Dask or server lines, no traceback
    assert not any("distributed." in line for line in out + err)  # no cluster chatter either
    warned = [line for line in err if " warning: " in line]
    # the demo table's dropped rows: one warning (it was a Python warning with its source line, then a log line)
    assert len(warned) == 1 and "self-loops dropped" in warned[0] and "null id" in warned[0], err
    stages = [line.split()[1] for line in err if line not in warned]
    assert stages == ["ingest", "graph", "walks", "train", "evaluate", "publish"], err
    assert err[-1].endswith("version 1")
    assert "edges" in err[1] and "tokens/s" in err[4]

    out, quiet = _cli_refresh(store, "--quiet")
    assert out == [f"published version 2 to {store}"]
    assert len(quiet) == 1 and " warning: " in quiet[0] and "self-loops dropped" in quiet[0], quiet

    out, debug = _cli_refresh(store, "--log-level", "debug")
    assert out == [f"published version 3 to {store}"]
    assert len(debug) > len(err)
    assert any(line.endswith("stage ingest started") for line in debug)
    assert any(re.search(r"as_of \S+ \(now\)", line) for line in debug)
    assert sum(" warning: " in line and "self-loops dropped" in line for line in debug) == 1
