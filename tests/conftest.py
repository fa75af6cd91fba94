"""Shared fixtures: tiny graphs for exact checks, a planted-partition graph for quality checks, the one Prefect
server of the test session, the demo store built once, and the command line called in this process."""

from __future__ import annotations

import contextlib
import os
import shutil
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

os.environ.setdefault("PREFECT_HOME", os.path.join(os.path.dirname(os.path.dirname(__file__)), ".prefect-home"))
if os.environ.get("PYTEST_XDIST_WORKER"):
    # Under pytest-xdist every worker gets a Prefect home (and so a SQLite database) of its own: two workers' temporary
    # servers writing one database file would wait on each other's locks.
    os.environ["PREFECT_HOME"] = os.path.join(os.environ["PREFECT_HOME"], os.environ["PYTEST_XDIST_WORKER"])
os.makedirs(os.environ["PREFECT_HOME"], exist_ok=True)  # before Prefect's import, which warns when it cannot
if not os.environ.get("PYTEST_XDIST_WORKER"):
    # The session's process (the controller under pytest-xdist, whose workers inherit these): what the workers
    # share (the Prefect server of ``prefect_api``, the store of ``demo_template``) lives as long as it, in a
    # folder of the session's own.
    import tempfile

    os.environ["GRAPHKIT_TEST_SESSION_PID"] = str(os.getpid())
    os.environ["GRAPHKIT_TEST_SHARED_DIR"] = os.path.join(tempfile.gettempdir(), f"graphkit-tests-{os.getpid()}")
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("DO_NOT_TRACK", "1")
os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")

from graphkit.graph import AdjacencyArrays  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_parquet" / "demo.toml"


#: The files whose tests take longest, longest first (seconds on the 2-core box, a full run under load): they are
#: collected first, so that pytest-xdist's ``--dist loadfile`` hands them out first and the two workers finish
#: together instead of one waiting on a long file it was given last. The other files keep their order after them.
LONG_FILES = ("test_signals.py", "test_flows.py", "test_logs.py", "test_writers.py", "test_faults.py",
              "test_train.py", "test_versions.py", "test_quality.py", "test_neighbours.py", "test_bad_input.py")


def pytest_unconfigure(config):
    if not os.environ.get("PYTEST_XDIST_WORKER"):  # the session's process: the workers have ended
        shutil.rmtree(os.environ["GRAPHKIT_TEST_SHARED_DIR"], ignore_errors=True)


@contextlib.contextmanager
def session_once(name: str):
    """Held by one process of the session at a time (a file lock in the session's shared folder), so that what
    the first one builds there the others find built; yields the folder."""
    import fcntl

    shared = Path(os.environ["GRAPHKIT_TEST_SHARED_DIR"])
    shared.mkdir(exist_ok=True)
    with open(shared / f"{name}.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        yield shared


@pytest.hookimpl(trylast=True)  # after ``-m`` and ``-k`` have deselected
def pytest_collection_modifyitems(config, items):
    rank = {name: i for i, name in enumerate(LONG_FILES)}
    items.sort(key=lambda item: rank.get(item.path.name, len(LONG_FILES)))  # stable: order within a file kept
    if not config.option.collectonly and any("prefect_api" in getattr(i, "fixturenames", ()) for i in items):
        start_prefect_server()  # boots while the first tests run


#: Overrides that make the demo refresh a quick fixture: fewer, shorter walks, small vectors, no evaluation.
FAST_DEMO = ["walks.per_node=2", "walks.length=20", "train.dim=16", "evaluate.link_holdout=0", "evaluate.labels=none",
             "gates.min_link_auc=none", "gates.min_micro_f1=none"]


def graph_from_nx(g: nx.Graph) -> AdjacencyArrays:
    """CSR graph over the integer nodes 0..n-1 of a networkx graph (weights from the 'weight' attribute if any)."""
    edges = np.array(list(g.edges()), dtype=np.int64).reshape(-1, 2)
    weighted = any("weight" in d for _, _, d in g.edges(data=True))
    w = np.array([d.get("weight", 1.0) for _, _, d in g.edges(data=True)]) if weighted else None
    return AdjacencyArrays.from_edges(edges[:, 0], edges[:, 1], w, n_nodes=g.number_of_nodes(),
                                      directed=g.is_directed())


@pytest.fixture
def path_graph():
    """0-1-2-3-4, undirected."""
    return graph_from_nx(nx.path_graph(5))


@pytest.fixture
def star_graph():
    """Hub 0 with leaves 1..6, undirected."""
    return graph_from_nx(nx.star_graph(6))


@pytest.fixture
def two_cliques():
    """Two 5-cliques joined by one bridge edge (4-5): connected and not bipartite."""
    g = nx.disjoint_union(nx.complete_graph(5), nx.complete_graph(5))
    g.add_edge(4, 5)
    return graph_from_nx(g)


@pytest.fixture
def graph_with_isolated():
    """A triangle 0-1-2 plus node 3 with no edges."""
    return AdjacencyArrays.from_edges([0, 1, 2], [1, 2, 0], n_nodes=4)


@pytest.fixture
def small_directed():
    """0->1, 1->2, 2->0, 2->3; node 3 has no out-edges."""
    return AdjacencyArrays.from_edges([0, 1, 2, 2], [1, 2, 0, 3], n_nodes=4, directed=True)


def planted_partition(n_blocks=50, block_size=200, in_deg=6.0, out_deg=6.0, seed=7):
    """Planted-partition graph (networkx.planted_partition_graph) with about ``in_deg`` expected edges per node
    inside its block and ``out_deg`` outside; returns (AdjacencyArrays, labels)."""
    n = n_blocks * block_size
    p_in = in_deg / (block_size - 1)
    p_out = out_deg / (n - block_size)
    g = nx.planted_partition_graph(n_blocks, block_size, p_in, p_out, seed=seed)
    labels = np.repeat(np.arange(n_blocks), block_size)
    return graph_from_nx(g), labels


@pytest.fixture(scope="session")
def planted_graph():
    """50 blocks x 200 nodes, 6 expected edges inside and 6 outside the block per node."""
    return planted_partition()


# ---------------------------------------------------------------------------------------------------- Prefect
def start_prefect_server() -> Path:
    """Start the session's Prefect server (tests/prefect_server.py) unless a process of the session already has;
    return the file its API URL appears in once it is up. Does not wait."""
    import subprocess
    import sys

    with session_once("prefect-api") as shared:
        url_file, pid_file = shared / "prefect-api-url", shared / "prefect-server.pid"
        if not pid_file.exists():
            with open(shared / "prefect-server.log", "ab") as log:
                server = subprocess.Popen([sys.executable, str(Path(__file__).with_name("prefect_server.py")),
                                           str(url_file), os.environ["GRAPHKIT_TEST_SESSION_PID"]],
                                          stdin=subprocess.DEVNULL, stdout=log, stderr=log, start_new_session=True)
            pid_file.write_text(str(server.pid))
    return url_file


@pytest.fixture(scope="session")
def prefect_api():
    """The one Prefect server of the test session (a temporary database of its own), for every test that runs a
    flow; yields its API URL.

    A process of its own (tests/prefect_server.py), which every pytest-xdist worker uses, stopped when the
    session ends. It boots (about 10 s) in the background from the end of the collection when a selected test asks
    for it (``pytest_collection_modifyitems``), else when the first test asks. From then on ``PREFECT_API_URL``
    stays set in this process (flows run in-process use the server) and in the environment of every subprocess
    started (``graphkit refresh`` then starts no temporary server of its own). A test of the temporary server
    itself removes ``PREFECT_API_URL`` from the environment it gives its subprocess.
    """
    import psutil
    from prefect.settings import PREFECT_API_URL, temporary_settings

    url_file = start_prefect_server()
    server = psutil.Process(int(url_file.with_name("prefect-server.pid").read_text()))
    deadline = time.monotonic() + 180
    while not url_file.exists():
        assert server.is_running() and server.status() != psutil.STATUS_ZOMBIE, \
            url_file.with_name("prefect-server.log").read_text()[-3000:]
        assert time.monotonic() < deadline, "the test session's Prefect server did not start"
        time.sleep(0.1)
    url = url_file.read_text()
    saved = os.environ.get("PREFECT_API_URL")
    os.environ["PREFECT_API_URL"] = url
    try:
        with temporary_settings(updates={PREFECT_API_URL: url}):
            yield url
    finally:
        if saved is None:
            os.environ.pop("PREFECT_API_URL", None)
        else:
            os.environ["PREFECT_API_URL"] = saved


# ---------------------------------------------------------------------------------------------------- the demo
@pytest.fixture(scope="session")
def demo_template():
    """The demo (``FAST_DEMO``) refreshed once per test session, without Prefect (by the first worker that needs
    it; the other finds it built): a store holding version 1. Never written to: take a copy with
    :func:`copy_store`."""
    import graphkit
    from graphkit.config import load_config

    with session_once("demo-template") as shared:
        store = shared / "demo-template" / "store"
        if not (store / "catalog.duckdb").exists():  # renamed in last, by the publish
            shutil.rmtree(store.parent, ignore_errors=True)  # what a failed build left
            assert graphkit.refresh(load_config(DEMO, [f'store.path="{store}"', *FAST_DEMO])) == 1
    return store


def copy_store(store: Path, dest: Path) -> Path:
    """A private copy of a built store (a store holds no absolute path: a copy is a store of its own)."""
    return Path(shutil.copytree(store, dest))


# ---------------------------------------------------------------------------------------------------- the CLI
def cli(*argv) -> tuple[int, str, str, float]:
    """``graphkit ARGV`` in this process (``graphkit.cli.main``): exit code, stdout, stderr and seconds.

    The one-line stderr and exit code of a real process are checked in one subprocess test
    (tests/test_cli.py); every other test calls the command line here, without an interpreter's start-up and
    imports per call. Usable in module fixtures too (no ``capsys``).
    """
    import contextlib
    import io

    import graphkit.cli

    out, err = io.StringIO(), io.StringIO()
    t0 = time.monotonic()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = graphkit.cli.main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue(), time.monotonic() - t0


# ---------------------------------------------------------------------------------------------------- processes
def watch_descendants(proc, timeout: float = 600, each=None, message: str = "the process did not end") -> dict:
    """Poll a running ``subprocess.Popen`` until it ends; pid -> (``psutil.Process``, command line) of every
    descendant seen meanwhile (again each time: a child just forked still shows our command line, a zombie
    none). ``each()``, if given, is called at every poll (20 times a second)."""
    import psutil

    parent = psutil.Process(proc.pid)
    seen: dict = {}
    deadline = time.monotonic() + timeout
    while proc.poll() is None:
        assert time.monotonic() < deadline, message
        try:
            for child in parent.children(recursive=True):
                try:
                    cmd = " ".join(child.cmdline())
                except psutil.Error:
                    continue
                if cmd:
                    seen[child.pid] = (child, cmd)
        except psutil.NoSuchProcess:
            pass
        if each is not None:
            each()
        time.sleep(0.05)
    return seen


def assert_gone(processes, within: float) -> None:
    """Every ``psutil.Process`` given has ended (or is a zombie) within ``within`` seconds."""
    import psutil

    deadline = time.monotonic() + within
    alive = list(processes)
    while alive and time.monotonic() < deadline:
        alive = [p for p in alive if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]
        time.sleep(0.1)
    assert alive == [], f"left running: {alive}"
