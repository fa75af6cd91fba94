"""The TOML config: strict keys and types, paths relative to the file, --set overrides."""

from pathlib import Path

import pytest

from graphkit.config import load_config
from graphkit.errors import ConfigError

BASE = """
[input]
edges = "data/edges.parquet"
source = "sender"
target = "receiver"

[store]
path = "store"
"""


def _write(tmp_path, text):
    p = tmp_path / "c.toml"
    p.write_text(text)
    return p


def test_defaults_and_relative_paths(tmp_path):
    cfg = load_config(_write(tmp_path, BASE))
    assert cfg.edges_path == str(tmp_path.resolve() / "data" / "edges.parquet")
    assert cfg.store_path == tmp_path.resolve() / "store"
    assert (cfg.walks.per_node, cfg.walks.length, cfg.train.dim, cfg.train.window) == (10, 40, 128, 5)
    assert cfg.train.objective == "negative_sampling" and cfg.input.directed is False and cfg.dask.address is None


def test_overrides(tmp_path):
    cfg = load_config(_write(tmp_path, BASE), ["train.dim=32", "train.objective=hierarchical_softmax",
                                               "input.directed=true", 'dask.address="tcp://127.0.0.1:8786"'])
    assert cfg.train.dim == 32 and cfg.train.objective == "hierarchical_softmax"
    assert cfg.input.directed is True and cfg.dask.address == "tcp://127.0.0.1:8786"


@pytest.mark.parametrize("extra, overrides, match", [
    ("[train]\ndimm = 3\n", [], r"unknown key \[train\] dimm \(did you mean 'dim'\?\)"),
    ("[trian]\ndim = 3\n", [], r"unknown section \[trian\] \(did you mean 'train'\?\)"),
    ("[train]\ndim = 0\n", [], r"\[train\] dim: input should be greater than or equal to 1, got 0"),
    ("[train]\nwindow = 0\n", [], r"\[train\] window: .*got 0"),
    ("[walks]\nlength = 1\n", [], r"\[walks\] length: .*got 1"),
    ("[train]\ndim = \"64\"\n", [], r"\[train\] dim: input should be a valid integer, got '64'"),
    ("[train]\nobjective = \"softmax\"\n", [], r"\[train\] objective: .*got 'softmax'"),
    ("", ["train.dim"], "expected section.key=value"),
    ("", ["nope.dim=3"], r"unknown section \[nope\]"),
    ("", ["walks.per_node=0"], r"\[walks\] per_node"),
])
def test_bad_config_names_the_key(tmp_path, extra, overrides, match):
    with pytest.raises(ConfigError, match=match):
        load_config(_write(tmp_path, BASE + extra), overrides)


TABLES = """
[input]
source_kind = "account"

[[input.tables]]
path = "t.parquet"
source = "a"
target = "b"

[store]
path = "store"
"""


@pytest.mark.parametrize("text, overrides, match", [
    (TABLES, [], r"c\.toml: \[input\] source_kind is for the single-table keys; with \[\[input.tables\]\] give "
                 r"source_kind in each entry"),
    (BASE, ['dask.address="tcp://127.0.0.1:8786"', "dask.workers=2"],
     r"^--set dask.workers: \[dask\] workers sizes the local cluster and cannot be combined with \[dask\] address"),
    (BASE + '[dask]\naddress = "tcp://127.0.0.1:8786"\nworkers = 2\n', [], r"c\.toml: \[dask\] workers .*address"),
    (BASE + "[gates]\nmin_link_auc = 0.8\n[evaluate]\nlink_holdout = 0\n", [],
     r"c\.toml: \[gates\] min_link_auc needs held-out edges .* \[evaluate\] link_holdout = 0"),
    (BASE + "[gates]\nmin_link_auc = 0.8\n", ["evaluate.link_holdout=0"], r"^--set evaluate.link_holdout: "),
    (BASE + "[train]\nnegatives = 3\nobjective = \"hierarchical_softmax\"\n", [], r"\[train\] negatives applies"),
    (BASE.replace('target = "receiver"', 'target = "receiver"\nsince = 2026-12-01\ntimestamp = "at"\n'
                  'until = 2026-11-01'), [], r"\[input\] since \(2026-12-01\) must be before \[input\] until"),
    (BASE.replace('target = "receiver"', 'target = "receiver"\nlast_days = 3'), [],
     r"\[input\] last_days needs a timestamp column"),
])
def test_rules_between_keys(tmp_path, text, overrides, match):
    with pytest.raises(ConfigError, match=match):
        load_config(_write(tmp_path, text), overrides)


def test_a_bad_value_whose_repr_fails_still_gives_one_line():
    from graphkit.config import config_from_dict

    class Odd:
        def __repr__(self):
            raise RuntimeError("no repr")

    data = {"input": {"edges": "e.parquet", "source": "s", "target": "t"}, "store": {"path": "s"},
            "train": {"dim": Odd()}}
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, where="c.toml")
    line = str(info.value)
    assert line == "c.toml: [train] dim: input should be a valid integer, got <Odd>"


def test_none_clears_an_optional_key(tmp_path):
    cfg = load_config(_write(tmp_path, BASE + "[gates]\nmin_link_auc = 0.9\n"), ["gates.min_link_auc=none"])
    assert cfg.gates.min_link_auc is None


def test_missing_required_and_file(tmp_path):
    with pytest.raises(ConfigError, match=r"missing required key \[store\]"):
        load_config(_write(tmp_path, BASE.split("[store]")[0]))
    with pytest.raises(ConfigError, match="config file not found"):
        load_config(tmp_path / "absent.toml")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(_write(tmp_path, "[input\n"))


def test_text_file_options_default_per_table_from_input(tmp_path):
    text = """
[input]
csv_header = false
csv_delimiter = "\\t"

[[input.tables]]
path = "logins.csv"
source = "column_1"
target = "column_2"

[[input.tables]]
path = "transfers.csv"
source = "sender"
target = "receiver"
csv_header = true
csv_delimiter = ";"

[store]
path = "store"
"""
    cfg = load_config(_write(tmp_path, text))
    assert [(t.csv_header, t.csv_delimiter) for t in cfg.tables()] == [(False, "\t"), (True, ";")]
    assert cfg.to_public_dict()["input"]["tables"][0]["csv_delimiter"] == "\t"  # recorded with the version
    plain = load_config(_write(tmp_path, BASE))
    assert (plain.tables()[0].csv_header, plain.tables()[0].csv_delimiter) == (True, None)  # None: by the ending
    with pytest.raises(ConfigError, match=r"c\.toml: \[\[input.tables\]\] entry 2 key csv_delimiter: must be one "
                                          r"character .*got ';;'"):
        load_config(_write(tmp_path, text.replace('csv_delimiter = ";"', 'csv_delimiter = ";;"')))
    with pytest.raises(ConfigError, match=r"c\.toml: \[input\] csv_delimiter: '\\n' cannot separate fields"):
        load_config(_write(tmp_path, text.replace('csv_delimiter = "\\t"', 'csv_delimiter = "\\n"')))
