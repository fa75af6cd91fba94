"""`graphkit sql` and `graphkit.connect` cannot change any file, inside the store or outside, nor widen their own
access; queries over the views and macros keep working (issue 13: SQL cannot write)."""

import hashlib
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import graphkit
from graphkit.cli import main
from graphkit.store import publish_embeddings, record_failed_run


def _publish(store, ids, vecs):
    return publish_embeddings(store, pa.array(ids), np.asarray(vecs, np.float32), params={"p": 1}, fingerprint=[],
                              counts={}, timings={}, metrics={})


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A store with two complete versions and a failed run; read-only: every test works on its own copy."""
    root = tmp_path_factory.mktemp("sqlstore")
    rng = np.random.default_rng(1)
    ids = [f"acct-{i}" for i in range(30)]
    _publish(root / "store", ids, rng.normal(size=(30, 4)))
    _publish(root / "store", ids, rng.normal(size=(30, 4)))
    record_failed_run(root / "store", message="failed quality gates: test", params={}, fingerprint=[], counts={},
                      timings={})
    return root / "store"


@pytest.fixture
def store(built, tmp_path):
    """This test's copy of the store, and a folder outside it with a CSV and a Parquet file in it."""
    copy = tmp_path / "store"
    shutil.copytree(built, copy)
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "data.csv").write_text("a,b\n1,2\n")
    pq.write_table(pa.table({"a": [1]}), outside / "data.parquet")
    return copy


def tree_hash(folder) -> dict:
    """Every file and folder under ``folder``: a file by its bytes' SHA-256, a folder by its name."""
    folder = Path(folder)
    return {str(p.relative_to(folder)): (hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir")
            for p in sorted(folder.rglob("*"))}


# {store}: the store; {outside}: a folder next to it. Each statement writes, reads outside, or widens access.
REFUSED = {
    "copy_over_published_parquet": "copy (select * from embeddings) to "
                                   "'{store}/versions/000002/embeddings.parquet' (format parquet)",
    "copy_new_file_in_store": "copy versions to '{store}/versions.csv'",
    "copy_outside": "copy (select 1 as x) to '{outside}/out.csv'",
    "copy_from_outside": "copy versions from '{outside}/data.csv'",
    "export_in_store": "export database '{store}/dump'",
    "export_outside": "export database '{outside}/dump'",
    "attach_new_file": "attach '{store}/new.duckdb' as fresh",
    "attach_new_file_outside": "attach '{outside}/new.duckdb' as fresh",
    "attach_version_read_write": "attach '{store}/versions/000001/embeddings.duckdb' as rw",
    "attach_catalog_read_write": "attach '{store}/catalog.duckdb' as rw (read_write)",
    "create_table": "create table t as select 1 as x",
    "create_table_in_version": "create table v000001.t (x integer)",
    "create_view": "create view v as select 1 as x",
    "replace_view_embeddings": "create or replace view catalog.main.embeddings as select 1 as x",
    "create_macro": "create macro m(x) as x + 1",
    "insert": "insert into versions select * from versions",
    "insert_into_version": "insert into v000001.embeddings select * from v000001.embeddings",
    "update": "update versions set is_current = false",
    "update_version": "update v000002.embeddings set provisional = true",
    "delete": "delete from versions",
    "delete_from_version": "delete from v000002.embeddings",
    "drop_table": "drop table versions",
    "drop_view": "drop view catalog.main.embeddings_v000001",
    "drop_macro": "drop macro table catalog.main.nearest_neighbours",
    "install": "install httpfs",
    "load": "load httpfs",
    "load_file": "load '{outside}/data.csv'",
    "set_external_access": "set enable_external_access = true",
    "set_allowed_directories": "set allowed_directories = ['/']",
    "set_disabled_filesystems": "set disabled_filesystems = ''",
    "set_lock_configuration": "set lock_configuration = false",
    "reset_lock_configuration": "reset lock_configuration",
    "set_temp_directory": "set temp_directory = '{outside}'",
    "pragma_external_access": "pragma enable_external_access = true",
    "pragma_lock_configuration": "pragma lock_configuration = false",
    "read_csv_outside": "select * from read_csv('{outside}/data.csv')",
    "read_parquet_outside": "select * from read_parquet('{outside}/data.parquet')",
    "read_text_system_file": "select * from read_text('/etc/passwd')",
    "glob_outside": "select * from glob('{outside}/*')",
    "second_statement_writes": "select 1; copy (select 1 as x) to '{store}/x.csv'",
}


@pytest.mark.parametrize("case", sorted(REFUSED))
def test_sql_statement_that_writes_or_widens_access_is_refused(store, case, capsys):
    outside = store.parent / "outside"
    query = REFUSED[case].format(store=store, outside=outside)
    before, before_out = tree_hash(store), tree_hash(outside)
    assert main(["sql", str(store), query]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
    assert err.startswith("graphkit: error: query refused: SQL on a store is read-only"), err
    assert tree_hash(store) == before
    assert tree_hash(outside) == before_out


def test_connect_from_python_cannot_write_or_read_files(store):
    outside = store.parent / "outside"
    before, before_out = tree_hash(store), tree_hash(outside)
    con = graphkit.connect(store)
    for case in sorted(REFUSED):
        with pytest.raises(duckdb.Error):
            con.execute(REFUSED[case].format(store=store, outside=outside)).fetchall()
    rel = con.sql("select node_id, vector from embeddings")
    with pytest.raises(duckdb.PermissionException):  # the relation API writes through COPY: refused too
        rel.write_parquet(str(store / "versions" / "000001" / "embeddings.parquet"))
    with pytest.raises(duckdb.PermissionException):
        rel.to_csv(str(outside / "x.csv"))
    with pytest.raises(duckdb.PermissionException):
        con.read_csv(str(outside / "data.csv"))
    # and it still answers after all that
    assert con.sql("select count(*) from embeddings").fetchall() == [(30,)]
    con.close()
    assert tree_hash(store) == before
    assert tree_hash(outside) == before_out


def test_queries_over_views_and_macros_keep_working(store, capsys):
    before = tree_hash(store)
    con = graphkit.connect(store)
    ids, vecs = graphkit.store.read_version(store)
    unit = vecs / np.linalg.norm(vecs, axis=1, keepdims=True)
    want = [ids[int(i)].as_py() for i in np.argsort(-(unit @ unit[3]))[1:4]]  # reference: numpy cosine
    assert [r[0] for r in con.sql("select * from nearest_neighbours('acct-3', 3)").fetchall()] == want
    assert con.sql("select pair_similarity('acct-3', 'acct-4')").fetchall()[0][0] == pytest.approx(
        float(unit[3] @ unit[4]), abs=1e-5)
    assert con.sql("select count(*) from embeddings_v000001").fetchall() == [(30,)]
    assert con.sql("select status, count(*) from versions group by all order by 1").fetchall() == [
        ("complete", 2), ("failed", 1)]
    con.execute("create temp table scratch as select * from embeddings limit 2")  # in memory: no file
    assert con.sql("select count(*) from scratch").fetchall() == [(2,)]
    con.close()
    assert main(["sql", str(store), "select count(*) as n from embeddings_v000002"]) == 0
    assert "30" in capsys.readouterr().out
    assert main(["sql", str(store), "select cosine_similarity(vector, vector) as s from embeddings limit 1"]) == 0
    assert "1.0" in capsys.readouterr().out
    assert main(["sql", str(store), "select * from nearest_neighbours($id, 2)", "--param", "id=acct-3"]) == 0
    assert want[0] in capsys.readouterr().out
    assert tree_hash(store) == before


def test_a_version_without_its_native_copy_is_read_through_arrow(store):
    """Older stores may lack the native DuckDB copy: the view reads the Parquet file without DuckDB's file system."""
    (store / "versions" / "000001" / "embeddings.duckdb").unlink()
    con = graphkit.connect(store)
    want = pq.read_table(store / "versions" / "000001" / "embeddings.parquet").num_rows
    assert con.sql("select count(*), typeof(any_value(vector)) from embeddings_v000001").fetchall() == [
        (want, "FLOAT[4]")]
    con.close()
    con = graphkit.connect(store, version=1)
    assert con.sql("select count(*) from embeddings").fetchall() == [(want,)]
    con.close()


def test_a_store_with_only_failed_runs_says_so(tmp_path, capsys):
    store = tmp_path / "store"
    record_failed_run(store, message="failed quality gates: link AUC", params={}, fingerprint=[], counts={},
                      timings={})
    before = tree_hash(store)
    for argv in (["sql", str(store), "select count(*) from embeddings"], ["similar", str(store), "acct-1"],
                 ["export", str(store), "--out", str(tmp_path / "v.parquet")]):
        assert main(argv) == 2, argv
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1, err
        assert f"{store}: no complete version yet (1 run(s) recorded, none published" in err, err
    assert not (tmp_path / "v.parquet").exists()
    assert main(["versions", str(store), "--json"]) == 0  # the failed run itself stays visible
    assert '"status": "failed"' in capsys.readouterr().out
    assert tree_hash(store) == before
