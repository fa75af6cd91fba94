"""Store writers take turns and a publish happens once (issue 13): the writer lock held by every catalog writer,
the holder it names, promote racing a refresh's publish, a publish retried after a failure past the catalog
switch, a kill right after each rename of the publish, fsync of folders after renames, diagnostics written
before the version is visible."""

import os
import shutil
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import graphkit
import graphkit.pipeline as pipeline
import graphkit.store.catalog as catalog_mod
import graphkit.store.lock as store_lock_mod
from graphkit.cli import main
from graphkit.config import load_config
from graphkit.errors import StoreError
from graphkit.store import (connect, list_versions, pin_version, promote_version, publish_embeddings,
                            record_failed_run, store_lock)

ROOT = Path(__file__).resolve().parent.parent

CONFIG = """
[input]
edges = "edges.parquet"
source = "sender"
target = "receiver"
weight = "amount"
drop_null_ids = true

[walks]
per_node = 2
length = 10
seed = {seed}

[train]
dim = 8

[evaluate]
link_holdout = 0

[store]
path = "store"
keep = 1
"""


def _publish(store, n=4, value=1.0, **kw):
    return publish_embeddings(store, pa.array([f"n{i}" for i in range(n)]), np.full((n, 2), value, np.float32),
                              params={}, fingerprint=[], counts={}, timings={}, **kw)


def _env(**faults):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    if faults:
        env.update(GRAPHKIT_TEST_FAULTS="1", **faults)
    return env


def _python(code, **kw):
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(code)], cwd=ROOT, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kw)


def _wait_stopped(proc, timeout=120):
    """Wait until ``proc`` has stopped itself (SIGSTOP at a fault point)."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        assert proc.poll() is None, proc.stderr.read()
        state = Path(f"/proc/{proc.pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
        if state == "T":
            return
        time.sleep(0.05)
    raise AssertionError("the writer never reached its fault point")


def _dead_pid():
    p = subprocess.Popen(["true"])
    p.wait()
    return p.pid


@pytest.fixture
def project(tmp_path):
    """A folder with the demo transfers and a config whose store keeps one version (retention in every publish)."""
    shutil.copy(ROOT / "sample_parquet" / "transfers.parquet", tmp_path / "edges.parquet")
    (tmp_path / "ok.toml").write_text(CONFIG.format(seed=3))
    return tmp_path


@pytest.fixture(scope="module")
def published_template(tmp_path_factory):
    """``project`` with version 1 published from ``ok.toml``, built once per module; never written to."""
    root = tmp_path_factory.mktemp("writers") / "project"
    root.mkdir()
    shutil.copy(ROOT / "sample_parquet" / "transfers.parquet", root / "edges.parquet")
    (root / "ok.toml").write_text(CONFIG.format(seed=3))
    assert graphkit.refresh(load_config(root / "ok.toml")) == 1
    return root


@pytest.fixture
def published(published_template, tmp_path):
    """A private copy of ``published_template``: the project and its store holding version 1."""
    return Path(shutil.copytree(published_template, tmp_path / "project"))


def assert_consistent(store):
    """What any reader relies on: one current complete version; every complete version's files there, whole,
    with its row count; the views answer for each."""
    rows = list_versions(store)
    current = [r for r in rows if r["is_current"]]
    assert len(current) == 1 and current[0]["status"] == "complete", rows
    con = connect(store)
    try:
        assert con.sql("select count(*) from embeddings").fetchall()[0][0] == current[0]["n_nodes"]
        for r in rows:
            if r["status"] != "complete":
                continue
            assert pq.read_table(Path(store) / r["path"]).num_rows == r["n_nodes"]
            assert (Path(store) / r["path"]).with_suffix(".duckdb").is_file()
            n = con.sql(f"select count(*) from embeddings_v{r['version']:06d}").fetchall()[0][0]
            assert n == r["n_nodes"]
    finally:
        con.close()
    return rows


def assert_clean(store):
    """Nothing a finished run leaves behind: no temporary files, no unreachable version folder, no stage folder."""
    store = Path(store)
    rows = list_versions(store)
    assert [p for p in store.rglob("*") if ".tmp" in p.name] == []
    folders = sorted(int(p.name) for p in (store / "versions").iterdir())
    assert folders == sorted(r["version"] for r in rows if r["status"] == "complete")
    assert list((store / "work").iterdir()) == []


# --- the lock ---------------------------------------------------------------------------------------------------


def test_lock_is_reentrant_in_its_process_and_every_writer_holds_it(tmp_path):
    _publish(tmp_path)
    with store_lock(tmp_path):  # what a refresh holds for its whole run
        _publish(tmp_path, value=2.0)
        pin_version(tmp_path, 1)
        promote_version(tmp_path, 1)
        graphkit.store.apply_retention(tmp_path, 5)
        record_failed_run(tmp_path, message="m", params={}, fingerprint=[], counts={}, timings={})
        assert (tmp_path / ".lock").read_text() == f"{os.getpid()} refresh"  # the inner ones did not release it
    assert (tmp_path / ".lock").read_text() == ""  # released: names nobody
    assert [(r["version"], r["status"], r["is_current"], r["pinned"]) for r in list_versions(tmp_path)] == [
        (1, "complete", True, True), (2, "complete", False, False), (3, "failed", False, False)]


HOLD = """
import sys, time
from graphkit.store import store_lock
with store_lock(sys.argv[1], purpose="refresh"):
    print("locked", flush=True)
    time.sleep(float(sys.argv[2]))
"""


@pytest.mark.slow
@pytest.mark.parametrize("command", [["promote", "1"], ["pin", "1"], ["pin", "1", "--unpin"]])
def test_standalone_writer_refused_with_the_holder_or_waits(tmp_path, capsys, command):
    _publish(tmp_path)
    _publish(tmp_path, value=2.0)
    before = {p: p.read_bytes() for p in tmp_path.rglob("*") if p.is_file() and p.name != ".lock"}
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(tmp_path), "2"], cwd=ROOT, env=_env(),
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        assert main([command[0], str(tmp_path), *command[1:]]) == 2
        err = capsys.readouterr().err.strip()
        assert err == f"graphkit: error: {tmp_path}: another refresh holds the store lock (pid {holder.pid}); " \
                      "wait for it to finish"
        assert {p: p.read_bytes() for p in tmp_path.rglob("*") if p.is_file() and p.name != ".lock"} == before
        assert main([command[0], str(tmp_path), *command[1:], "--wait", "0.3"]) == 2
        assert "after waiting 0.3 s" in capsys.readouterr().err
        t0 = time.monotonic()
        assert main([command[0], str(tmp_path), *command[1:], "--wait", "60"]) == 0  # goes ahead once released
        assert time.monotonic() - t0 < 30
    finally:
        holder.kill()
        holder.wait()
    row = list_versions(tmp_path)[0]
    assert (row["is_current"], row["pinned"]) == {"promote": (True, False), "pin": (False, "--unpin" not in command)}[
        command[0]]


DELAYED_HOLDER = """
import fcntl, os, sys, time
fd = os.open(sys.argv[1], os.O_RDWR | os.O_CREAT)
fcntl.flock(fd, fcntl.LOCK_EX)
print("locked", flush=True)
if float(sys.argv[2]) >= 0:  # the winner writes its pid a moment after taking the lock
    time.sleep(float(sys.argv[2]))
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"{os.getpid()} refresh".encode(), 0)
time.sleep(30)
"""


@pytest.mark.parametrize("delay", [0.3, -1], ids=["pid-written-late", "pid-never-written"])
def test_refused_writer_names_the_live_holder_not_an_old_pid(tmp_path, delay):
    """The lock file still names an old writer that has exited when the next one takes the lock and has not yet
    written its own pid: the refusal must not name the dead process."""
    old = _dead_pid()
    (tmp_path / ".lock").write_text(f"{old} refresh")
    holder = subprocess.Popen([sys.executable, "-c", DELAYED_HOLDER, str(tmp_path / ".lock"), str(delay)],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(StoreError) as exc:
            with store_lock(tmp_path):
                pass
        if delay >= 0:
            assert f"(pid {holder.pid})" in str(exc.value)
        else:
            assert "another writer holds the store lock (its process is unknown)" in str(exc.value)
        assert str(old) not in str(exc.value)
    finally:
        holder.kill()
        holder.wait()


RACER = """
import os, sys, time
from graphkit.errors import StoreError
from graphkit.store import store_lock
print("ready", flush=True)  # imported: the test then sends both the same start time
start = float(sys.stdin.readline())
time.sleep(max(0.0, start - time.time()))
try:
    with store_lock(sys.argv[1]):
        print("won", flush=True)
        time.sleep(2)
except StoreError as exc:
    print("lost", exc, flush=True)
"""


@pytest.mark.slow
def test_two_writers_started_at_the_same_instant(tmp_path):
    """Started together, one wins; the other is refused naming the winner, which is alive at that moment."""
    (tmp_path / ".lock").write_text(f"{_dead_pid()} refresh")
    for _ in range(2):
        procs = [subprocess.Popen([sys.executable, "-c", RACER, str(tmp_path)], cwd=ROOT, env=_env(),
                                  stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True) for _ in range(2)]
        assert [p.stdout.readline().strip() for p in procs] == ["ready", "ready"]  # both have imported graphkit
        start = time.time() + 0.2
        for p in procs:
            p.stdin.write(f"{start!r}\n")
            p.stdin.close()
        lines = {p.pid: p.stdout.readline().strip() for p in procs}
        for p in procs:
            p.wait(timeout=60)
        [winner] = [pid for pid, line in lines.items() if line == "won"]
        [loser_line] = [line for line in lines.values() if line.startswith("lost")]
        assert f"another refresh holds the store lock (pid {winner})" in loser_line, lines


# --- promote racing a refresh's publish ---------------------------------------------------------------------------


@pytest.mark.slow
def test_promote_racing_a_refresh_publish_loses_neither(published, capsys):
    """A refresh paused inside its publish (version folder renamed in, catalog not yet switched) holds the lock:
    a promote is refused naming it, or waits for it; both changes end up in the catalog."""
    project = published  # version 1 published from ok.toml
    store = project / "store"
    (project / "seed5.toml").write_text(CONFIG.format(seed=5).replace("keep = 1", "keep = 5"))
    graphkit.refresh(load_config(project / "seed5.toml"))  # versions 1 and 2, 2 current
    code = f"import graphkit; from graphkit.config import load_config; " \
           f"print(graphkit.refresh(load_config({str(project / 'seed5.toml')!r})))"
    refresh = subprocess.Popen([sys.executable, "-c", code], cwd=ROOT, text=True, stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, env=_env(GRAPHKIT_FAULT="publish-version-renamed:stop"))
    try:
        _wait_stopped(refresh)
        assert main(["promote", str(store), "1"]) == 2
        err = capsys.readouterr().err
        assert f"another refresh holds the store lock (pid {refresh.pid})" in err, err
        done = {}
        promoter = threading.Thread(target=lambda: done.setdefault("rc", main(["promote", str(store), "1",
                                                                                  "--wait", "120"])))
        promoter.start()
        time.sleep(0.5)
        assert promoter.is_alive()  # waiting for the lock, not writing
        os.kill(refresh.pid, signal.SIGCONT)
        out, err = refresh.communicate(timeout=300)
        promoter.join(timeout=120)
    finally:
        if refresh.poll() is None:
            refresh.kill()
            refresh.wait()
    assert refresh.returncode == 0 and out.strip() == "3", err
    assert done == {"rc": 0}
    rows = assert_consistent(store)
    assert [(r["version"], r["status"], r["is_current"]) for r in rows] == [
        (1, "complete", True), (2, "complete", False), (3, "complete", False)]  # the publish and the promote


# --- a publish retried after a failure right after the catalog switch ----------------------------------------------


def test_publish_retry_recognises_its_version(tmp_path, monkeypatch):
    for k in range(1, 4):
        _publish(tmp_path, value=float(k))
    monkeypatch.setenv("GRAPHKIT_TEST_FAULTS", "1")
    monkeypatch.setenv("GRAPHKIT_FAULT", "publish-catalog-switched:raise")
    with pytest.raises(OSError, match="fault injected at publish-catalog-switched"):
        _publish(tmp_path, value=4.0, keep=1, run_id="run-a")
    # the switch went through whole: the version current and retention applied in the same transaction
    status = {r["version"]: (r["status"], r["is_current"]) for r in list_versions(tmp_path)}
    assert status == {1: ("expired", False), 2: ("expired", False), 3: ("expired", False), 4: ("complete", True)}
    assert (tmp_path / "versions" / "000001").exists()  # the folders were to go after the switch
    monkeypatch.delenv("GRAPHKIT_FAULT")
    assert _publish(tmp_path, value=4.0, keep=1, run_id="run-a") == 4  # the retry: same version, not a fifth
    assert [r["version"] for r in list_versions(tmp_path)] == [1, 2, 3, 4]
    assert sorted(p.name for p in (tmp_path / "versions").iterdir()) == ["000004"]
    assert _publish(tmp_path, value=5.0, keep=1, run_id="run-b") == 5  # another run publishes
    # a failed run's record is recognised the same way
    v = record_failed_run(tmp_path, message="m", params={}, fingerprint=[], counts={}, timings={}, run_id="run-c")
    assert record_failed_run(tmp_path, message="m", params={}, fingerprint=[], counts={}, timings={},
                             run_id="run-c") == v
    assert [r["run_id"] for r in list_versions(tmp_path)][-3:] == ["run-a", "run-b", "run-c"]


@pytest.mark.slow
def test_refresh_publish_task_retry_after_the_switch_publishes_once(published, monkeypatch):
    """The refresh's publish step fails with an I/O error right after the catalog switch; retried with the same
    arguments, as the Prefect task's retry does, it returns the version it published instead of a second one."""
    project = published  # version 1 published from ok.toml
    store = project / "store"
    real = pipeline.stage_publish
    attempts = []

    def publish_with_retry(*args, **kwargs):
        os.environ["GRAPHKIT_FAULT"] = "publish-catalog-switched:raise"
        try:
            attempts.append(real(*args, **kwargs))
        except OSError:
            attempts.append("failed")
            del os.environ["GRAPHKIT_FAULT"]
            attempts.append(real(*args, **kwargs))
        return attempts[-1]

    monkeypatch.setenv("GRAPHKIT_TEST_FAULTS", "1")
    import dataclasses

    monkeypatch.setattr(pipeline, "STAGES", tuple(dataclasses.replace(s, function=publish_with_retry)
                                                  if s.name == "publish" else s for s in pipeline.STAGES))
    (project / "seed5.toml").write_text(CONFIG.format(seed=5))
    assert graphkit.refresh(load_config(project / "seed5.toml")) == 2
    assert attempts == ["failed", 2]
    rows = assert_consistent(store)
    assert [(r["version"], r["status"]) for r in rows] == [(1, "expired"), (2, "complete")]
    assert_clean(store)
    assert (store / "versions" / "000002" / "diagnostics.npz").is_file()


# --- a kill right after each rename of the publish ----------------------------------------------------------------


@pytest.mark.slow
@pytest.mark.parametrize("fault", ["publish-version-renamed", "publish", "publish-catalog-switched"])
def test_kill_after_each_rename_of_the_publish(published, fault):
    """SIGKILL right after the version folder is renamed in, right before the catalog copy is renamed over the
    catalog, and right after it: readers see a whole store each time, and the next run publishes correctly."""
    project = published  # version 1 published from ok.toml
    store = project / "store"
    (project / "seed5.toml").write_text(CONFIG.format(seed=5))
    code = f"import graphkit; from graphkit.config import load_config; " \
           f"graphkit.refresh(load_config({str(project / 'seed5.toml')!r}))"
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=300,
                       env=_env(GRAPHKIT_FAULT=fault))
    assert r.returncode == -9, r.stderr
    rows = assert_consistent(store)
    if fault == "publish-catalog-switched":  # visible, whole, current; retention marked version 1 in the switch
        assert [(r["version"], r["status"], r["is_current"]) for r in rows] == [(1, "expired", False),
                                                                               (2, "complete", True)]
        assert (store / "versions" / "000002" / "diagnostics.npz").is_file()  # written before it became visible
    else:  # not visible: the version the readers had stays current
        assert [(r["version"], r["status"], r["is_current"]) for r in rows] == [(1, "complete", True)]
        assert (store / "versions" / "000002" / "diagnostics.npz").is_file()  # the folder was whole when renamed
    assert graphkit.refresh(load_config(project / "seed5.toml")) == 2  # resumes; publishes once either way
    rows = assert_consistent(store)
    assert [(r["version"], r["status"], r["is_current"]) for r in rows] == [(1, "expired", False),
                                                                           (2, "complete", True)]
    assert_clean(store)


# --- durability and visibility --------------------------------------------------------------------------------------


def test_every_rename_of_the_publish_is_followed_by_a_folder_fsync(tmp_path, monkeypatch):
    events = []
    real_replace, real_fsync_dir = os.replace, store_lock_mod.fsync_dir
    monkeypatch.setattr(store_lock_mod.os, "replace", lambda a, b: (events.append(("rename", Path(b))),
                                                                    real_replace(a, b))[1])
    monkeypatch.setattr(store_lock_mod, "fsync_dir", lambda d: (events.append(("fsync", Path(d))),
                                                                real_fsync_dir(d))[1])
    _publish(tmp_path)
    _publish(tmp_path, value=2.0, keep=1)
    promote_version(tmp_path, 2)
    renames = [i for i, (kind, _) in enumerate(events) if kind == "rename"]
    assert len(renames) == 5  # two version folders, three catalog switches
    for i in renames:
        assert events[i + 1] == ("fsync", events[i][1].parent), events


def test_diagnostics_are_in_the_version_before_it_becomes_visible(project, monkeypatch):
    """At the moment the catalog switch makes the version visible, its folder already holds everything."""
    seen = {}
    real = catalog_mod._update_catalog

    def spy(store, apply):
        for folder in (Path(store) / "versions").glob("[0-9]*"):
            seen[folder.name] = sorted(p.name for p in folder.iterdir())
        return real(store, apply)

    monkeypatch.setattr(catalog_mod, "_update_catalog", spy)
    graphkit.refresh(load_config(project / "ok.toml"))
    assert seen == {"000001": ["diagnostics.npz", "embeddings.duckdb", "embeddings.parquet"]}
    files = sorted(p.name for p in (project / "store" / "versions" / "000001").iterdir())
    assert files == seen["000001"]  # nothing added after the switch
    assert (project / "store" / "reports" / "version-000001.html").is_file()


def test_fault_point_needs_the_test_switch(tmp_path):
    """GRAPHKIT_FAULT alone (a stray variable in an operator's shell) does nothing."""
    code = "from graphkit.faults import fault_point; fault_point('publish'); print('alive')"
    env = {k: v for k, v in _env().items() if k != "GRAPHKIT_TEST_FAULTS"}
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                       env={**env, "GRAPHKIT_FAULT": "publish"})
    assert r.returncode == 0 and r.stdout.strip() == "alive", r.stderr
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                       env={**env, "GRAPHKIT_FAULT": "publish", "GRAPHKIT_TEST_FAULTS": "1"})
    assert r.returncode == -9


@pytest.mark.slow
def test_writers_in_threads_of_one_process_take_turns(tmp_path):
    """The flock cannot tell threads apart: publishes and promotes from several threads of one process must not
    lose each other's catalog changes."""
    _publish(tmp_path)
    errors = []

    def publish_some(k):
        try:
            for j in range(3):
                _publish(tmp_path, value=float(10 * k + j))
        except Exception as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    def promote_some():
        try:
            for _ in range(5):
                promote_version(tmp_path, 1)
        except Exception as exc:  # noqa: BLE001
            errors.append(exc)

    threads = [threading.Thread(target=publish_some, args=(k,)) for k in range(2)] + [threading.Thread(
        target=promote_some)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert errors == []
    rows = assert_consistent(tmp_path)
    assert [r["version"] for r in rows] == list(range(1, 8))  # every publish is in the catalog
    values = sorted(float(read[0, 0]) for read in (graphkit.store.read_version(tmp_path, v)[1] for v in range(2, 8)))
    assert values == [0.0, 1.0, 2.0, 10.0, 11.0, 12.0]


def test_standalone_writers_create_nothing_group_or_world_writable(tmp_path):
    old = os.umask(0)
    try:
        _publish(tmp_path)
        _publish(tmp_path, value=2.0)
        promote_version(tmp_path, 1)
        pin_version(tmp_path, 2)
    finally:
        os.umask(old)
    for p in [tmp_path, *tmp_path.rglob("*")]:
        assert not p.stat().st_mode & 0o022, f"{p} is group/world writable: {oct(p.stat().st_mode)}"
