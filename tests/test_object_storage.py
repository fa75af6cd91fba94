"""Edge and label tables on object storage (issue 19, item 2), against an S3-compatible server started here.

The server is moto's standalone server (``moto.server.ThreadedMotoServer``) on 127.0.0.1 and a free port, with
its IAM checks switched on once the fixture has made a user (``POST /moto-api/reset-auth``, moto's documented
server-mode switch), so that an unknown key or a wrong secret is refused as a real store refuses it. graphkit
reaches it as any S3-compatible server: ``AWS_ENDPOINT_URL`` and the usual ``AWS_*`` credentials, nothing in the
TOML.

References: the same bytes read from the local disk give the same graph (ingest's local path, which
tests/test_inputs.py checks against networkx); networkx's Graph built from the rows as written; the S3 ETag of a
single-part upload is the MD5 of its bytes (Amazon S3 documentation, "Checking object integrity"; from memory),
checked against hashlib.
"""

from __future__ import annotations

import gzip
import hashlib
import io
import json
import logging
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

moto_server = pytest.importorskip("moto.server")
boto3 = pytest.importorskip("boto3")

import graphkit.cli as cli  # noqa: E402
from graphkit import discover as gd  # noqa: E402
from graphkit import storage  # noqa: E402
from graphkit.config import load_config  # noqa: E402
from graphkit.errors import EdgeTableError  # noqa: E402
from graphkit.graph import AdjacencyArrays  # noqa: E402
from graphkit.ingest import EdgeTable, ingest_tables  # noqa: E402
from graphkit.io import fingerprint_files  # noqa: E402
from graphkit.pipeline import plan_run, refresh, stage_ingest  # noqa: E402
from graphkit.store import list_versions  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_parquet"
BUCKET = "night-lake"
#: A fictional week of card payments: (customer, merchant, amount), by day.
PAYMENTS = {"2026-11-28": [("cus-01", "shop-a", 12.5), ("cus-02", "shop-a", 3.0)],
            "2026-11-29": [("cus-01", "shop-b", 7.25), ("cus-03", "shop-c", 40.0)],
            "2026-11-30": [("cus-02", "shop-b", 1.5), ("cus-01", "shop-a", 2.5)]}


class S3:
    """The running server: its endpoint, the reader's credentials and a client holding them."""

    def __init__(self, endpoint: str, key_id: str, secret: str):
        self.endpoint, self.key_id, self.secret = endpoint, key_id, secret
        self.client = boto3.client("s3", endpoint_url=endpoint, region_name="us-east-1", aws_access_key_id=key_id,
                                   aws_secret_access_key=secret)

    def put(self, key: str, body: bytes, bucket: str = BUCKET) -> None:
        self.client.put_object(Bucket=bucket, Key=key, Body=body)

    def put_table(self, key: str, table: pa.Table) -> None:
        buf = io.BytesIO()
        pq.write_table(table, buf)
        self.put(key, buf.getvalue())

    def etag(self, key: str) -> str:
        return self.client.head_object(Bucket=BUCKET, Key=key)["ETag"].strip('"')


@pytest.fixture(scope="module")
def s3(tmp_path_factory):
    """moto's server on 127.0.0.1 (a free port), a bucket with the demo tables, an IAM user whose key is the
    environment's, and IAM checks on from then on. Nothing of the developer's own AWS setup is read."""
    logging.getLogger("werkzeug").setLevel(logging.ERROR)  # the server's request log would land in stderr
    server = moto_server.ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    endpoint = f"http://{host}:{port}"
    home = tmp_path_factory.mktemp("aws-home")
    with pytest.MonkeyPatch.context() as mp:
        for name in [k for k in os.environ if k.startswith("AWS_")]:
            mp.delenv(name)
        mp.setenv("AWS_CONFIG_FILE", str(home / "config"))  # absent files: no profile of the machine is used
        mp.setenv("AWS_SHARED_CREDENTIALS_FILE", str(home / "credentials"))
        mp.setenv("AWS_EC2_METADATA_DISABLED", "true")
        mp.setenv("AWS_DEFAULT_REGION", "us-east-1")
        mp.setenv("AWS_ENDPOINT_URL", endpoint)
        iam = boto3.client("iam", endpoint_url=endpoint, region_name="us-east-1", aws_access_key_id="setup",
                           aws_secret_access_key="setup")
        iam.create_user(UserName="nightly-reader")
        iam.put_user_policy(UserName="nightly-reader", PolicyName="lake", PolicyDocument=json.dumps(
            {"Version": "2012-10-17", "Statement": [{"Effect": "Allow", "Action": "s3:*", "Resource": "*"}]}))
        key = iam.create_access_key(UserName="nightly-reader")["AccessKey"]
        import requests

        assert requests.post(f"{endpoint}/moto-api/reset-auth", data=b"0", timeout=10).ok  # IAM checks on
        mp.setenv("AWS_ACCESS_KEY_ID", key["AccessKeyId"])
        mp.setenv("AWS_SECRET_ACCESS_KEY", key["SecretAccessKey"])
        s3 = S3(endpoint, key["AccessKeyId"], key["SecretAccessKey"])
        s3.client.create_bucket(Bucket=BUCKET)
        s3.put("demo/transfers.parquet", (DEMO / "transfers.parquet").read_bytes())
        s3.put("demo/labels/part-0.parquet", (DEMO / "labels.parquet").read_bytes())
        s3.put("demo/labels/_SUCCESS", b"")
        s3.put("empty/_SUCCESS", b"")
        s3.put("empty/.part-0.parquet.crc", b"\x00")
        yield s3
    server.stop()


def _config(folder: Path, edges: str, *, store: Path, labels: str | None = None, extra: str = "") -> Path:
    """A small refresh config (short walks, small vectors) reading ``edges`` (and ``labels``)."""
    folder.mkdir(parents=True, exist_ok=True)
    evaluate = (f'[evaluate]\nlabels = "{labels}"\nlabel_id_column = "account"\nlink_holdout = 0\nratios = [0.1, 0.5]\n'
                'repeats = 1\n' if labels else "[evaluate]\nlink_holdout = 0\n")
    path = folder / "c.toml"
    path.write_text(f'[input]\nedges = "{edges}"\nsource = "sender"\ntarget = "receiver"\nweight = "amount"\n'
                    f'drop_null_ids = true\n{extra}\n[walks]\nper_node = 2\nlength = 20\nseed = 7\n'
                    f'[train]\ndim = 16\n[store]\npath = "{store}"\n{evaluate}')
    return path


@pytest.fixture(scope="module")
def s3_store(s3, tmp_path_factory):
    """A store with one version refreshed from s3:// edges and labels (read-only: tests copy it)."""
    folder = tmp_path_factory.mktemp("s3-refresh")
    config = _config(folder, f"s3://{BUCKET}/demo/transfers.parquet", store=folder / "store",
                     labels=f"s3://{BUCKET}/demo/labels/")
    assert refresh(load_config(config)) == 1
    return folder / "store"


def test_a_refresh_from_s3_publishes_the_graph_the_local_files_give(s3, s3_store, tmp_path):
    [row] = list_versions(s3_store)
    assert row["status"] == "complete"
    [fp] = row["input_fingerprint"]
    assert fp["path"] == f"s3://{BUCKET}/demo/transfers.parquet" and fp["hashed"] == "metadata"
    # the ETag of a single-part upload is the MD5 of its bytes (S3 documentation): the metadata is the store's
    assert fp["etag"] == hashlib.md5((DEMO / "transfers.parquet").read_bytes()).hexdigest() == \
        s3.etag("demo/transfers.parquet")
    assert fp["size"] == (DEMO / "transfers.parquet").stat().st_size
    assert row["params"]["input"]["tables"][0]["path"] == f"s3://{BUCKET}/demo/transfers.parquet"
    assert row["params"]["evaluate"]["labels"] == f"s3://{BUCKET}/demo/labels/"
    # the labels were read from the store: node classification ran on them
    nc = row["metrics"]["node_classification"]
    assert nc["n_labelled"] > 100 and "micro_f1_at_10" in row["metrics"]
    # reference: the same file read from the local disk gives the same graph, node for node
    remote = ingest_tables([EdgeTable(f"s3://{BUCKET}/demo/transfers.parquet", "sender", "receiver", "amount")],
                           tmp_path / "remote", drop_null_ids=True)
    local = ingest_tables([EdgeTable(str(DEMO / "transfers.parquet"), "sender", "receiver", "amount")],
                          tmp_path / "local", drop_null_ids=True)
    assert remote["counts"] == local["counts"] == {k: row["counts"][k] for k in local["counts"]}
    a, b = AdjacencyArrays.load(tmp_path / "remote" / "graph"), AdjacencyArrays.load(tmp_path / "local" / "graph")
    assert np.array_equal(a.indptr, b.indptr) and np.array_equal(a.indices, b.indices)
    assert np.array_equal(a.weights, b.weights)
    assert pq.read_table(tmp_path / "remote" / "nodes.parquet").equals(pq.read_table(tmp_path / "local" /
                                                                                      "nodes.parquet"))
    # no secret anywhere in the catalog row
    assert s3.secret not in json.dumps(row, default=str)


def _csv(rows) -> bytes:
    return ("customer,merchant,amount\n" + "".join(f"{s},{t},{w!r}\n" for s, t, w in rows)).encode()


def test_a_csv_prefix_with_hive_partitions_reads_like_a_local_folder(s3, tmp_path):
    """Typed ``day=`` partitions as the time column, compressed CSV, writers' ``_``/``.`` objects skipped."""
    prefix = "payments"
    for i, (day, rows) in enumerate(PAYMENTS.items()):
        body = _csv(rows)
        s3.put(f"{prefix}/day={day}/part-0.csv" + (".gz" if i == 1 else ""), gzip.compress(body) if i == 1 else body)
    s3.put(f"{prefix}/_SUCCESS", b"")
    s3.put(f"{prefix}/day=2026-11-30/.part-0.csv.crc", b"\x00\x01 not text")
    s3.put(f"{prefix}/_temporary/part-9.csv", b"customer,merchant,amount\nghost,shop-z,1.0\n")
    found = gd.discover(f"s3://{BUCKET}/{prefix}/")
    assert [str(f) for f in found.files] == [f"s3://{BUCKET}/{prefix}/day=2026-11-28/part-0.csv",
                                             f"s3://{BUCKET}/{prefix}/day=2026-11-29/part-0.csv.gz",
                                             f"s3://{BUCKET}/{prefix}/day=2026-11-30/part-0.csv"]
    assert found.partitions == {"day": pa.date32()} and found.format == "csv"
    from datetime import datetime, timezone

    until = datetime(2026, 11, 30, tzinfo=timezone.utc)  # the last day is left out by the window
    info = ingest_tables([EdgeTable(f"s3://{BUCKET}/{prefix}/", "customer", "merchant", "amount", timestamp="day")],
                         tmp_path / "out", window={"until": until, "as_of": until})
    assert info["counts"]["rows"] == 6 and info["counts"]["outside_window"] == 2
    ref = nx.Graph()  # reference: networkx from the rows inside the window, repeated rows summed
    for day, rows in PAYMENTS.items():
        if day < "2026-11-30":
            for s, t, w in rows:
                ref.add_edge(s, t, weight=ref.get_edge_data(s, t, {"weight": 0.0})["weight"] + w)
    g = AdjacencyArrays.load(tmp_path / "out" / "graph")
    nodes = pq.read_table(tmp_path / "out" / "nodes.parquet").column("node_id").to_pylist()
    got = {frozenset((nodes[v], nodes[g.indices[k]])): float(g.weights[k])
           for v in range(g.n_nodes) for k in range(g.indptr[v], g.indptr[v + 1])}
    assert got == pytest.approx({frozenset((s, t)): d["weight"] for s, t, d in ref.edges(data=True)})
    # the whole refresh over the prefix publishes that graph
    config = tmp_path / "c.toml"
    config.write_text(f'[input]\nedges = "s3://{BUCKET}/{prefix}/"\nsource = "customer"\ntarget = "merchant"\n'
                      'weight = "amount"\ntimestamp = "day"\nuntil = 2026-11-30\n[walks]\nper_node = 2\n'
                      'length = 10\n[train]\ndim = 8\n[evaluate]\nlink_holdout = 0\n[store]\npath = "store"\n')
    assert refresh(load_config(config)) == 1
    [row] = list_versions(tmp_path / "store")
    assert {k: row["counts"][k] for k in ("rows", "outside_window", "edges", "nodes")} == \
        {"rows": 6, "outside_window": 2, "edges": ref.number_of_edges(), "nodes": ref.number_of_nodes()}
    assert [fp["path"] for fp in row["input_fingerprint"]] == [str(f) for f in found.files]
    # a glob over the same prefix picks the same objects; a glob matching none names the URL
    assert gd.list_edge_files(f"s3://{BUCKET}/{prefix}/**/*.csv*")[0] == found.files
    with pytest.raises(EdgeTableError, match=rf"s3://{BUCKET}/{prefix}/\*\*/\*\.tsv: no objects match"):
        gd.list_edge_files(f"s3://{BUCKET}/{prefix}/**/*.tsv")


def test_fingerprints_come_from_metadata_and_decide_the_reingest(s3, tmp_path, monkeypatch):
    """A second run over unchanged objects resumes the ingest folder; an object rewritten with other bytes of the
    same size (new ETag and time) is a new ingest. The fingerprint downloads nothing."""
    rows = [("cus-01", "shop-a", 1.0), ("cus-02", "shop-b", 2.0)]
    s3.put("nightly/edges/part-0.csv", _csv(rows))
    s3.put("nightly/edges/part-1.csv", _csv([("cus-03", "shop-a", 3.0)]))
    config = tmp_path / "c.toml"
    config.write_text(f'[input]\nedges = "s3://{BUCKET}/nightly/edges/"\nsource = "customer"\ntarget = "merchant"\n'
                      f'weight = "amount"\n[store]\npath = "store"\n')
    cfg = load_config(config)
    first = plan_run(cfg)
    result = stage_ingest(cfg, first)
    assert not result.get("skipped") and result["counts"]["edges"] == 3

    opened = []
    real_open = storage.ObjectFiles.fs.fget

    class Spy:  # every file opened through fsspec is recorded: a fingerprint must open none
        def __init__(self, fs):
            self._fs = fs

        def open(self, *a, **k):
            opened.append(a[0])
            return self._fs.open(*a, **k)

        def __getattr__(self, name):
            return getattr(self._fs, name)

    monkeypatch.setattr(storage.ObjectFiles, "fs", property(lambda self: Spy(real_open(self))))
    files = [storage.location(f"s3://{BUCKET}/nightly/edges/part-{i}.csv") for i in (0, 1)]
    prints = fingerprint_files(files)
    assert opened == []
    assert [p["etag"] for p in prints] == [hashlib.md5(_csv(rows)).hexdigest(),
                                           hashlib.md5(_csv([("cus-03", "shop-a", 3.0)])).hexdigest()]
    monkeypatch.undo()

    again = plan_run(cfg)
    assert again["ingest_dir"] == first["ingest_dir"]
    assert stage_ingest(cfg, again).get("skipped") is True

    time.sleep(1.1)  # S3 times are to the second: the rewrite gets another one (the ETag differs regardless)
    changed = _csv([("cus-01", "shop-a", 1.0), ("cus-02", "shop-c", 2.0)])
    assert len(changed) == len(_csv(rows))
    s3.put("nightly/edges/part-0.csv", changed)
    later = plan_run(cfg)
    assert later["ingest_dir"] != first["ingest_dir"]
    assert later["fingerprint"][0]["etag"] == hashlib.md5(changed).hexdigest()
    assert stage_ingest(cfg, later).get("skipped") is not True


def test_one_graph_from_a_local_table_and_a_table_on_s3(s3, tmp_path):
    """``[[input.tables]]`` mixes a local file and an object: node kinds kept apart, each table's own CSV options."""
    (tmp_path / "logins.tsv").write_text("account\tdevice\ncus-01\tdev-1\ncus-02\tdev-1\n")
    s3.put("mixed/payments.csv", b"cus-01;shop-a;2.0\ncus-03;shop-a;1.0\n")
    config = tmp_path / "c.toml"
    config.write_text(
        '[[input.tables]]\npath = "logins.tsv"\nsource = "account"\ntarget = "device"\nsource_kind = "account"\n'
        'target_kind = "device"\n\n'
        f'[[input.tables]]\npath = "s3://{BUCKET}/mixed/payments.csv"\nsource = "column_1"\ntarget = "column_2"\n'
        'weight = "column_3"\nsource_kind = "account"\ntarget_kind = "merchant"\ncsv_header = false\n'
        'csv_delimiter = ";"\n\n[store]\npath = "store"\n')
    cfg = load_config(config)
    assert [t.path for t in cfg.tables()] == [str(tmp_path / "logins.tsv"), f"s3://{BUCKET}/mixed/payments.csv"]
    plan = plan_run(cfg)
    assert [fp["hashed"] for fp in plan["fingerprint"]] == ["full", "metadata"]
    result = stage_ingest(cfg, plan)
    assert result["counts"]["nodes_by_kind"] == {"account": 3, "device": 1, "merchant": 1}
    assert result["counts"]["edges"] == 4


# ------------------------------------------------------------------------------------------------- bad input

def _digest_tree(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): ("dir" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest())
            for p in sorted(folder.rglob("*")) if p.name != ".lock"}


@pytest.fixture
def store(s3_store, tmp_path):
    return Path(shutil.copytree(s3_store, tmp_path / "store"))


@pytest.fixture
def no_prefect(monkeypatch):
    def reached(*_a, **_k):
        raise RuntimeError("preflight let a bad input through to the Prefect flow")

    monkeypatch.setattr(cli, "_prefect_env", reached)


def _closed_port() -> int:
    """A port on 127.0.0.1 that nothing listens on (bound, then released)."""
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _missing_package() -> str | None:
    """A protocol fsspec knows whose package is not installed here (gs:// or az://), or None."""
    import importlib.util

    for protocol, package in (("gs", "gcsfs"), ("az", "adlfs")):
        if importlib.util.find_spec(package) is None:
            return f"{protocol}:{package}"
    return None


#: case -> (edges URL, labels URL or None, environment changes, the message)
BAD = {
    "missing_bucket": ("s3://no-such-lake/edges/", None, {}, r"s3://no-such-lake/edges: bucket 'no-such-lake' not "
                                                             r"found"),
    "missing_object": (f"s3://{BUCKET}/demo/transfer.parquet", None, {},
                       rf"s3://{BUCKET}/demo/transfer\.parquet: not found \(no object of this name and no objects "
                       r"under it as a prefix\)"),
    "prefix_without_data": (f"s3://{BUCKET}/empty/", None, {},
                            rf"s3://{BUCKET}/empty/: prefix holds no edge files \(objects and folders starting "
                            r"with \. or _ are skipped\)"),
    "missing_labels": (f"s3://{BUCKET}/demo/transfers.parquet", f"s3://{BUCKET}/demo/label/", {},
                       rf"s3://{BUCKET}/demo/label: not found"),
    "unknown_key": (f"s3://{BUCKET}/demo/transfers.parquet", None, {"AWS_ACCESS_KEY_ID": "AKIAUNKNOWNREADER000"},
                    rf"s3://{BUCKET}/demo/transfers\.parquet: access refused by the store \(.*; graphkit uses the "
                    r"credentials of the environment: AWS_ACCESS_KEY_ID"),
    "wrong_secret": (f"s3://{BUCKET}/demo/", None, {"AWS_SECRET_ACCESS_KEY": "not-the-reader-secret-0123456789"},
                     rf"s3://{BUCKET}/demo: access refused by the store \(.*SignatureDoesNotMatch"),
    "no_credentials": (f"s3://{BUCKET}/demo/", None, {"AWS_ACCESS_KEY_ID": None, "AWS_SECRET_ACCESS_KEY": None},
                       rf"s3://{BUCKET}/demo: no credentials found \(.*\); graphkit uses the credentials of the "
                       r"environment"),
    "unreachable_endpoint": (f"s3://{BUCKET}/demo/transfers.parquet", None,
                             {"AWS_ENDPOINT_URL": "closed-port", "AWS_MAX_ATTEMPTS": "1"},
                             rf"s3://{BUCKET}/demo/transfers\.parquet: cannot read from the object store \(Could not "
                             r"connect to the endpoint URL: .*\); an S3-compatible server is named by AWS_ENDPOINT_URL"),
    "unknown_protocol": ("nosuch://lake/edges/", None, {}, r"nosuch://lake/edges: unknown storage protocol "
                                                           r"'nosuch'"),
    "credentials_in_url": ("s3://AKIAREADER:hunter2-hunter2@lake/edges/", None, {},
                           r"s3://\*\*\*@lake/edges/: credentials in a URL are refused"),
}


@pytest.mark.parametrize("case", sorted(BAD) + ["missing_package"])
def test_bad_object_storage_input_exits_2_with_one_line_naming_the_url(s3, store, tmp_path, capsys, monkeypatch,
                                                                       no_prefect, case):
    if case == "missing_package":
        found = _missing_package()
        if found is None:
            pytest.skip("gcsfs and adlfs are both installed")
        protocol, package = found.split(":")
        edges, labels, env = f"{protocol}://lake/edges/", None, {}
        match = rf"{protocol}://lake/edges: reading {protocol}:// URLs needs the Python package {package}: pip install"
    else:
        edges, labels, env, match = BAD[case]
    for name, value in env.items():
        if value is None:
            monkeypatch.delenv(name)
        elif value == "closed-port":
            monkeypatch.setenv(name, f"http://127.0.0.1:{_closed_port()}")
        else:
            monkeypatch.setenv(name, value)
    config = _config(tmp_path / "cfg", edges, store=store, labels=labels)
    before = _digest_tree(store)
    t0 = time.monotonic()
    code = cli.main(["refresh", str(config)])
    seconds = time.monotonic() - t0
    out, err = capsys.readouterr()
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
    assert re.search(match, err), err
    assert s3.secret not in err + out and "hunter2" not in err + out
    assert seconds < 10
    assert _digest_tree(store) == before


def test_a_refused_run_prints_one_line_and_nothing_at_exit(s3, store, tmp_path):
    """The command as a user runs it (a subprocess): refused credentials give exit 2 and one line, and nothing
    the object-store libraries might print while the interpreter shuts down."""
    config = _config(tmp_path / "cfg", f"s3://{BUCKET}/demo/transfers.parquet", store=store)
    before = _digest_tree(store)
    env = {**os.environ, "AWS_SECRET_ACCESS_KEY": "not-the-reader-secret-0123456789", "PYTHONUNBUFFERED": "1"}
    run = subprocess.run([sys.executable, "-m", "graphkit.cli", "refresh", str(config)], capture_output=True,
                         text=True, timeout=120, env=env, cwd=ROOT)
    assert run.returncode == 2, run.stderr
    assert len(run.stderr.strip().splitlines()) == 1, run.stderr
    assert f"s3://{BUCKET}/demo/transfers.parquet: access refused by the store" in run.stderr
    assert "not-the-reader-secret" not in run.stderr + run.stdout
    assert _digest_tree(store) == before


def test_secrets_are_blanked_out_of_messages(monkeypatch):
    monkeypatch.setenv("AZURE_STORAGE_ACCOUNT_KEY", "c2VjcmV0LWtleS12YWx1ZQ==")
    monkeypatch.setenv("AWS_SESSION_TOKEN", "session-token-value-123")
    monkeypatch.setenv("GRAPHKIT_ID_SALT", "pseudonym-key-0042")
    monkeypatch.setenv("AWS_REGION", "eu-central-1")  # not a secret: kept
    text = "denied for c2VjcmV0LWtleS12YWx1ZQ== with session-token-value-123 in eu-central-1 (pseudonym-key-0042)"
    assert storage.redact(text) == "denied for *** with *** in eu-central-1 (***)"


def test_urls_keep_their_form_and_local_paths_stay_paths(tmp_path):
    p = storage.location("s3://lake/edges/day=2026-11-30/part-0.parquet")
    assert str(p) == "s3://lake/edges/day=2026-11-30/part-0.parquet" and p.name == "part-0.parquet"
    assert str(p.parent) == "s3://lake/edges/day=2026-11-30" and p.key == "lake/edges/day=2026-11-30/part-0.parquet"
    assert p != storage.location("gs://lake/edges/day=2026-11-30/part-0.parquet")
    import pickle

    assert pickle.loads(pickle.dumps(p)) == p
    with pytest.raises(TypeError, match="not a local path"):
        open(p)  # noqa: SIM115 - an object URL must never be opened as a local file
    assert storage.location(f"file://{tmp_path}/e.csv") == tmp_path / "e.csv"
    assert isinstance(storage.location("edges/e.csv"), Path)
    # the config keeps a URL as written and refuses one for the store
    (tmp_path / "c.toml").write_text('[input]\nedges = "s3://lake/edges/"\nsource = "s"\ntarget = "t"\n'
                                     '[store]\npath = "store"\n[evaluate]\nlabels = "gs://lake/labels.parquet"\n')
    cfg = load_config(tmp_path / "c.toml")
    assert cfg.edges_path == "s3://lake/edges/" and cfg.labels_path == "gs://lake/labels.parquet"
    from graphkit.errors import ConfigError

    with pytest.raises(ConfigError, match=r"\[store\] path: the store is a local folder"):
        load_config(tmp_path / "c.toml", ['store.path="s3://lake/store"'])
