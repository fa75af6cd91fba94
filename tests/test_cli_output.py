"""Output of the read-side commands: ``sql --format/--out``, ``versions`` at 80 columns, ``similar --kind`` and
raw-id look-ups in a store published with hashed ids. In-process calls on small stores."""

import csv
import io
import json
import re

import numpy as np
import pyarrow as pa
import pytest

from graphkit.cli import main
from graphkit.store import list_versions, publish_embeddings


def _publish(store, ids, vecs, *, kinds=None, metrics=None, timings=None, params=None):
    return publish_embeddings(store, pa.array(ids), np.asarray(vecs, dtype=np.float32), params=params or {},
                              fingerprint=[], counts={"nodes": len(ids)}, timings=timings or {"train": 1.25},
                              metrics=metrics or {}, node_kinds=None if kinds is None else pa.array(kinds))


@pytest.fixture()
def store(tmp_path):
    s = tmp_path / "store"
    _publish(s, ["acct-1", "acct-2", "dev-9"], [[1, 0], [0.9, 0.1], [0, 1]],
             kinds=["account", "account", "device"])
    return s


def test_sql_table_is_plain_and_show_tables_lists_each_view_once(store, capsys):
    assert main(["sql", str(store), "show tables"]) == 0
    names = capsys.readouterr().out.splitlines()[2:-1]
    assert names == ["embeddings", "embeddings_v000001", "versions"]
    assert main(["sql", str(store), "select node_id, node_kind from embeddings order by node_id",
                 "--max-rows", "2"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == ["node_id", "node_kind"] and set(lines[1]) <= {"-", " "}
    assert [ln.split() for ln in lines[2:4]] == [["acct-1", "account"], ["acct-2", "account"]]
    assert "more not shown" in lines[-1] and not any(c in "".join(lines) for c in "│┌─")


def test_sql_csv_and_json_write_every_row(store, capsys):
    query = ("select node_id, vector, date '2026-01-31' as day, 'nan'::double as bad, 0.1234567890123 as x "
             "from embeddings order by node_id")
    assert main(["sql", str(store), query, "--format", "csv", "--max-rows", "1"]) == 0
    rows = list(csv.reader(io.StringIO(capsys.readouterr().out)))
    assert rows[0] == ["node_id", "vector", "day", "bad", "x"] and len(rows) == 4  # --max-rows is table only
    assert json.loads(rows[1][1]) == [1.0, 0.0] and rows[1][2] == "2026-01-31" and rows[1][4] == "0.1234567890123"
    assert main(["sql", str(store), query, "--format", "json", "--max-rows", "1"]) == 0
    objs = json.loads(capsys.readouterr().out)
    assert len(objs) == 3 and objs[0] == {"node_id": "acct-1", "vector": [1.0, 0.0], "day": "2026-01-31",
                                          "bad": None, "x": 0.1234567890123}
    assert main(["sql", str(store), "select 1 as a where false", "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out) == []


def test_sql_out_writes_the_file_and_refuses_the_store_folders(store, tmp_path, capsys):
    out = tmp_path / "res" / "nodes.json"
    assert main(["sql", str(store), "select node_id from embeddings", "--format", "json", "--out", str(out)]) == 0
    assert "wrote 3 rows" in capsys.readouterr().out
    assert len(json.loads(out.read_text())) == 3 and not list(out.parent.glob(".*tmp*"))
    for folder in ("versions", "work", "reports"):
        assert main(["sql", str(store), "select 1", "--out", str(store / folder / "x.csv")]) == 2
        assert "store's own files" in capsys.readouterr().err
    assert not (store / "work" / "x.csv").exists() and not (store / "reports").exists()
    blocker = tmp_path / "afile"
    blocker.write_text("")
    assert main(["sql", str(store), "select 1", "--out", str(blocker / "x.csv")]) == 2
    assert "is a file" in capsys.readouterr().err
    # a failed query leaves an existing output as it was
    out.write_text("before")
    assert main(["sql", str(store), "select * from nowhere", "--out", str(out)]) == 2
    assert out.read_text() == "before"


def test_versions_fit_80_columns_with_numbers_intact(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "80")
    store = tmp_path / "store"
    big = 123_456_789
    _publish(store, ["a", "b"], np.eye(2), metrics={"link_auc_cosine": 0.76634, "micro_f1_at_10": 0.51234},
             timings={"train": 12345.678, "walks": 0.5})
    assert main(["versions", str(store)]) == 0
    text = capsys.readouterr().out
    assert all(len(ln) <= 80 for ln in text.splitlines()), text
    row = list_versions(store)[0]
    total = f"{sum(row['timings'].values()):.1f}"
    data = text.splitlines()[3].split()
    assert data[:3] == ["1", "complete", "C"] and total in data and "0.766" in data and "0.512" in data
    assert re.search(r"\bAUC\b", text) and re.search(r"F1@10", text)
    # a big node count, a failed run with a long message: still 80 columns, nothing cut
    monkeypatch.setattr("graphkit.cli.HEADLINE_METRICS", (("AUC", "link_auc_cosine"), ("F1@10", "micro_f1_at_10")))
    rows = [dict(row, n_nodes=big, dim=512, pinned=True),
            dict(row, version=2, status="failed", is_current=False, pinned=False,
                 message="quality gate: micro_f1_at_10 = 0.4123456789 is below [gates] min_micro_f1 = 0.9 "
                         "and link_auc_cosine = 0.61 is below [gates] min_link_auc = 0.7")]
    from graphkit.cli import compact_versions

    text = compact_versions(rows, tmp_path / ("a-long-folder-name-" * 5) / "store")
    assert all(len(ln) <= 80 for ln in text.splitlines()), text
    tokens = text.split()
    assert str(big) in tokens and "0.4123456789" in tokens and "CP" in tokens
    assert main(["versions", str(store), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)[0]["metrics"]["link_auc_cosine"] == 0.76634


def _kinds_store(tmp_path):
    s = tmp_path / "kinds"
    # "7" is an account and a device; the devices lie closest to account 7
    ids = ["7", "7", "acct-2", "dev-3", "acct-4"]
    kinds = ["account", "device", "account", "device", "account"]
    vecs = [[1, 0, 0], [0.99, 0.1, 0], [0.5, 0.5, 0], [0.95, 0.2, 0], [0, 0, 1]]
    _publish(s, ids, vecs, kinds=kinds)
    return s


def test_similar_kind_filters_the_results_and_id_kind_picks_the_query(tmp_path, capsys):
    s = _kinds_store(tmp_path)
    assert main(["similar", str(s), "7"]) == 2
    assert "--id-kind" in capsys.readouterr().err
    assert main(["similar", str(s), "7", "--id-kind", "account", "--json"]) == 0
    hits = json.loads(capsys.readouterr().out)
    assert [(h["node_id"], h["node_kind"]) for h in hits] == [("7", "device"), ("dev-3", "device"),
                                                             ("acct-2", "account"), ("acct-4", "account")]
    assert main(["similar", str(s), "7", "--id-kind", "account", "--kind", "account", "--json"]) == 0
    hits = json.loads(capsys.readouterr().out)
    assert [h["node_id"] for h in hits] == ["acct-2", "acct-4"]  # the query node itself is never a result
    assert hits[0]["similarity"] == pytest.approx(0.5 / np.sqrt(0.5), abs=1e-5)  # cos([1,0,0],[.5,.5,0])
    assert main(["similar", str(s), "acct-2", "--kind", "device", "--top", "1"]) == 0
    out = capsys.readouterr().out.split()
    assert out[:2] == ["dev-3", "device"]  # acct-2's kind is not a filter on the results
    assert main(["similar", str(s), "acct-2", "--id-kind", "device"]) == 2
    assert "as kind 'device'" in capsys.readouterr().err


def test_raw_id_lookup_in_a_hashed_store(tmp_path, capsys, monkeypatch):
    import hashlib
    import hmac

    key = "a-salt-of-twenty-chars"

    def pseudonym(raw):  # the standard library's HMAC-SHA256, independent of graphkit.ids
        return hmac.new(key.encode(), raw.encode(), hashlib.sha256).hexdigest()

    s = tmp_path / "hashed"
    raw = ["acct-1", "acct-2", "acct-3"]
    _publish(s, [pseudonym(r) for r in raw], [[1, 0], [0.8, 0.6], [0, 1]],
             params={"input": {"hash_salt_env": "SHOP_ID_KEY"}, "lineage": {"hashed_ids": True}})
    monkeypatch.delenv("SHOP_ID_KEY", raising=False)
    monkeypatch.delenv("GRAPHKIT_ID_SALT", raising=False)
    assert main(["similar", str(s), "acct-1"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "hashed ids" in err and "SHOP_ID_KEY" in err
    monkeypatch.setenv("SHOP_ID_KEY", key)
    assert main(["similar", str(s), "acct-1", "--json"]) == 0
    hits = json.loads(capsys.readouterr().out)
    assert [h["node_id"] for h in hits] == [pseudonym("acct-2"), pseudonym("acct-3")]  # pseudonyms printed
    assert hits[0]["similarity"] == pytest.approx(0.8, abs=1e-6)
    # a pseudonym from the results can be looked up as is, without the key
    monkeypatch.delenv("SHOP_ID_KEY")
    assert main(["similar", str(s), pseudonym("acct-3"), "--top", "1"]) == 0
    assert capsys.readouterr().out.split()[0] == pseudonym("acct-2")
    # --salt-env names another variable; a wrong key finds nothing (exit 2, one line)
    monkeypatch.setenv("OTHER_KEY", key)
    assert main(["similar", str(s), "acct-1", "--salt-env", "OTHER_KEY", "--top", "1"]) == 0
    assert capsys.readouterr().out.split()[0] == pseudonym("acct-2")
    monkeypatch.setenv("OTHER_KEY", "not-the-right-key-at-all")
    assert main(["similar", str(s), "acct-1", "--salt-env", "OTHER_KEY"]) == 2
    assert "'acct-1' is not in" in capsys.readouterr().err
    # without hashed ids in the lineage, a raw id is never hashed
    plain = tmp_path / "plain"
    _publish(plain, [pseudonym(r) for r in raw], np.eye(3))
    monkeypatch.setenv("GRAPHKIT_ID_SALT", key)
    assert main(["similar", str(plain), "acct-1"]) == 2
