"""Bad input, crashes, concurrent writers, disk space and access: exit 2 and one line, nothing lost, nothing let
through (issue: real production inputs, bad input, crashes and access)."""

import hashlib
import hmac
import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import graphkit
from conftest import cli, copy_store
from graphkit.config import load_config
from graphkit.errors import InputError, StoreError
from graphkit.store import connect, list_versions, store_lock

ROOT = Path(__file__).resolve().parent.parent
SMALL = dict(per_node=2, length=10, dim=16)

CONFIG = """
[input]
edges = "edges.parquet"
source = "sender"
target = "receiver"
weight = "amount"
drop_null_ids = true

[walks]
per_node = {per_node}
length = {length}
seed = 3

[train]
dim = {dim}

[evaluate]
link_holdout = 0

[store]
path = "store"
"""


def run_cli(*args, env=None, timeout=300):
    """``graphkit ARGS`` as a separate process (for a writer that must not share this process's lock)."""
    return subprocess.run([sys.executable, "-m", "graphkit.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, cwd=ROOT, env={**os.environ, **(env or {})})


@pytest.fixture
def no_prefect(monkeypatch):
    """A bad input must fail before the flow: reaching Prefect is a failure of the test."""
    import graphkit.cli

    def reached(*_a, **_k):
        raise RuntimeError("preflight let a bad input through to the Prefect flow")

    monkeypatch.setattr(graphkit.cli, "_prefect_env", reached)


def run_plain_refresh(config, env=None, timeout=300):
    """The pipeline without Prefect in a real subprocess (so SIGKILL hits a separate process)."""
    code = f"import graphkit; from graphkit.config import load_config; print(graphkit.refresh(load_config({str(config)!r})))"
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=timeout,
                          cwd=ROOT, env={**os.environ, **(env or {})})


def snapshot(folder):
    folder = Path(folder)
    return {str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != ".lock"}


@pytest.fixture(scope="module")
def published(tmp_path_factory, demo_template):
    """A folder with the demo transfers, a config, and a store holding version 1 of those transfers (a copy of
    conftest's ``demo_template``: the same edges and dimension, built without Prefect)."""
    root = tmp_path_factory.mktemp("faults")
    shutil.copy(ROOT / "sample_parquet" / "transfers.parquet", root / "edges.parquet")
    (root / "ok.toml").write_text(CONFIG.format(**SMALL))
    copy_store(demo_template, root / "store")
    assert [v["version"] for v in list_versions(root / "store")] == [1]
    return root


@pytest.fixture
def published_copy(published, tmp_path):
    """A private copy of ``published`` for a test that publishes (``published`` itself stays read-only)."""
    return Path(shutil.copytree(published, tmp_path / "faults"))


def _bad_config(root, name, text):
    p = root / f"{name}.toml"
    p.write_text(text)
    return p


BAD = {
    "missing_file": ('edges = "edges.parquet"', 'edges = "nope.parquet"', r"nope\.parquet: file not found"),
    "empty_glob": ('edges = "edges.parquet"', 'edges = "none/*.parquet"', "no files match"),
    "misnamed_column": ('source = "sender"', 'source = "sendr"', "did you mean 'sender'"),
    "unknown_key": ("[train]", "[train]\nwindw = 3", r"unknown key \[train\] windw"),
    "wrong_type": ("[train]", '[train]\nwindow = "5"', r"\[train\] window: input should be a valid integer"),
    "window_0": ("[train]", "[train]\nwindow = 0", r"\[train\] window"),
    "length_1": ("length = 10", "length = 1", r"\[walks\] length"),
    "dim_0": ("dim = 16", "dim = 0", r"\[train\] dim"),
    "null_ids": ("drop_null_ids = true", "drop_null_ids = false", "7 of 13537 rows have a null id"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_config_or_input_exits_2_and_changes_nothing(published, no_prefect, case):
    old, new, match = BAD[case]
    text = CONFIG.format(**SMALL)
    assert old in text
    cfg = _bad_config(published, case, text.replace(old, new, 1))
    before = snapshot(published / "store")
    code, _, err, _ = cli("refresh", cfg)
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    import re
    assert re.search(match, err), err
    assert snapshot(published / "store") == before


#: The reason each bad table must give; row checks name the table as configured (here the glob ``*.parquet``).
BAD_TABLE_REASONS = {
    "not_parquet": r"edges\.parquet: not a readable Parquet file",
    "truncated": r"edges\.parquet: not a readable Parquet file",
    "bad_weights": r"/\*\.parquet: 2 of 2 rows have a null, NaN, infinite, zero or negative value in weight "
                   r"column 'amount'.*e\.g\. \[\('a', 'b', nan\), \('b', 'c', -1\.0\)\]",
    "zero_weights": r"/\*\.parquet: 1 of 2 rows have a null, NaN, infinite, zero or negative value in weight "
                    r"column 'amount'.*\('b', 'c', 0\.0\)",
    "inf_weights": r"/\*\.parquet: 1 of 2 rows have .* in weight column 'amount'.*\('a', 'b', inf\)",
    "only_self_loops": r"/\*\.parquet: no usable edge \(2 rows: .*2 self-loops\)",
    "empty": r"/\*\.parquet: the edge table is empty \(0 rows\)",
    "mixed_types": r"2\.parquet column 'sender': node ids of type integer, but of type string in .*1\.parquet",
}


@pytest.mark.parametrize("kind", sorted(BAD_TABLE_REASONS))
def test_bad_tables_exit_2_and_change_nothing(published, no_prefect, kind):
    folder = published / f"bad_{kind}"
    folder.mkdir(exist_ok=True)
    if kind == "not_parquet":
        (folder / "edges.parquet").write_text("sender,receiver\n")
    elif kind == "truncated":
        data = (published / "edges.parquet").read_bytes()
        (folder / "edges.parquet").write_bytes(data[: len(data) // 2])
    elif kind in ("bad_weights", "zero_weights", "inf_weights"):
        bad = {"bad_weights": [float("nan"), -1.0], "zero_weights": [1.0, 0.0], "inf_weights": [float("inf"), 1.0]}
        pq.write_table(pa.table({"sender": ["a", "b"], "receiver": ["b", "c"], "amount": bad[kind]}),
                       folder / "edges.parquet")
    elif kind == "only_self_loops":
        pq.write_table(pa.table({"sender": ["a", "b"], "receiver": ["a", "b"], "amount": [1.0, 1.0]}),
                       folder / "edges.parquet")
    elif kind == "empty":
        pq.write_table(pa.table({"sender": pa.array([], pa.string()), "receiver": pa.array([], pa.string()),
                                 "amount": pa.array([], pa.float64())}), folder / "edges.parquet")
    elif kind == "mixed_types":
        pq.write_table(pa.table({"sender": ["a"], "receiver": ["b"], "amount": [1.0]}), folder / "1.parquet")
        pq.write_table(pa.table({"sender": [1], "receiver": [2], "amount": [1.0]}), folder / "2.parquet")
    text = CONFIG.format(**SMALL).replace('edges = "edges.parquet"',
                                          f'edges = "{folder.name}/*.parquet"').replace('path = "store"',
                                                                                        'path = "../store"')
    (folder / "c.toml").write_text(text.replace(f'{folder.name}/*.parquet', "*.parquet"))
    before = snapshot(published / "store")
    code, _, err, _ = cli("refresh", folder / "c.toml")
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    import re
    assert re.search(BAD_TABLE_REASONS[kind], err), err
    assert snapshot(published / "store") == before


@pytest.mark.slow
@pytest.mark.parametrize("stage", ["ingest", "walks", "train", "publish"])
def test_killed_run_leaves_store_whole_and_next_run_publishes(published_copy, stage):
    published = published_copy
    cfg = published / "ok.toml"
    before_versions = [(v["version"], v["is_current"]) for v in list_versions(published / "store")]
    r = run_plain_refresh(cfg, env={"GRAPHKIT_FAULT": stage, "GRAPHKIT_TEST_FAULTS": "1"})
    assert r.returncode == -9, r.stderr  # killed by SIGKILL
    # readers see exactly the versions that were there
    assert [(v["version"], v["is_current"]) for v in list_versions(published / "store")] == before_versions
    graphkit.refresh(load_config(cfg))  # the next run, in this process
    rows = list_versions(published / "store")
    assert rows[-1]["is_current"] and rows[-1]["status"] == "complete"
    assert rows[-1]["version"] == before_versions[-1][0] + 1
    con = connect(published / "store")
    assert con.sql("select count(*) from embeddings").fetchall()[0][0] == rows[-1]["n_nodes"]
    con.close()
    leftovers = [p for p in (published / "store").rglob("*") if ".tmp" in p.name]
    assert leftovers == []
    assert list((published / "store" / "work").iterdir()) == []


@pytest.mark.slow
def test_killed_nightly_run_resumes_and_leaves_nothing_in_work(tmp_path):
    """A relative window (decay measured from the run's as_of, no until): the rerun after a kill takes the killed
    run's as_of from STORE/work, resumes its finished stages, and the finished run leaves STORE/work empty."""
    root = tmp_path
    shutil.copy(ROOT / "sample_parquet" / "transfers.parquet", root / "edges.parquet")
    text = CONFIG.format(**SMALL).replace('weight = "amount"', 'weight = "amount"\ntimestamp = "sent_at"\n'
                                                                'half_life_days = 7')
    (root / "nightly.toml").write_text(text)
    r = run_plain_refresh(root / "nightly.toml", env={"GRAPHKIT_FAULT": "train", "GRAPHKIT_TEST_FAULTS": "1"})
    assert r.returncode == -9, r.stderr
    work = root / "store" / "work"
    [record] = work.glob("run-*.json")
    as_of = json.loads(record.read_text())["as_of"]
    assert len(list(work.glob("ingest-*/ingest.json"))) == 1
    assert graphkit.refresh(load_config(root / "nightly.toml")) == 1  # the rerun, in this process
    [row] = list_versions(root / "store")
    assert row["status"] == "complete" and row["params"]["lineage"]["window"]["as_of"] == as_of
    assert row["timings"]["ingest"] == row["timings"]["walks"] == 0.0 and row["timings"]["train"] > 0  # resumed
    assert list(work.iterdir()) == []


@pytest.mark.slow
def test_second_writer_refused_and_stale_lock_ignored(published_copy):
    published = published_copy
    store = published / "store"
    with store_lock(store):
        r = run_cli("refresh", published / "ok.toml")
        assert r.returncode == 2
        assert f"another refresh holds the store lock (pid {os.getpid()})" in r.stderr
    # a lock file left by a dead process (no lock held) is stale: the next run goes ahead
    (store / ".lock").write_text("999999")
    n = len(list_versions(store))
    assert graphkit.refresh(load_config(published / "ok.toml")) == n + 1


def test_lock_and_temp_files_are_not_followed_through_symlinks(published, tmp_path):
    store = tmp_path / "store"
    store.mkdir()
    victim = tmp_path / "victim.txt"
    victim.write_text("keep me")
    (store / ".lock").symlink_to(victim)
    with pytest.raises(StoreError, match="a symlink there is refused"):
        with store_lock(store):
            pass
    assert victim.read_text() == "keep me"
    (store / ".lock").unlink()
    # a symlink planted where the catalog copy is built is removed, not written through
    from graphkit.store import publish_embeddings
    (store / f".catalog.duckdb.tmp-{os.getpid()}").symlink_to(victim)
    publish_embeddings(store, pa.array(["a", "b"]), np.ones((2, 2), np.float32), params={}, fingerprint=[],
                       counts={}, timings={})
    assert victim.read_text() == "keep me"


def test_refuses_when_disk_is_too_small(published_copy, monkeypatch):
    published = published_copy
    import graphkit.pipeline as pipeline

    real = shutil.disk_usage
    monkeypatch.setattr(pipeline.shutil, "disk_usage", lambda p: real(p)._replace(free=1000))
    before = snapshot(published / "store")
    with pytest.raises(StoreError, match=r"the walk corpus needs about .* GB .* but only 0.00 GB are free"):
        graphkit.refresh(load_config(published / "ok.toml"))
    after = snapshot(published / "store")
    assert {k: v for k, v in after.items() if not k.startswith("work/")} == before


def test_sql_is_confined_to_the_store(published, tmp_path):
    con = connect(published / "store")
    with pytest.raises(duckdb.PermissionException):
        con.sql("select * from read_csv('/etc/passwd')").fetchall()
    with pytest.raises(duckdb.PermissionException):
        con.execute(f"copy (select 1) to '{tmp_path / 'out.csv'}'")
    with pytest.raises(duckdb.Error):
        con.execute("set enable_external_access = true")
    assert con.sql("select count(*) from embeddings").fetchall()[0][0] > 0
    con.close()
    code, _, err, _ = cli("sql", published / "store", "select * from read_csv('/etc/passwd')")
    assert code == 2 and "Permission" in err


def test_ids_are_bound_never_pasted(published):
    evil = "x'); drop table versions; --"
    code, _, err, _ = cli("similar", published / "store", evil)
    assert code == 2 and "is not in the embeddings" in err
    assert len(list_versions(published / "store")) >= 1

    # as a real node id, it is just an id
    root = published / "evil"
    root.mkdir(exist_ok=True)
    pq.write_table(pa.table({"sender": [evil, "b", "c"], "receiver": ["b", "c", evil], "amount": [1.0] * 3}),
                   root / "edges.parquet")
    (root / "c.toml").write_text(CONFIG.format(**SMALL))
    graphkit.refresh(load_config(root / "c.toml"))
    code, out, err, _ = cli("similar", root / "store", evil, "--json", "--top", "2")
    assert code == 0, err
    assert {h["node_id"] for h in json.loads(out)} == {"b", "c"}
    assert len(list_versions(root / "store")) == 1


def test_hashed_ids_and_permissions(published, tmp_path, monkeypatch, no_prefect):
    root = tmp_path / "hashed"
    root.mkdir()
    shutil.copy(published / "edges.parquet", root / "edges.parquet")
    (root / "c.toml").write_text(CONFIG.format(**SMALL).replace("drop_null_ids = true",
                                                                "drop_null_ids = true\nhash_ids = true"))
    monkeypatch.setenv("GRAPHKIT_ID_SALT", "")
    with pytest.raises(InputError, match="GRAPHKIT_ID_SALT"):
        graphkit.refresh(load_config(root / "c.toml"))
    code, _, err, _ = cli("refresh", root / "c.toml")
    assert code == 2 and "GRAPHKIT_ID_SALT" in err
    salt = "a-secret-key-of-the-team-0001"
    monkeypatch.setenv("GRAPHKIT_ID_SALT", salt)
    umask = os.umask(0)  # the store must still come out without group/world write bits
    try:
        graphkit.refresh(load_config(root / "c.toml"))
    finally:
        os.umask(umask)
    ids, _ = graphkit.store.read_version(root / "store")
    raw = sorted(set(pq.read_table(root / "edges.parquet").column("sender").to_pylist()) - {None})
    expected = {hmac.new(salt.encode(), v.encode(), hashlib.sha256).hexdigest() for v in raw}  # RFC 2104 HMAC
    assert expected <= set(ids.to_pylist()) and not set(raw) & set(ids.to_pylist())
    for p in (root / "store").rglob("*"):
        mode = p.stat().st_mode
        assert not mode & 0o022, f"{p} is group/world writable: {oct(mode)}"


@pytest.mark.parametrize("key", [b"a-secret-key-of-the-team-0001", b"k" * 64, b"long-" * 40],
                         ids=["short key", "block-sized key", "key longer than a block"])
def test_hash_ids_is_hmac_sha256(key, monkeypatch):
    """Pseudonyms equal the standard library's HMAC-SHA256 (RFC 2104) of each id's text, for strings (non-ASCII,
    empty, longer than a SHA-256 block), integers and nulls, across chunk boundaries."""
    from graphkit import ids as gi

    monkeypatch.setattr(gi, "HASH_CHUNK", 4)
    texts = ["acct-1", "", "Zoë-Ω-客户", "x" * 55, "y" * 56, "z" * 64, "w" * 200, None, "acct-2"]
    got = gi.hash_ids(pa.chunked_array([texts[:3], texts[3:]]), key)
    want = [None if t is None else hmac.new(key, t.encode(), hashlib.sha256).hexdigest() for t in texts]
    assert got.type == pa.string() and got.to_pylist() == want
    numbers = [0, -5, 17, 2**62, None, 123456789]
    want = [None if v is None else hmac.new(key, str(v).encode(), hashlib.sha256).hexdigest() for v in numbers]
    assert gi.hash_ids(pa.array(numbers, pa.int64()), key).to_pylist() == want
    assert gi.hash_ids(numbers, key).to_pylist() == want  # a plain list: str(id) of each
    assert gi.hash_ids(pa.array([], pa.string()), key).to_pylist() == []
    assert gi.hash_ids(pa.array(["a"]).slice(0, 1), key).to_pylist() == [hmac.new(key, b"a", "sha256").hexdigest()]


def test_hash_kernel_without_jit():
    """The numba HMAC-SHA256 kernel's Python body (NUMBA_DISABLE_JIT=1) gives the standard library's digests too."""
    code = textwrap.dedent("""
        import hmac, warnings
        import pyarrow as pa
        warnings.simplefilter("ignore")  # numpy warns on the uint32 wrap-around that SHA-256 relies on
        from graphkit.ids import hash_ids
        key = b"k" * 70
        texts = ["", "abc", "x" * 56, "y" * 130, None]
        want = [None if t is None else hmac.new(key, t.encode(), "sha256").hexdigest() for t in texts]
        assert hash_ids(pa.array(texts), key).to_pylist() == want
        print("same")
    """)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                       env={**os.environ, "NUMBA_DISABLE_JIT": "1"}, timeout=120)
    assert r.returncode == 0 and r.stdout.strip() == "same", r.stderr


def test_ids_are_hashed_once_at_ingest(tmp_path, monkeypatch):
    """Ingest stores the pseudonyms in the node dictionary; the stages after it read them instead of hashing all
    ids again (one id is re-hashed to check the key), and a changed key makes them hash afresh."""
    from types import SimpleNamespace

    from graphkit import ids as gi
    from graphkit.ingest import EdgeTable, ingest_tables
    from graphkit.pipeline import _published_ids

    key = "a-secret-key-of-the-team-0001"
    pq.write_table(pa.table({"s": ["a", "b", "c", "d"], "t": ["b", "c", "a", "é"]}), tmp_path / "e.parquet")
    ingest_tables([EdgeTable(str(tmp_path / "e.parquet"), "s", "t")], tmp_path / "ing", hash_key=key.encode())
    nodes = pq.read_table(tmp_path / "ing" / "nodes.parquet")
    want = [hmac.new(key.encode(), v.encode(), hashlib.sha256).hexdigest() for v in nodes.column("node_id").to_pylist()]
    assert nodes.column("node_pseudonym").to_pylist() == want
    hashed = []
    real = gi.hash_ids
    monkeypatch.setattr(gi, "hash_ids", lambda ids, k: hashed.append(len(ids)) or real(ids, k))
    monkeypatch.setenv("GRAPHKIT_ID_SALT", key)
    cfg = SimpleNamespace(input=SimpleNamespace(hash_ids=True, hash_salt_env="GRAPHKIT_ID_SALT"))
    ids, kinds = _published_ids(cfg, {"ingest_dir": str(tmp_path / "ing")})
    assert ids.to_pylist() == want and kinds.to_pylist() == ["node"] * 5
    assert hashed == [1]  # the key check only
    monkeypatch.setenv("GRAPHKIT_ID_SALT", "another-key-of-the-team-0002")
    ids, _ = _published_ids(cfg, {"ingest_dir": str(tmp_path / "ing")})
    assert hashed == [1, 1, 5]
    assert ids.to_pylist() == real(nodes.column("node_id"), b"another-key-of-the-team-0002").to_pylist()
    cfg.input.hash_ids = False
    assert _published_ids(cfg, {"ingest_dir": str(tmp_path / "ing")})[0].to_pylist() == ["a", "b", "c", "d", "é"]


@pytest.mark.slow
def test_cli_run_never_leaves_its_temporary_prefect_server(published, tmp_path):
    """Without PREFECT_API_URL the CLI runs on Prefect's temporary server; SIGKILL must not orphan it. (A normal
    exit: tests/test_flows.py::test_recorded_timings_add_up_to_the_command.)"""
    from conftest import assert_gone, watch_descendants

    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    env.update(GRAPHKIT_FAULT="walks", GRAPHKIT_TEST_FAULTS="1")
    cfg = published / "ok.toml"
    proc = subprocess.Popen([sys.executable, "-m", "graphkit.cli", "refresh", str(cfg), "--set",
                             f'store.path="{tmp_path / "store"}"'], cwd=ROOT, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    seen = watch_descendants(proc)  # every helper process the run starts: the server and its watchdog
    stderr = proc.stderr.read()
    assert proc.returncode == -9, stderr[-2000:]
    server = [p for p, cmd in seen.values() if "uvicorn" in cmd and "prefect.server" in cmd]
    watchdog = [p for p, cmd in seen.values() if "flows.tempserver" in cmd]
    assert len(server) == 1 and len(watchdog) == 1, [cmd for _, cmd in seen.values()]
    assert_gone(server + watchdog, within=20)
