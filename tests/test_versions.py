"""The versioned store downstream jobs trust: lineage, retention and rollback, alignment, fold-in, SQL, feature
export and concurrent readers (issue: a versioned vector store)."""

import json
import multiprocessing as mp
import os
import subprocess
import sys
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.stats import special_ortho_group

import graphkit
from conftest import FAST_DEMO
from graphkit.config import load_config
from graphkit.errors import StoreError
from graphkit.features import export_features
from graphkit.foldin import neighbour_mean_vectors
from graphkit.graph import SparseGraph
from graphkit.store import (align_to_current, apply_retention, connect, list_versions, pin_version,
                            promote_version, publish_embeddings, read_table, read_version)

ROOT = Path(__file__).resolve().parent.parent


def publish(store, ids, vecs, *, kinds=None, keep=None, **kw):
    return publish_embeddings(store, pa.array(ids), np.asarray(vecs, np.float32), params={"p": 1},
                              fingerprint=[], counts={}, timings={}, metrics={}, node_kinds=kinds, keep=keep, **kw)


def test_lineage_of_a_refresh(tmp_path):
    cfg = load_config(ROOT / "sample_parquet" / "demo.toml", [f'store.path="{tmp_path}"', *FAST_DEMO])
    graphkit.refresh(cfg)
    r = subprocess.run([sys.executable, "-m", "graphkit.cli", "versions", str(tmp_path), "--json"],
                       capture_output=True, text=True, cwd=ROOT)
    row = json.loads(r.stdout)[0]
    fp = row["input_fingerprint"][0]
    assert fp["path"].endswith("transfers.parquet")
    assert fp["size"] == (ROOT / "sample_parquet" / "transfers.parquet").stat().st_size and len(fp["sha256"]) == 64
    assert row["params"]["train"]["dim"] == 16 and row["params"]["walks"]["per_node"] == 2  # full resolved config
    assert row["params"]["evaluate"]["labels"] is None and row["params"]["gates"]["min_link_auc"] is None
    assert row["package_version"] == graphkit_version()
    assert {"rows", "dropped_null_ids", "dropped_self_loops", "merged_duplicates", "nodes", "edges"} <= set(row["counts"])
    assert {"ingest", "walks", "train", "publish"} <= set(row["timings"])
    assert "train_tokens_per_second" in row["metrics"]
    assert row["params"]["lineage"]["warnings"]  # the repaired oddities, with counts


def graphkit_version():
    from importlib.metadata import version

    return version("graphkit")


def test_retention_pins_and_promote(tmp_path):
    ids = ["a", "b", "c"]
    for k in range(1, 4):
        publish(tmp_path, ids, np.full((3, 2), k))
    pin_version(tmp_path, 1)
    publish(tmp_path, ids, np.full((3, 2), 4), keep=2)  # keeps 3, 4 and pinned 1
    status = {r["version"]: r["status"] for r in list_versions(tmp_path)}
    assert status == {1: "complete", 2: "expired", 3: "complete", 4: "complete"}
    assert not (tmp_path / "versions" / "000002").exists() and (tmp_path / "versions" / "000001").exists()
    con = connect(tmp_path)
    views = {v for (v,) in con.sql("select view_name from duckdb_views() where view_name like 'embeddings%'").fetchall()}
    assert {"embeddings_v000001", "embeddings_v000003", "embeddings_v000004"} <= views
    assert "embeddings_v000002" not in views
    con.close()

    promote_version(tmp_path, 3)
    _, vecs = read_version(tmp_path)
    assert vecs[0, 0] == 3
    con = connect(tmp_path)
    assert con.sql("select max(vector[1]) from embeddings").fetchall()[0][0] == 3
    con.close()
    with pytest.raises(StoreError, match="version 2 is expired"):
        promote_version(tmp_path, 2)
    with pytest.raises(StoreError, match="no version 9"):
        promote_version(tmp_path, 9)
    # the current version is never expired, even when older than `keep` allows
    pin_version(tmp_path, 1, False)
    publish(tmp_path, ids, np.full((3, 2), 5))
    promote_version(tmp_path, 3)
    expired = apply_retention(tmp_path, 1)
    assert 3 not in expired and 5 not in expired  # current (3) and newest (5) stay
    kept = {r["version"] for r in list_versions(tmp_path) if r["status"] == "complete"}
    assert kept == {3, 5}


def test_rotated_copy_aligns_back(tmp_path):
    """A randomly rotated copy aligns back within float32 tolerance (orthogonal Procrustes, Schönemann 1966;
    scipy.stats.special_ortho_group draws the rotation)."""
    rng = np.random.default_rng(4)
    x = rng.normal(size=(500, 16)).astype(np.float32)
    ids = [f"n{i}" for i in range(500)]
    publish(tmp_path, ids, x)
    rot = special_ortho_group.rvs(16, random_state=5).astype(np.float32)
    # a new version with 50 new nodes and 20 nodes gone, otherwise the same vectors, rotated
    new_ids = ids[20:] + [f"new{i}" for i in range(50)]
    y = np.vstack([x[20:], rng.normal(size=(50, 16)).astype(np.float32)]) @ rot
    aligned, info = align_to_current(tmp_path, pa.array(new_ids), pa.array(["node"] * len(new_ids)), y)
    assert info["aligned_to"] == 1 and info["shared_nodes"] == 480
    np.testing.assert_allclose(aligned[:480], x[20:], atol=2e-5)
    assert info["residual"] < 1e-5 and info["residual_unaligned"] > 0.5


def test_refresh_records_alignment_residual(tmp_path):
    args = [f'store.path="{tmp_path}"', *FAST_DEMO]
    graphkit.refresh(load_config(ROOT / "sample_parquet" / "demo.toml", args))
    graphkit.refresh(load_config(ROOT / "sample_parquet" / "demo.toml", args + ["walks.seed=11"]))
    row = list_versions(tmp_path)[-1]
    al = row["params"]["lineage"]["alignment"]
    assert al["aligned_to"] == 1 and al["shared_nodes"] > 2900
    assert 0 < row["metrics"]["align_residual"] < al["residual_unaligned"]


def test_neighbour_mean_fold_in():
    g = SparseGraph.from_edges([0, 0, 1, 3], [1, 2, 2, 4], [1.0, 3.0, 1.0, 1.0], n_nodes=5)
    known = np.array([-1, 0, 1, -1, -1])  # nodes 1 and 2 have vectors; 0, 3, 4 are new
    vecs = np.array([[1.0, 0.0], [0.0, 1.0]], np.float32)
    means, has = neighbour_mean_vectors(g, known, vecs, np.array([0, 3]))
    np.testing.assert_allclose(means[0], [0.25, 0.75])  # weights 1 and 3 (hand-computed)
    assert has.tolist() == [True, False]


def test_foldin_command_publishes_provisional_rows(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    pq.write_table(pa.table({"s": ["a", "b", "c"], "t": ["b", "c", "a"]}), data / "e.parquet")
    cfg_text = (f'[input]\nedges = "data/e.parquet"\nsource = "s"\ntarget = "t"\n'
                f'[walks]\nper_node = 5\nlength = 5\n[train]\ndim = 8\n[store]\npath = "store"\n')
    (tmp_path / "c.toml").write_text(cfg_text)
    graphkit.refresh(load_config(tmp_path / "c.toml"))
    pq.write_table(pa.table({"s": ["a", "b", "c", "d", "x"], "t": ["b", "c", "a", "a", "y"]}), data / "e.parquet")
    r = subprocess.run([sys.executable, "-m", "graphkit.cli", "foldin", str(tmp_path / "c.toml")],
                       capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    assert "1 provisional vectors (2 new nodes had no known neighbour)" in r.stdout
    t = read_table(tmp_path / "store").to_pylist()
    rows = {x["node_id"]: x for x in t}
    assert rows["d"]["provisional"] and not rows["a"]["provisional"] and "x" not in rows
    np.testing.assert_allclose(rows["d"]["vector"], rows["a"]["vector"], rtol=1e-6)  # its only neighbour
    # the next full refresh replaces provisional vectors with trained ones
    graphkit.refresh(load_config(tmp_path / "c.toml"))
    assert not any(x["provisional"] for x in read_table(tmp_path / "store").to_pylist())


def test_sql_views_macros_and_examples(tmp_path):
    rng = np.random.default_rng(0)
    x = rng.normal(size=(200, 8)).astype(np.float32)
    ids = [f"acct-{i}" for i in range(200)]
    publish(tmp_path, ids, x)
    publish(tmp_path, ids, x * 2)
    con = graphkit.connect(tmp_path)
    assert con.sql("select count(*) from versions").fetchall() == [(2,)]
    assert con.sql("select count(*) from embeddings_v000001").fetchall() == [(200,)]
    # reference: numpy cosine similarity
    unit = x / np.linalg.norm(x, axis=1, keepdims=True)
    sims = unit @ unit[7]
    want = [ids[i] for i in np.argsort(-sims)[1:6]]
    got = [r[0] for r in con.sql("select * from nearest_neighbours('acct-7', 5)").fetchall()]
    assert got == want
    text = (ROOT / "sql" / "examples" / "nearest_neighbours.sql").read_text()
    assert [r[0] for r in con.execute(text, {"node_id": "acct-7"}).fetchall()][:5] == want
    pair = con.execute((ROOT / "sql" / "examples" / "pair_similarity.sql").read_text(),
                       {"a": "acct-7", "b": "acct-9"}).fetchall()[0][2]
    assert pair == pytest.approx(float(unit[7] @ unit[9]), abs=1e-5)
    assert con.sql("select pair_similarity('acct-7', 'acct-9')").fetchall()[0][0] == pytest.approx(pair, abs=1e-6)
    shared = con.execute((ROOT / "sql" / "examples" / "shared_neighbours.sql").read_text(),
                         {"a": "acct-7", "b": "acct-9"}).fetchall()
    top_a = set(ids[i] for i in np.argsort(-(unit @ unit[7]))[:52]) - {"acct-7", "acct-9"}
    top_b = set(ids[i] for i in np.argsort(-(unit @ unit[9]))[:52]) - {"acct-7", "acct-9"}
    assert {r[0] for r in shared} <= top_a & top_b
    con.close()
    # a kept version by number
    con = graphkit.connect(tmp_path, version=1)
    assert con.sql("select max(vector[1]) from embeddings").fetchall()[0][0] == pytest.approx(x[:, 0].max())
    con.close()


def test_feature_export(tmp_path):
    publish(tmp_path, pa.array([10, 20, 30], pa.int64()), np.arange(12).reshape(3, 4))
    ent = tmp_path / "customers.parquet"
    pq.write_table(pa.table({"customer": ["20", "99", "10", None], "plan": ["a", "b", "c", "d"]}), ent)
    out = tmp_path / "features.parquet"
    r = subprocess.run([sys.executable, "-m", "graphkit.cli", "features", str(tmp_path), "--entities", str(ent),
                        "--on", "customer", "--out", str(out)], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    assert "2 entities have no vector" in r.stdout
    t = pq.read_table(out)
    assert t.column_names == ["customer", "plan", "emb_000", "emb_001", "emb_002", "emb_003"]
    assert t.column("plan").to_pylist() == ["a", "b", "c", "d"]  # order and rows kept
    assert t.column("emb_000").to_pylist() == [4.0, None, 0.0, None]
    info = export_features(tmp_path, ent, "customer", tmp_path / "f.csv", fmt="csv")
    assert info["without_vector"] == 2
    assert (tmp_path / "f.csv").read_text().splitlines()[0] == "customer,plan,emb_000,emb_001,emb_002,emb_003"
    bad = subprocess.run([sys.executable, "-m", "graphkit.cli", "features", str(tmp_path), "--entities", str(ent),
                          "--on", "custmer", "--out", str(out)], capture_output=True, text=True, cwd=ROOT)
    assert bad.returncode == 2 and "did you mean 'customer'" in bad.stderr


def _reader(store, stop, queue):
    """Read the current version over and over; every version k has 100*k rows all equal to k."""
    seen, bad, reads = set(), 0, 0
    queue.put("ready")
    while not stop.is_set():
        try:
            con = graphkit.connect(store)
        except Exception:  # noqa: BLE001 - a catalog being renamed in is retried, never half-read
            continue
        try:
            for _ in range(3):  # a long-lived connection keeps seeing its own version whole
                n, lo, hi = con.sql("select count(*), min(vector[1]), max(vector[1]) from embeddings").fetchall()[0]
                reads += 1
                if not (lo == hi and n == 100 * int(lo)):
                    bad += 1
                seen.add(int(lo))
        finally:
            con.close()
    queue.put((sorted(seen), bad, reads))


def test_concurrent_reader_sees_whole_versions(tmp_path):
    publish(tmp_path, [f"n{i}" for i in range(100)], np.ones((100, 4)))
    ctx = mp.get_context("spawn")
    q, stop = ctx.Queue(), ctx.Event()
    p = ctx.Process(target=_reader, args=(str(tmp_path), stop, q))
    p.start()
    assert q.get(timeout=120) == "ready"
    time.sleep(0.5)
    for k in range(2, 7):
        publish(tmp_path, [f"n{i}" for i in range(100 * k)], np.full((100 * k, 4), k))
        time.sleep(0.3)
    stop.set()
    seen, bad, reads = q.get(timeout=60)
    p.join(timeout=30)
    assert bad == 0 and reads > 10
    assert len(seen) >= 2  # it did read across publishes


def test_warm_start_counts_and_moves_less(tmp_path):
    """Warm start: nodes of the current version start from it, so a second run moves less than a cold one,
    measured as the overlap of each node's 10 nearest neighbours with the current version (rotation and scale
    invariant)."""
    args = [f'store.path="{tmp_path}"', *FAST_DEMO, "store.align=false"]
    graphkit.refresh(load_config(ROOT / "sample_parquet" / "demo.toml", args))
    graphkit.refresh(load_config(ROOT / "sample_parquet" / "demo.toml", args + ["walks.seed=5"]))
    cold = list_versions(tmp_path)[-1]
    promote_version(tmp_path, 1)
    graphkit.refresh(load_config(ROOT / "sample_parquet" / "demo.toml",
                                 args + ["walks.seed=5", "train.warm_start=true", "train.subsample=0.001"]))
    warm = list_versions(tmp_path)[-1]
    assert warm["counts"]["warm_started_nodes"] == warm["n_nodes"] > 2900
    assert warm["params"]["train"]["subsample"] == 0.001
    _, v1 = read_version(tmp_path, 1)
    from graphkit.evaluate import neighbour_overlap

    _, vc = read_version(tmp_path, cold["version"])
    _, vw = read_version(tmp_path, warm["version"])
    assert neighbour_overlap(v1, vw, k=10) > neighbour_overlap(v1, vc, k=10)


def _stage_folder(work, name, age_days, now):
    folder = work / name
    folder.mkdir(parents=True)
    (folder / "part-00000.parquet").write_bytes(b"x")
    os.utime(folder, (now - age_days * 86400, now - age_days * 86400))
    return folder


def test_clean_work_removes_only_old_stage_folders(tmp_path):
    from graphkit.store import clean_work

    now = time.time()
    work = tmp_path / "work"
    old = _stage_folder(work, "walks-aaaa", 8, now)
    old_ingest = _stage_folder(work, "ingest-bbbb", 30, now)
    fresh = _stage_folder(work, "train-cccc", 6.9, now)
    kept = _stage_folder(work, "walks-dddd", 30, now)  # the current run's, however old
    other = _stage_folder(work, "notes", 30, now)  # not a stage folder: never touched
    target = _stage_folder(tmp_path / "elsewhere", "walks-eeee", 30, now)
    (work / "walks-ffff").symlink_to(target, target_is_directory=True)

    removed = clean_work(tmp_path, keep=[str(kept)], older_than_days=7, now=now)
    assert sorted(removed) == sorted([str(old), str(old_ingest)])
    assert not old.exists() and not old_ingest.exists()
    assert fresh.exists() and kept.exists() and other.exists() and target.exists() and (work / "walks-ffff").is_symlink()
    assert clean_work(tmp_path / "no-store", older_than_days=0) == []
    assert sorted(clean_work(tmp_path, older_than_days=0, now=now)) == sorted([str(fresh), str(kept)])


def test_a_finished_refresh_removes_abandoned_stage_folders(tmp_path):
    """An earlier run killed after its walks, whose parameters then changed, leaves folders nothing resumes from."""
    now = time.time()
    abandoned = _stage_folder(tmp_path / "work", "walks-0123456789abcdef", 10, now)
    recent = _stage_folder(tmp_path / "work", "train-0123456789abcdef", 1, now)
    cfg = load_config(ROOT / "sample_parquet" / "demo.toml", [f'store.path="{tmp_path}"', *FAST_DEMO])
    graphkit.refresh(cfg)
    assert not abandoned.exists() and recent.exists()
    assert sorted(p.name for p in (tmp_path / "work").iterdir()) == [recent.name]  # the run's own are gone too
    cfg = load_config(ROOT / "sample_parquet" / "demo.toml",
                      [f'store.path="{tmp_path}"', *FAST_DEMO, "store.keep_work_days=0"])
    graphkit.refresh(cfg)
    assert not recent.exists()
