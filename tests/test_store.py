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


# --- one nearest-neighbour query behind `graphkit similar`, the macro and the example ---------------------------

def _neighbour_store(tmp_path):
    """A store of accounts, devices and merchants: "m-9" is a merchant and an account; "dev-5" and "dev-1" have the
    same vector (a tie for every query); the other vectors are spread far enough apart that float32 rounding
    cannot reorder them."""
    rng = np.random.default_rng(11)
    ids = ["acct-3", "m-9", "m-9", "dev-5", "dev-1", "acct-1", "acct-8", "merch-2", "merch-7", "dev-4", "acct-6",
           "merch-3", "dev-2", "acct-5"]
    kinds = ["account", "merchant", "account", "device", "device", "account", "account", "merchant", "merchant",
             "device", "account", "merchant", "device", "account"]
    vecs = rng.normal(size=(len(ids), 6)).astype(np.float32)
    vecs[4] = vecs[3]  # dev-1 == dev-5: an exact tie, broken by node_id
    publish_embeddings(tmp_path, pa.array(ids), vecs, node_kinds=pa.array(kinds), params={}, fingerprint=[],
                       counts={}, timings={})
    return ids, kinds, vecs


def _reference(ids, kinds, vecs, query, query_kind, k, kind=None):
    """Brute-force cosine similarity in numpy (the textbook definition u.v / (|u| |v|)), sorted in Python by
    similarity descending, then node id, then kind; the query node left out."""
    unit = vecs.astype(np.float64) / np.linalg.norm(vecs.astype(np.float64), axis=1, keepdims=True)
    q = unit[[i for i in range(len(ids)) if (ids[i], kinds[i]) == (query, query_kind)][0]]
    rows = [(ids[i], kinds[i], float(unit[i] @ q)) for i in range(len(ids))
            if (ids[i], kinds[i]) != (query, query_kind) and (kind is None or kinds[i] == kind)]
    return sorted(rows, key=lambda r: (-r[2], r[0], r[1]))[:k]


@pytest.mark.parametrize("query, id_kind, kind", [("acct-3", None, None), ("acct-3", None, "device"),
                                                  ("m-9", "merchant", None), ("m-9", "account", "merchant"),
                                                  ("dev-2", None, "device")])
def test_similar_macro_and_example_give_one_answer(tmp_path, capsys, query, id_kind, kind):
    import json
    from pathlib import Path

    from graphkit.cli import main
    from graphkit.sql import SQL_DIR

    ids, kinds, vecs = _neighbour_store(tmp_path)
    query_kind = id_kind or kinds[ids.index(query)]
    want = _reference(ids, kinds, vecs, query, query_kind, 10, kind)
    argv = ["similar", str(tmp_path), query, "--top", "10", "--json"] + (["--id-kind", id_kind] if id_kind else []) \
        + (["--kind", kind] if kind else [])
    assert main(argv) == 0
    cli = [(h["node_id"], h["node_kind"], h["similarity"]) for h in json.loads(capsys.readouterr().out)]
    con = connect(tmp_path)
    try:
        macro = con.execute("select * from nearest_neighbours($q, 10, kind := $kind, id_kind := $id_kind)",
                            {"q": query, "kind": kind, "id_kind": id_kind}).fetchall()
        example = con.execute((Path(SQL_DIR) / "examples" / "nearest_neighbours.sql").read_text(),
                              {"node_id": query, "kind": kind or "", "id_kind": id_kind or ""}).fetchall()
    finally:
        con.close()
    for got in (cli, macro, example):
        assert [(n, k) for n, k, _ in got] == [(n, k) for n, k, _ in want]
        np.testing.assert_allclose([s for *_, s in got], [s for *_, s in want], atol=1e-5)
    if kind in (None, "device"):  # the tie: same similarity, dev-1 before dev-5
        names = [n for n, _, _ in macro]
        assert names.index("dev-1") + 1 == names.index("dev-5")
        assert macro[names.index("dev-1")][2] == macro[names.index("dev-5")][2]


def test_similar_macro_and_example_refuse_an_id_of_several_kinds(tmp_path, capsys):
    from pathlib import Path

    from graphkit.cli import main
    from graphkit.sql import SQL_DIR

    _neighbour_store(tmp_path)
    assert main(["similar", str(tmp_path), "m-9"]) == 2
    assert "exists as kinds account, merchant; pass --id-kind" in capsys.readouterr().err
    con = connect(tmp_path)
    try:
        with pytest.raises(duckdb.InvalidInputException, match="several kinds; pass id_kind"):
            con.execute("select * from nearest_neighbours('m-9', 3)").fetchall()
        with pytest.raises(duckdb.InvalidInputException, match="several kinds; pass id_kind"):
            con.execute((Path(SQL_DIR) / "examples" / "nearest_neighbours.sql").read_text(),
                        {"node_id": "m-9", "kind": "", "id_kind": ""}).fetchall()
    finally:
        con.close()


def test_views_of_a_store_whose_path_needs_quoting(tmp_path):
    """The catalog's views, written in with graphkit.sql.inline, read a store under a path with a quote and a
    space, both through connect and opening the catalog with plain DuckDB."""
    from graphkit.sql import Identifier, inline

    store = tmp_path / "team's store"
    vecs = np.eye(3, dtype=np.float32)
    _publish(store, ["a", "b", "c"], vecs)
    con = connect(store)
    try:
        assert con.sql("select count(*) from embeddings").fetchall() == [(3,)]
    finally:
        con.close()
    raw = duckdb.connect(str(store / CATALOG), read_only=True)
    try:
        assert sorted(r[0] for r in raw.sql("select node_id from embeddings_v000001").fetchall()) == ["a", "b", "c"]
    finally:
        raw.close()
    got = inline("select $a, $n from $t", {"a": "it's", "n": 3, "t": Identifier('s."x"')})
    assert got == 'select \'it\'\'s\', 3 from "s"."""x"""'
    with pytest.raises(TypeError, match=r"\$f: cannot write float"):
        inline("select $f", {"f": 1.5})
