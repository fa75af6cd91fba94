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
