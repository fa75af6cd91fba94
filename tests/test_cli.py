"""The command line on the demo data, as a user runs it: the real Prefect flow (on the shared test server), the
commands called in this process (``conftest.cli``), and the one test of a real process's exit code and one-line
stderr for bad input."""

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import DEMO, FAST_DEMO, ROOT, cli

#: The demo with fewer, shorter walks and no evaluation: the command line's plumbing, not the demo's quality (the
#: demo's own settings run end to end in tests/test_flows.py).
FAST = [a for s in FAST_DEMO for a in ("--set", s)]


def graphkit(*args, timeout=600):
    """``graphkit ARGS`` as a separate process."""
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    return subprocess.run([sys.executable, "-m", "graphkit.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env=env, cwd=ROOT)


def _snapshot(folder):
    return {p.relative_to(folder): p.stat().st_mtime_ns for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory, prefect_api):
    """The demo refreshed once through the command line and its Prefect flow; read-only (a test that publishes
    works on a copy)."""
    store = tmp_path_factory.mktemp("demo") / "store"
    first = cli("refresh", DEMO, *FAST, "--set", f'store.path="{store}"')
    assert first[0] == 0, first[2][-3000:]
    return store, first


@pytest.mark.slow
def test_refresh_publishes_version_1(demo_store):
    store, first = demo_store
    assert "published version 1" in first[1]
    rows = json.loads(cli("versions", store, "--json")[1])
    assert len(rows) == 1
    row = rows[0]
    assert {"version", "status", "created_at", "metrics"} <= set(row)
    assert (row["version"], row["status"], row["is_current"]) == (1, "complete", True)
    assert row["counts"]["dropped_self_loops"] > 0 and row["counts"]["dropped_null_ids"] == 7
    assert set(row["timings"]) >= {"ingest", "walks", "train", "publish"}
    assert row["input_fingerprint"][0]["path"].endswith("transfers.parquet")
    assert not any((store / "work").iterdir())  # scratch removed after publishing


@pytest.mark.slow
def test_similar_export_and_sql(demo_store, tmp_path):
    store, _ = demo_store
    node = pq.read_table(ROOT / "sample_parquet" / "labels.parquet").column("account")[0].as_py()
    code, out, err, _ = cli("similar", store, node, "--top", "7", "--json")
    assert code == 0, err
    hits = json.loads(out)
    assert len(hits) == 7 and node not in {h["node_id"] for h in hits}
    sims = [h["similarity"] for h in hits]
    assert sims == sorted(sims, reverse=True) and -1 <= sims[-1] <= sims[0] <= 1

    dest = tmp_path / "vectors.parquet"
    assert cli("export", store, "--out", dest)[0] == 0
    t = pq.read_table(dest)
    assert t.column_names == ["node_id", "node_kind", "vector"] and t.num_rows > 2900
    assert t.schema.field("node_id").type == pa.string()

    code, out, _, _ = cli("sql", store, "select count(*) as n from embeddings")
    assert code == 0 and str(t.num_rows) in out

    code, _, err, _ = cli("similar", store, "acct-nobody")
    assert code == 2 and "acct-nobody" in err


@pytest.mark.slow
def test_second_refresh_publishes_version_2_and_bad_config_exits_2(demo_store, tmp_path):
    store = Path(shutil.copytree(demo_store[0], tmp_path / "store"))
    code, out, err, _ = cli("refresh", DEMO, *FAST, "--set", f'store.path="{store}"', "--set", "walks.seed=8")
    assert code == 0, err[-3000:]
    assert "published version 2" in out
    rows = json.loads(cli("versions", store, "--json")[1])
    assert [(r["version"], r["is_current"]) for r in rows] == [(1, False), (2, True)]

    before = _snapshot(store)
    # the one test of the contract as a separate process sees it: its exit code, one line on its stderr, no
    # traceback, within seconds (the other bad inputs go through graphkit.cli.main: tests/test_bad_input.py)
    started = time.monotonic()
    bad = graphkit("refresh", DEMO, "--set", f'store.path="{store}"', "--set", "train.dim=0")
    assert bad.returncode == 2
    assert bad.stderr.count("\n") == 1 and "Traceback" not in bad.stderr
    assert "[train] dim" in bad.stderr and "got 0" in bad.stderr
    assert time.monotonic() - started < 30  # fails before the flow starts
    assert _snapshot(store) == before

    code, _, err, _ = cli("refresh", DEMO, "--set", f'store.path="{store}"', "--set", "input.source=sendr")
    assert code == 2 and "transfers.parquet" in err and "'sender'" in err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert _snapshot(store) == before


def test_usage_errors_exit_2(tmp_path):
    code, _, err, _ = cli("refresh")
    assert code == 2 and "the following arguments are required" in err
    code, _, err, _ = cli("versions", tmp_path / "none")
    assert code == 2 and "no embedding store here" in err


def test_version_flag(capsys):
    """`graphkit --version` prints the installed distribution's version (importlib.metadata) and exits 0."""
    from importlib.metadata import version

    from graphkit.cli import main

    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"graphkit {version('graphkit')}"


def test_program_exit_waits_for_threads_and_flushes(tmp_path):
    """``run`` ends the process without the interpreter's teardown: its exit code, its buffered output, a
    non-daemon thread's work and the exit handlers must all survive that (a separate process: ``os._exit``)."""
    marker = tmp_path / "thread-done"
    script = (
        "import atexit, sys, threading, time\n"
        "from graphkit.cli import run\n"
        f"def late(): time.sleep(0.3); open({str(marker)!r}, 'w').write('x')\n"
        "threading.Thread(target=late).start()\n"
        "atexit.register(lambda: print('exit handler ran'))\n"
        "sys.stdout.write('buffered ')\n"
        "run(['versions', '/nonexistent-store-for-test'])\n")
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert proc.stdout.startswith("buffered ") and "exit handler ran" in proc.stdout
    assert marker.read_text() == "x"
    proc = subprocess.run([sys.executable, "-c", "from graphkit.cli import run; run(['--version'])"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and proc.stdout.strip()
