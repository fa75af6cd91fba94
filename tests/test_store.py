"""The versioned store: numbered versions, the catalog's views, atomic switch, the writer lock."""

import os

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from graphkit.errors import StoreError
from graphkit.store import CATALOG, connect, list_versions, publish_embeddings, read_version, store_lock


def _publish(store, ids, vecs):
    return publish_embeddings(store, pa.array(ids), vecs, params={"train": {"dim": vecs.shape[1]}},
                              fingerprint=[{"path": "x", "size": 1}], counts={"nodes": len(ids)},
                              timings={"train": 0.5}, metrics={}, objective="negative_sampling")


def _snapshot(folder):
    return {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_publish_versions_and_views(tmp_path):
    rng = np.random.default_rng(0)
    v1 = rng.normal(size=(5, 4)).astype(np.float32)
    assert _publish(tmp_path, ["a", "b", "c", "d", "e"], v1) == 1
    v2 = rng.normal(size=(3, 4)).astype(np.float32)
    assert _publish(tmp_path, ["a", "b", "f"], v2) == 2

    rows = list_versions(tmp_path)
    assert [(r["version"], r["status"], r["is_current"]) for r in rows] == [(1, "complete", False), (2, "complete", True)]
    assert rows[1]["params"] == {"train": {"dim": 4}} and rows[1]["counts"] == {"nodes": 3}
    assert "publish" in rows[1]["timings"]

    ids, vecs = read_version(tmp_path)
    assert ids.to_pylist() == ["a", "b", "f"]
    np.testing.assert_array_equal(vecs, v2)
    ids1, vecs1 = read_version(tmp_path, 1)
    np.testing.assert_array_equal(vecs1, v1)

    # The Parquet table: node_id in the input's type, vector a fixed-size list of float32.
    t = pq.read_table(tmp_path / rows[0]["path"])
    assert t.schema.field("vector").type == pa.list_(pa.float32(), 4)

    con = connect(tmp_path)
    assert con.sql("select count(*) from embeddings").fetchall() == [(3,)]
    assert con.sql("select count(*) from embeddings_v000001").fetchall() == [(5,)]
    # the view restores FLOAT[4] so DuckDB's array functions apply
    sim = con.sql("select array_cosine_similarity(vector, vector) from embeddings where node_id = 'a'").fetchall()
    assert sim[0][0] == pytest.approx(1.0, abs=1e-6)
    con.close()
    con = connect(tmp_path, version=1)
    assert con.sql("select count(*) from embeddings").fetchall() == [(5,)]
    con.close()


def test_integer_ids_keep_their_type(tmp_path):
    _publish(tmp_path, pa.array([10, 20, 30], pa.int64()), np.eye(3, dtype=np.float32))
    con = connect(tmp_path)
    assert con.sql("select typeof(node_id) from embeddings limit 1").fetchall() == [("BIGINT",)]
    con.close()


def test_refused_publish_changes_nothing(tmp_path):
    _publish(tmp_path, ["a", "b"], np.ones((2, 3), np.float32))
    before = _snapshot(tmp_path)
    bad = np.ones((2, 3), np.float32)
    bad[0, 0] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        _publish(tmp_path, ["a", "b"], bad)
    with pytest.raises(ValueError, match="rows"):
        _publish(tmp_path, ["a"], np.ones((2, 3), np.float32))
    assert _snapshot(tmp_path) == before


def test_reader_keeps_its_version_while_a_new_one_is_published(tmp_path):
    _publish(tmp_path, ["a", "b"], np.ones((2, 3), np.float32))
    reader = duckdb.connect(str(tmp_path / CATALOG), read_only=True)
    _publish(tmp_path, ["a", "b", "c"], np.ones((3, 3), np.float32))  # not blocked by the open reader
    assert reader.sql("select count(*) from embeddings").fetchall() == [(2,)]
    reader.close()
    con = connect(tmp_path)
    assert con.sql("select count(*) from embeddings").fetchall() == [(3,)]
    con.close()


def test_missing_store_and_version(tmp_path):
    with pytest.raises(StoreError, match="no embedding store here"):
        connect(tmp_path / "nothing")
    _publish(tmp_path, ["a"], np.ones((1, 2), np.float32))
    with pytest.raises(StoreError, match="no complete version 7"):
        connect(tmp_path, version=7)


def test_lock_refuses_a_second_writer(tmp_path):
    with store_lock(tmp_path):
        pid = os.fork()
        if pid == 0:  # child: a second writer must be refused with the owner's pid
            try:
                with store_lock(tmp_path):
                    os._exit(1)
            except StoreError as exc:
                os._exit(0 if str(os.getppid()) in str(exc) else 3)
        _, status = os.waitpid(pid, 0)
        assert os.WEXITSTATUS(status) == 0
    with store_lock(tmp_path):  # released after use
        pass
