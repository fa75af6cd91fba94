"""The versioned store downstream jobs trust: lineage, retention and rollback, alignment, fold-in, SQL, feature
export and concurrent readers (issue: a versioned vector store)."""

import json
import multiprocessing as mp
import os
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.stats import special_ortho_group

import graphkit
from conftest import FAST_DEMO, cli, copy_store
from graphkit.config import load_config
from graphkit.errors import StoreError
from graphkit.features import export_features
from graphkit.foldin import neighbour_mean_vectors
from graphkit.graph import AdjacencyArrays
from graphkit.store import (align_to_current, apply_retention, connect, list_versions, pin_version,
                            promote_version, publish_embeddings, read_table, read_version)

ROOT = Path(__file__).resolve().parent.parent


def publish(store, ids, vecs, *, kinds=None, keep=None, **kw):
    return publish_embeddings(store, pa.array(ids), np.asarray(vecs, np.float32), params={"p": 1},
                              fingerprint=[], counts={}, timings={}, metrics={}, node_kinds=kinds, keep=keep, **kw)


def test_lineage_of_a_refresh(demo_template):
    """The demo refreshed with FAST_DEMO (conftest's ``demo_template``, read here only)."""
    code, out, err, _ = cli("versions", demo_template, "--json")
    assert code == 0, err
    row = json.loads(out)[0]
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


def test_blockwise_alignment_equals_scipy_procrustes(tmp_path, monkeypatch):
    """Alignment block by block (small blocks here) equals scipy.linalg.orthogonal_procrustes on the shared rows,
    applied to every row in float64, within float32 tolerance; the residuals equal graphkit.evaluate's."""
    from scipy.linalg import orthogonal_procrustes

    from graphkit import store as gs
    from graphkit.evaluate import procrustes_residual

    monkeypatch.setattr(gs.align, "ALIGN_BLOCK_BYTES", 3 * 8 * 16 * 300)  # blocks of 300 rows
    rng = np.random.default_rng(8)
    x = rng.normal(size=(2000, 16)).astype(np.float32)
    ids = list(range(2000))
    publish(tmp_path, ids, x, kinds=pa.array(["account"] * 2000))
    rot = special_ortho_group.rvs(16, random_state=9)
    new_ids = ids[100:] + list(range(5000, 5300))  # 100 gone, 300 new
    y = (np.vstack([x[100:], rng.normal(size=(300, 16))]) @ rot
         + rng.normal(scale=0.05, size=(2200, 16))).astype(np.float32)  # rotated, plus noise
    y_before = y.copy()
    aligned, info = align_to_current(tmp_path, pa.array(new_ids), pa.array(["account"] * 2200), y)
    assert aligned is y  # rotated in place
    r_scipy, _ = orthogonal_procrustes(y_before[:1900].astype(np.float64), x[100:].astype(np.float64))
    np.testing.assert_allclose(aligned, (y_before.astype(np.float64) @ r_scipy).astype(np.float32), atol=2e-5)
    ref = procrustes_residual(x[100:], y_before[:1900])
    assert info["shared_nodes"] == 1900
    assert info["residual"] == pytest.approx(ref["residual"], rel=1e-9)
    assert info["residual_unaligned"] == pytest.approx(ref["residual_unaligned"], rel=1e-9)
    # other node kinds, or ids of another type, share nothing
    _, other = align_to_current(tmp_path, pa.array(new_ids), pa.array(["device"] * 2200), y_before.copy())
    assert other["aligned_to"] is None and other["shared_nodes"] == 0
    _, other = align_to_current(tmp_path, pa.array([str(i) for i in new_ids]), pa.array(["account"] * 2200),
                                y_before.copy())
    assert other == {"aligned_to": None, "shared_nodes": 0, "residual": None, "residual_unaligned": None}


def test_previous_version_is_read_once_per_run(tmp_path, monkeypatch):
    """With a cache folder the first consumer reads the previous version (key columns, then the matched rows'
    vectors) into a memory-mapped float32 file; the others reuse it; a newly published version is read afresh."""
    from graphkit import store as gs

    rng = np.random.default_rng(3)
    x = rng.normal(size=(300, 8)).astype(np.float32)
    ids = [f"n{i}" for i in range(300)]
    publish(tmp_path, ids, x, provisional=np.arange(300) == 7)  # provisional rows are never matched
    new_ids = pa.array(ids[::-1])
    kinds = pa.array(["node"] * 300)
    cache = tmp_path / "work" / "ingest-x" / "previous"
    first = gs.match_current(tmp_path, new_ids, kinds, 8, cache_dir=cache)
    assert isinstance(first["old_vectors"], np.memmap) and first["old_vectors"].dtype == np.float32
    expected_rows = np.array([r for r in range(300) if r != 292])  # new row 292 is old row 7
    np.testing.assert_array_equal(first["new_rows"], expected_rows)
    np.testing.assert_array_equal(first["old_vectors"], x[299 - expected_rows])
    calls = []
    monkeypatch.setattr(gs.align, "_matched_rows", lambda *a: calls.append(a))
    second = gs.match_current(tmp_path, new_ids, kinds, 8, cache_dir=cache)
    assert calls == [] and second["version"] == 1
    np.testing.assert_array_equal(second["old_vectors"], first["old_vectors"])
    assert gs.match_current(tmp_path, new_ids, kinds, 4, cache_dir=cache) is None  # another dimension
    monkeypatch.undo()
    publish(tmp_path, ids, 2 * x)
    third = gs.match_current(tmp_path, new_ids, kinds, 8, cache_dir=cache)
    assert third["version"] == 2 and third["new_rows"].size == 300
    np.testing.assert_array_equal(third["old_vectors"], 2 * x[::-1])
    assert sorted(p.name for p in cache.iterdir()) == ["v000001", "v000002"]
    # a night whose nodes are all new shares nothing, cached or not
    fresh = pa.array([f"new{i}" for i in range(5)])
    for _ in range(2):
        none = gs.match_current(tmp_path, fresh, pa.array(["node"] * 5), 8, cache_dir=tmp_path / "other")
        assert none["new_rows"].size == 0 and none["old_vectors"].shape == (0, 8)
    _, info = align_to_current(tmp_path, fresh, pa.array(["node"] * 5), np.ones((5, 8), np.float32),
                               cache_dir=tmp_path / "other")
    assert info["aligned_to"] is None and info["shared_nodes"] == 0


@pytest.mark.slow
def test_alignment_allocates_no_float64_copy(tmp_path):
    """Peak memory traced by tracemalloc while aligning 200k x 64 (51 MB of float32) stays below one matrix (the
    previous version's matched rows) plus one block and the row indices; a float64 copy alone would be 102 MB."""
    import tracemalloc

    from graphkit import store as gs

    n, dim = 200_000, 64
    rng = np.random.default_rng(0)
    x = rng.standard_normal((n, dim), dtype=np.float32)
    ids = pa.array(np.arange(n))
    publish(tmp_path, ids, x)
    y = x[::-1].copy()
    new_ids = pa.array(np.arange(n)[::-1].copy())
    kinds = pa.array(["node"] * n)
    tracemalloc.start()
    try:
        aligned, info = gs.align_to_current(tmp_path, new_ids, kinds, y)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert info["shared_nodes"] == n and info["residual"] < 1e-5
    np.testing.assert_allclose(aligned, x[::-1], atol=1e-4)
    matrix, indices = n * dim * 4, 4 * n * 8  # new_rows, old_rows, their sort order, the sorted rows
    assert peak < matrix + gs.ALIGN_BLOCK_BYTES + indices, (peak, matrix)


@pytest.mark.slow
def test_refresh_records_alignment_residual(tmp_path, demo_template, monkeypatch):
    from graphkit import store as gs

    tmp_path = copy_store(demo_template, tmp_path / "store")  # version 1: the demo with FAST_DEMO
    args = [f'store.path="{tmp_path}"', *FAST_DEMO]
    reads = []
    join = gs.align._matched_rows
    monkeypatch.setattr(gs.align, "_matched_rows", lambda *a: reads.append(a[0]) or join(*a))
    # warm start, drift and alignment all use the current version: it is read once
    graphkit.refresh(load_config(ROOT / "sample_parquet" / "demo.toml", args + ["walks.seed=11",
                                                                              "train.warm_start=true"]))
    assert len(reads) == 1 and reads[0].name == "embeddings.parquet"
    row = list_versions(tmp_path)[-1]
    assert row["counts"]["warm_started_nodes"] > 2900 and "neighbour_drift" in row["metrics"]
    al = row["params"]["lineage"]["alignment"]
    assert al["aligned_to"] == 1 and al["shared_nodes"] > 2900
    assert 0 < row["metrics"]["align_residual"] < al["residual_unaligned"]


def test_neighbour_mean_fold_in():
    g = AdjacencyArrays.from_edges([0, 0, 1, 3], [1, 2, 2, 4], [1.0, 3.0, 1.0, 1.0], n_nodes=5)
    known = np.array([-1, 0, 1, -1, -1])  # nodes 1 and 2 have vectors; 0, 3, 4 are new
    vecs = np.array([[1.0, 0.0], [0.0, 1.0]], np.float32)
    means, has = neighbour_mean_vectors(g, known, vecs, np.array([0, 3]))
    np.testing.assert_allclose(means[0], [0.25, 0.75])  # weights 1 and 3 (hand-computed)
    assert has.tolist() == [True, False]


@pytest.mark.slow
def test_foldin_command_publishes_provisional_rows(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    pq.write_table(pa.table({"s": ["a", "b", "c"], "t": ["b", "c", "a"]}), data / "e.parquet")
    cfg_text = (f'[input]\nedges = "data/e.parquet"\nsource = "s"\ntarget = "t"\n'
                f'[walks]\nper_node = 5\nlength = 5\n[train]\ndim = 8\n[store]\npath = "store"\n')
    (tmp_path / "c.toml").write_text(cfg_text)
    graphkit.refresh(load_config(tmp_path / "c.toml"))
    pq.write_table(pa.table({"s": ["a", "b", "c", "d", "x"], "t": ["b", "c", "a", "a", "y"]}), data / "e.parquet")
    code, out, err, _ = cli("foldin", tmp_path / "c.toml")
    assert code == 0, err
    assert "1 provisional vectors (2 new nodes had no known neighbour)" in out
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
    assert [r[0] for r in con.execute(text, {"node_id": "acct-7", "kind": "", "id_kind": ""}).fetchall()][:5] == want
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


def test_feature_export(tmp_path, tmp_path_factory):
    publish(tmp_path, pa.array([10, 20, 30], pa.int64()), np.arange(12).reshape(3, 4))
    exports = tmp_path_factory.mktemp("exports")  # exports go outside the store
    ent = exports / "customers.parquet"
    pq.write_table(pa.table({"customer": ["20", "99", "10", None], "plan": ["a", "b", "c", "d"]}), ent)
    out = exports / "features.parquet"
    code, stdout, err, _ = cli("features", tmp_path, "--entities", ent, "--on", "customer", "--out", out)
    assert code == 0, err
    assert "2 entities have no vector" in stdout
    t = pq.read_table(out)
    assert t.column_names == ["customer", "plan", "emb_000", "emb_001", "emb_002", "emb_003"]
    assert t.column("plan").to_pylist() == ["a", "b", "c", "d"]  # order and rows kept
    assert t.column("emb_000").to_pylist() == [4.0, None, 0.0, None]
    info = export_features(tmp_path, ent, "customer", exports / "f.csv", fmt="csv")
    assert info["without_vector"] == 2
    assert (exports / "f.csv").read_text().splitlines()[0] == "customer,plan,emb_000,emb_001,emb_002,emb_003"
    code, _, err, _ = cli("features", tmp_path, "--entities", ent, "--on", "custmer", "--out", out)
    assert code == 2 and "did you mean 'customer'" in err and len(err.strip().splitlines()) == 1



@pytest.mark.slow
def test_foldin_publishes_the_pseudonyms_ingest_stored(tmp_path, monkeypatch):
    """With hash_ids, fold-in takes the ids a refresh publishes (the pseudonyms in nodes.parquet, one id re-hashed
    to check the key) instead of hashing every id again; a raw id then finds its provisional row through
    `similar`. Pseudonyms: HMAC-SHA256 (RFC 2104) from the standard library's hmac as the reference."""
    import hashlib
    import hmac

    from graphkit import ids as gi
    from graphkit.foldin import fold_in
    from graphkit.store import similar_nodes

    key = "a-secret-key-of-the-team-0003"
    monkeypatch.setenv("GRAPHKIT_ID_SALT", key)
    data = tmp_path / "data"
    data.mkdir()
    pq.write_table(pa.table({"s": ["acct-1", "acct-2", "acct-3"], "t": ["acct-2", "acct-3", "acct-1"]}),
                   data / "e.parquet")
    (tmp_path / "c.toml").write_text('[input]\nedges = "data/e.parquet"\nsource = "s"\ntarget = "t"\n'
                                     'hash_ids = true\n[walks]\nper_node = 5\nlength = 5\n[train]\ndim = 8\n'
                                     '[store]\npath = "store"\n')
    graphkit.refresh(load_config(tmp_path / "c.toml"))
    pq.write_table(pa.table({"s": ["acct-1", "acct-2", "acct-3", "acct-4"],
                             "t": ["acct-2", "acct-3", "acct-1", "acct-1"]}), data / "e.parquet")
    hashed = []
    real = gi.hash_ids
    monkeypatch.setattr(gi, "hash_ids", lambda ids, k: hashed.append(len(ids)) or real(ids, k))
    result = fold_in(load_config(tmp_path / "c.toml"))
    assert result["foldin_nodes"] == 1
    assert max(hashed) == 4 and hashed.count(4) == 1  # ingest hashes the four ids once; later only a key check
    pseudonym = hmac.new(key.encode(), b"acct-4", hashlib.sha256).hexdigest()
    rows = {r["node_id"]: r for r in read_table(tmp_path / "store").to_pylist()}
    assert rows[pseudonym]["provisional"] and "acct-4" not in rows
    assert similar_nodes(tmp_path / "store", "acct-4", 1)[0][0] == hmac.new(key.encode(), b"acct-1",
                                                                            hashlib.sha256).hexdigest()


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


@pytest.mark.slow
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


@pytest.mark.slow
def test_warm_start_counts_and_moves_less(tmp_path, demo_template):
    """Warm start: nodes of the current version start from it, so a second run moves less than a cold one,
    measured as the overlap of each node's 10 nearest neighbours with the current version (rotation and scale
    invariant)."""
    tmp_path = copy_store(demo_template, tmp_path / "store")  # version 1 (the first version is aligned to nothing)
    args = [f'store.path="{tmp_path}"', *FAST_DEMO, "store.align=false"]
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


@pytest.mark.slow
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


def test_report_reads_only_the_projected_rows(tmp_path, monkeypatch):
    """`graphkit report` fetches the seeded subset of rows the projection draws, row group by row group, and
    draws the same 2-D view as a report given the whole version."""
    import re

    from graphkit import report as gr
    from graphkit import store as gs
    from graphkit.cli import main

    monkeypatch.setattr(gr, "MAX_PROJECTED_POINTS", 500)
    rng = np.random.default_rng(2)
    n = 1800
    x = rng.normal(size=(n, 8)).astype(np.float32)
    labels = np.array([f"group-{i % 3}" for i in range(n)], dtype=object)
    version = publish(tmp_path, list(range(n)), x)
    np.savez_compressed(tmp_path / "versions" / f"{version:06d}" / "diagnostics.npz",
                        **gs.diagnostic_arrays(degrees=np.ones(n), labels=labels))
    read_whole = []
    monkeypatch.setattr(gs.catalog, "read_version", lambda *a, **k: read_whole.append(a))
    monkeypatch.setattr(gs.catalog, "read_table", lambda *a, **k: read_whole.append(a))
    assert main(["report", str(tmp_path), "--out", str(tmp_path / "r.html")]) == 0
    assert read_whole == []
    html = (tmp_path / "r.html").read_text()
    assert "Showing 500 of 1,800 vectors" in html
    full = gr.write_report(tmp_path / "full.html", versions=list_versions(tmp_path), degrees=np.ones(n),
                           vectors=x, labels=list(labels), title="t")
    image = re.compile(r'<section id="projection">.*?<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"', re.S)
    drawn = image.findall(html)
    assert len(drawn) == 1
    assert drawn == image.findall(full.read_text())
