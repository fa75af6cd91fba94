"""Random walks: kernel vs a slow pure-Python reference, walk structure vs networkx/scipy, statistics, seeds."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import networkx as nx
import numpy as np
import pytest
import scipy.stats
from conftest import graph_from_nx

from graphkit import walks as gw
from graphkit.errors import ConfigError
from graphkit.graph import AdjacencyArrays
from graphkit.walks import count_visits, random_walks, walk_range

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
TINY = ["path_graph", "star_graph", "two_cliques", "graph_with_isolated", "small_directed"]

# ------------------------------------------------------------------------------------------ pure-Python reference
# Re-implemented from the definition in the walks.py module docstring with plain Python integers (no numpy, no numba).
MASK = (1 << 64) - 1
G = 0x9E3779B97F4A7C15


def ref_mix(z):
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK
    return z ^ (z >> 31)


def ref_perm(pos, p, n, seed):
    k = 0 if n <= 1 else max(gw.MIN_PERM_BITS, (n - 1).bit_length())
    pass_key = (ref_mix(seed ^ gw.PERM_SALT) + p) & MASK
    pass_key = ref_mix(pass_key)
    x = pos
    while True:
        for r in range(gw.FEISTEL_ROUNDS):
            lo_bits = k // 2 if r % 2 == 0 else k - k // 2
            hi_bits = k - lo_bits
            low, high = x & ((1 << lo_bits) - 1), x >> lo_bits
            key = ref_mix((pass_key + (r + 1) * G) & MASK)
            x = (low << hi_bits) | (high ^ (ref_mix(key ^ low) & ((1 << hi_bits) - 1)))
        if x < n:
            return x


def ref_bounded(s, d):
    """Lemire's multiply-high draw with rejection, 32-bit variant. Returns (state, pick, rejected draws, accepted r)."""
    rejected = 0
    while True:
        s = (s + G) & MASK
        r = ref_mix(s)
        m = (r >> 32) * d
        if (m & 0xFFFFFFFF) >= ((1 << 32) - d) % d:
            return s, m >> 32, rejected, r
        rejected += 1


def ref_alias(indptr, weights):
    """Vose's alias tables as the module docstring defines them (Python floats are IEEE float64)."""
    table = [0] * len(weights)
    for v in range(len(indptr) - 1):
        a, d = indptr[v], indptr[v + 1] - indptr[v]
        total = 0.0
        for i in range(d):
            total += float(weights[a + i])
        u = [float(weights[a + i]) * d / total for i in range(d)]
        small = [i for i in range(d) if u[i] < 1.0]
        large = [i for i in range(d) if u[i] >= 1.0]
        while small and large:
            s, big = small.pop(), large.pop()
            table[a + s] = (int(u[s] * 2.0 ** 32) << 32) | big
            u[big] = (u[big] + u[s]) - 1.0
            (small if u[big] < 1.0 else large).append(big)
        for i in large + small:
            table[a + i] = (0xFFFFFFFF << 32) | i
    return table


def ref_thresholds(p, q):
    f = (1 / p, 1.0, 1 / q)
    return [min(int(x / max(f) * 2.0 ** 63), 1 << 63) for x in f]


def ref_accept(s, x, prev, prev_neighbours, thr):
    """Second-order coin, straight from the definition (no shortcuts). Returns (state, accepted)."""
    t_ret, t_nb, t_out = thr
    if x == prev:
        if t_ret == 1 << 63:
            return s, True
        s = (s + G) & MASK
        return s, (ref_mix(s) >> 1) < t_ret
    if t_nb == t_out == 1 << 63:
        return s, True
    s = (s + G) & MASK
    return s, (ref_mix(s) >> 1) < (t_nb if x in prev_neighbours else t_out)


def ref_walk(indptr, indices, w, length, seed, alias=None, thr=None, restart=False):
    n = len(indptr) - 1
    start = node = ref_perm(w % n, w // n, n, seed)
    s = (((seed * G) & MASK) ^ w) + G & MASK
    walk, prev = [node], -1
    while len(walk) < length:
        a, d = indptr[node], indptr[node + 1] - indptr[node]
        if d == 0:
            if restart and node != start:
                walk.append(start)
                node, prev = start, -1
                continue
            break
        while True:
            s, pick, _, r = ref_bounded(s, d)
            pos = a + pick
            if alias is not None and (r & 0xFFFFFFFF) >= alias[pos] >> 32:
                pos = a + (alias[pos] & 0xFFFFFFFF)
            x = indices[pos]
            if thr is None or prev < 0:
                break
            s, ok = ref_accept(s, x, prev, set(indices[indptr[prev]:indptr[prev + 1]]), thr)
            if ok:
                break
        prev, node = node, x
        walk.append(node)
    return walk + [-1] * (length - len(walk))


def ref_walks(graph, start, stop, length, seed, *, weighted=False, p=1.0, q=1.0, restart=False):
    indptr, indices = graph.indptr.tolist(), graph.indices.tolist()
    alias = ref_alias(indptr, graph.weights.tolist()) if weighted and graph.weights is not None else None
    thr = None if (p, q) == (1.0, 1.0) else ref_thresholds(p, q)
    return np.array([ref_walk(indptr, indices, w, length, seed, alias, thr, restart) for w in range(start, stop)],
                    dtype=np.int32).reshape(-1, length)


def with_weights(g, seed=0, low=0.2, high=5.0):
    """The same graph with random edge weights (symmetric for an undirected graph)."""
    rng = np.random.default_rng(seed)
    src = np.repeat(np.arange(g.n_nodes), g.degrees())
    dst = g.indices.astype(np.int64)
    w = rng.uniform(low, high, g.n_edges)
    if not g.directed:  # one weight per undirected edge: from_edges adds the reverse
        keep = src <= dst
        src, dst, w = src[keep], dst[keep], w[keep]
    return AdjacencyArrays.from_edges(src, dst, w, n_nodes=g.n_nodes, directed=g.directed)


# ------------------------------------------------------------------------------------------ kernel vs reference
@pytest.mark.parametrize("name", TINY)
@pytest.mark.parametrize("seed", [0, 1, 2**63 + 12345])
def test_kernel_matches_python_reference(request, name, seed):
    g = request.getfixturevalue(name)
    per_node, length = 3, 9
    expected = ref_walks(g, 0, per_node * g.n_nodes, length, seed)
    for threads in (1, 2):
        got = random_walks(g, per_node, length, seed, threads=threads)
        assert got.dtype == np.int32 and got.shape == (per_node * g.n_nodes, length)
        np.testing.assert_array_equal(got, expected)


def test_reference_on_a_larger_graph_and_an_inner_range():
    # 300 nodes: the Feistel domain is 9 bits (unequal halves), and the range starts mid-pass.
    g = graph_from_nx(nx.gnm_random_graph(300, 900, seed=11, directed=True))
    expected = ref_walks(g, 250, 700, 12, 99)
    np.testing.assert_array_equal(walk_range(g, 250, 700, per_node=4, length=12, seed=99, threads=1), expected)


OPTIONS = [dict(weighted=True), dict(p=0.5, q=2.0), dict(weighted=True, p=4.0, q=0.25), dict(dead_end="restart"),
           dict(weighted=True, p=0.5, q=2.0, dead_end="restart"), dict(p=1.0, q=3.0), dict(p=0.25, q=1.0)]


@pytest.mark.parametrize("name", TINY)
@pytest.mark.parametrize("opts", OPTIONS, ids=lambda o: ",".join(f"{k}={v}" for k, v in o.items()))
def test_weighted_second_order_and_restart_match_reference(request, name, opts):
    g = with_weights(request.getfixturevalue(name), seed=5)
    per_node, length = 3, 9
    ref_opts = dict(weighted=opts.get("weighted", False), p=opts.get("p", 1.0), q=opts.get("q", 1.0),
                    restart=opts.get("dead_end") == "restart")
    for seed in (0, 2**63 + 12345):
        expected = ref_walks(g, 0, per_node * g.n_nodes, length, seed, **ref_opts)
        for threads in (1, 2):
            got = random_walks(g, per_node, length, seed, threads=threads, weighted=opts.get("weighted", False),
                               p=opts.get("p", 1.0), q=opts.get("q", 1.0), dead_end=opts.get("dead_end", "stop"))
            np.testing.assert_array_equal(got, expected)


@pytest.mark.parametrize("directed", [False, True])
def test_second_order_reference_on_a_larger_weighted_graph(directed):
    # 300 nodes with triangles, hubs of degree ~20 and (directed) sinks; a range that starts mid-pass.
    g = with_weights(graph_from_nx(nx.gnm_random_graph(300, 1500, seed=11, directed=directed)), seed=2)
    for p, q, dead_end in ((0.5, 2.0, "restart"), (3.0, 0.3, "stop")):
        expected = ref_walks(g, 250, 700, 12, 99, weighted=True, p=p, q=q, restart=dead_end == "restart")
        got = walk_range(g, 250, 700, per_node=4, length=12, seed=99, threads=1, p=p, q=q, dead_end=dead_end,
                         alias=gw.alias_table(g))
        np.testing.assert_array_equal(got, expected)
    # the unweighted walks of a weighted graph ignore the weights: same as the reference without them
    np.testing.assert_array_equal(walk_range(g, 0, 300, per_node=4, length=12, seed=3, weighted=False),
                                  ref_walks(g, 0, 300, 12, 3))


def test_alias_table_matches_reference_and_is_exact():
    # Weights spread over nine orders of magnitude, a hub with 400 edges, degree-1 nodes and isolated nodes.
    rng = np.random.default_rng(4)
    src = np.concatenate([np.zeros(400, np.int64), rng.integers(1, 300, 900)])
    dst = np.concatenate([np.arange(1, 401), rng.integers(1, 300, 900)])
    w = np.exp(rng.uniform(np.log(1e-6), np.log(1e3), src.size))
    g = AdjacencyArrays.from_edges(src, dst, w, n_nodes=420, directed=True)
    table = gw.alias_table(g)
    assert table.dtype == np.uint64 and table.shape == (g.n_edges,)
    assert table.tolist() == ref_alias(g.indptr.tolist(), g.weights.tolist())
    # The probability each edge gets from its node's table (Walker 1977): its own column's keep share plus the
    # rejected shares of the columns that alias it, over d columns. Must equal w / sum(w) up to the 2**-32 steps.
    keep = (table >> np.uint64(32)).astype(np.float64) / 2.0**32
    alias = (table & np.uint64(0xFFFFFFFF)).astype(np.int64)
    for v in range(g.n_nodes):
        a, b = g.indptr[v], g.indptr[v + 1]
        if b == a:
            continue
        d = b - a
        implied = keep[a:b].copy()
        np.add.at(implied, alias[a:b], 1.0 - keep[a:b])
        exact = g.weights[a:b].astype(np.float64) / g.weights[a:b].astype(np.float64).sum()
        assert np.all(alias[a:b] < d)
        np.testing.assert_allclose(implied / d, exact, rtol=0, atol=1e-9)


def test_second_order_kernel_with_unit_coins_equals_first_order(two_cliques):
    # With every coin certain (p = q = 1) the second-order path must not draw and must give the first-order bytes.
    g = with_weights(two_cliques)
    first = random_walks(g, 4, 15, seed=6)
    out = np.empty_like(first)
    indptr, indices = gw._csr_arrays(g)
    gw._walks_serial_kernel(indptr, indices, gw.alias_table(g), gw.acceptance_thresholds(1.0, 1.0), True, False,
                            gw._perm_bits(g.n_nodes), np.uint64(6), np.int64(0), out)
    np.testing.assert_array_equal(out, first)
    assert (gw.acceptance_thresholds(1.0, 1.0) == np.uint64(1 << 63)).all()


def test_bounded_draw_matches_reference_including_rejections():
    # Degrees near 2**31 make Lemire's rejection step frequent (probability about 1/2), which walks on test-sized
    # graphs almost never reach; the draw helper is called directly here.
    rng = np.random.default_rng(0)
    degrees = [1, 2, 3, 7, 1000, 3 * 2**20 + 1, 2**31 + 1, 3 * 2**30, 2**32 - 1]
    degrees += [int(x) for x in rng.integers(1, 2**32, 20)]
    n_rejected = 0
    for d in degrees:
        s = int(rng.integers(0, 2**63)) * 2 + 1
        for _ in range(50):
            s_ref, pick_ref, rej, r_ref = ref_bounded(s, d)
            s_got, pick_got, r_got = gw._bounded_kernel(np.uint64(s), np.uint64(d))
            assert (int(s_got), int(pick_got), int(r_got)) == (s_ref, pick_ref, r_ref)
            assert pick_ref < d
            n_rejected += rej
            s = s_ref
    assert n_rejected > 100


def test_permutation_matches_reference():
    for n in (2, 3, 200, 256, 257, 5000, 2**20 + 3):
        k = gw._perm_bits(n)
        for p in (0, 1, 17):
            pass_key = np.uint64(ref_mix((ref_mix(77 ^ gw.PERM_SALT) + p) & MASK))
            for pos in {0, 1, n // 2, n - 1}:
                assert int(gw._permute_kernel(np.uint64(pos), pass_key, np.uint64(n), k)) == ref_perm(pos, p, n, 77)


NO_JIT_OPTIONS = [dict(weighted=False), dict(p=0.5, q=2.0, dead_end="restart"), dict(weighted=False, p=3.0, q=0.5)]


def test_kernel_without_jit_matches(two_cliques, graph_with_isolated, small_directed, tmp_path):
    # Same code with NUMBA_DISABLE_JIT=1 (plain Python over numpy scalars) must give the same bytes.
    # weighted copies, so that the alias table kernel and the weighted and second-order paths run without JIT too
    graphs = {"two_cliques": with_weights(two_cliques), "graph_with_isolated": with_weights(graph_with_isolated),
              "small_directed": with_weights(small_directed)}
    for name, g in graphs.items():
        g.save(tmp_path / name)
    script = textwrap.dedent(f"""
        import json, sys, warnings
        import numpy as np
        from graphkit.graph import AdjacencyArrays
        from graphkit.walks import random_walks, count_visits
        out = {{}}
        with np.errstate(over="ignore"):  # uint64 wrap-around is intended; numpy scalars warn about it
            for name in {list(graphs)!r}:
                g = AdjacencyArrays.load({str(tmp_path)!r} + "/" + name)
                w1 = random_walks(g, 2, 7, seed=42, threads=1)
                w2 = random_walks(g, 2, 7, seed=42, threads=2)
                out[name] = [w1.tolist(), w2.tolist(), count_visits(w1, g.n_nodes).tolist()]
                for i, opts in enumerate({NO_JIT_OPTIONS!r}):
                    out[name].append(random_walks(g, 2, 7, seed=42, threads=2, **opts).tolist())
        json.dump(out, sys.stdout)
    """)
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    res = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, cwd=REPO,
                         timeout=120)
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    for name, g in graphs.items():
        jit = random_walks(g, 2, 7, seed=42)
        np.testing.assert_array_equal(np.array(out[name][0]), jit)
        np.testing.assert_array_equal(np.array(out[name][1]), jit)
        np.testing.assert_array_equal(np.array(out[name][2]), count_visits(jit, g.n_nodes))
        for i, opts in enumerate(NO_JIT_OPTIONS):
            np.testing.assert_array_equal(np.array(out[name][3 + i]), random_walks(g, 2, 7, seed=42, **opts))


def test_parallel_kernel_loads_from_cache(path_graph):
    # cache=True together with parallel=True: a fresh process must load the kernel instead of compiling it.
    random_walks(path_graph, 2, 5, seed=1, threads=2)  # makes sure the cache file exists
    script = textwrap.dedent("""
        from graphkit import walks
        from graphkit.graph import AdjacencyArrays
        g = AdjacencyArrays.from_edges([0, 1], [1, 2])
        walks.random_walks(g, 2, 5, seed=1, threads=2)
        st = walks._walks_parallel_kernel.stats
        print(sum(st.cache_hits.values()), sum(st.cache_misses.values()))
    """)
    res = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=REPO, timeout=120)
    assert res.returncode == 0, res.stderr
    hits, misses = map(int, res.stdout.split())
    assert (hits, misses) == (1, 0)


# ------------------------------------------------------------------------------------------ structure
def test_each_pass_starts_one_walk_at_every_node():
    for n in (1, 2, 3, 5, 255, 256, 257, 1000):
        g = AdjacencyArrays.from_edges(np.arange(n), (np.arange(n) + 1) % n, n_nodes=n)
        w = random_walks(g, 4, 2, seed=7)
        for p in range(4):
            np.testing.assert_array_equal(np.sort(w[p * n:(p + 1) * n, 0]), np.arange(n))


def test_passes_are_shuffled_independently():
    # Orders of different passes, and each order vs the identity, should be uncorrelated. For independent uniform
    # permutations Spearman's rho has standard deviation 1/sqrt(n - 1) (scipy.stats.spearmanr, standard result);
    # with n = 2000 that is 0.022, and the bound 0.12 is more than 5 standard deviations.
    n, per_node = 2000, 6
    g = AdjacencyArrays.from_edges(np.arange(n), (np.arange(n) + 1) % n, n_nodes=n)
    orders = random_walks(g, per_node, 2, seed=3)[:, 0].reshape(per_node, n)
    for p in range(per_node):
        assert abs(scipy.stats.spearmanr(np.arange(n), orders[p])[0]) < 0.12
        for q in range(p):
            assert not np.array_equal(orders[p], orders[q])
            assert abs(scipy.stats.spearmanr(orders[p], orders[q])[0]) < 0.12


def test_shuffle_is_uniform_over_all_orders_of_a_small_graph():
    # 5 nodes have 120 orders; 24000 passes give 200 each in expectation. Pearson's chi-square test
    # (scipy.stats.chisquare) must not reject uniformity at the 1e-3 level (deterministic: the seed is fixed).
    # A Feistel network over only 3 bits fails this with p < 1e-200, which is why MIN_PERM_BITS exists.
    n, passes = 5, 24_000
    g = AdjacencyArrays.from_edges(np.arange(n), (np.arange(n) + 1) % n, n_nodes=n)
    orders = random_walks(g, passes, 2, seed=1)[:, 0].reshape(passes, n).astype(np.int64)
    code = orders @ (n ** np.arange(n))
    _, counts = np.unique(code, return_counts=True)
    assert counts.size == 120
    assert scipy.stats.chisquare(counts).pvalue > 1e-3


def test_every_step_follows_an_edge():
    # Reference adjacency from networkx -> scipy.sparse (nx.to_scipy_sparse_array), independent of the CSR builder.
    for g_nx in (nx.gnm_random_graph(400, 1200, seed=5), nx.gnm_random_graph(400, 1600, seed=6, directed=True)):
        g = graph_from_nx(g_nx)
        adj = nx.to_scipy_sparse_array(g_nx, nodelist=range(400), format="csr")
        w = random_walks(g, 3, 20, seed=9)
        u, v = w[:, :-1].ravel(), w[:, 1:].ravel()
        step = v >= 0
        assert step.sum() > 0.5 * step.size
        assert np.all(np.asarray(adj[u[step], v[step]]).ravel() != 0)
        # -1 only ever follows a node without out-edges (or more -1)
        stop = (v < 0) & (u >= 0)
        out_deg = np.asarray(adj.sum(axis=1)).ravel()
        assert np.all(out_deg[u[stop]] == 0)


def test_neighbour_choice_is_uniform(star_graph):
    # From the hub of a 6-leaf star, the next node is uniform over the leaves: chi-square (scipy.stats.chisquare)
    # on 6 * 2000 hub steps, each walk bouncing hub -> leaf -> hub.
    w = random_walks(star_graph, 2000, 9, seed=4)
    prev, nxt = w[:, :-1].ravel(), w[:, 1:].ravel()
    counts = np.bincount(nxt[prev == 0], minlength=7)
    assert counts[0] == 0
    assert scipy.stats.chisquare(counts[1:]).pvalue > 1e-3
    assert np.all(nxt[prev > 0] == 0)  # leaves only go back to the hub


def test_stationary_distribution():
    # For a connected, non-bipartite undirected graph the walk's stationary distribution is deg(v) / 2|E|
    # (Lovasz 1993, "Random walks on graphs: a survey", section 1). Burn-in: the exact distribution after B steps
    # from the uniform start (numpy matrix power of the transition matrix) must already be within 1e-6 of it in
    # total variation, so the remaining columns sample it.
    g_nx = nx.barabasi_albert_graph(80, 2, seed=3)
    assert nx.is_connected(g_nx) and not nx.is_bipartite(g_nx)
    g = graph_from_nx(g_nx)
    deg = np.array([g_nx.degree(v) for v in range(80)], dtype=float)
    pi = deg / (2 * g_nx.number_of_edges())
    transition = nx.to_numpy_array(g_nx, nodelist=range(80)) / deg[:, None]
    burn_in = 60
    mu = np.full(80, 1 / 80) @ np.linalg.matrix_power(transition, burn_in)
    assert 0.5 * np.abs(mu - pi).sum() < 1e-6
    # 80 nodes x 200 walks x 440 kept steps = 7.04M steps. Measured total variation to pi: 0.0013-0.0017 for seeds
    # 12..17. The tolerance 0.005 is about 3x that and far below the distance of the wrong answers: the uniform
    # distribution is 0.30 away from pi (asserted), a walk picking neighbours in proportion to their degree settles
    # 0.27 away.
    w = random_walks(g, 200, 500, seed=12)
    kept = w[:, burn_in:]
    freq = count_visits(kept, 80) / kept.size
    tv = 0.5 * np.abs(freq - pi).sum()
    assert 0.5 * np.abs(1 / 80 - pi).sum() > 0.15
    assert tv < 0.005, tv


def test_directed_walk_stops_at_sink(small_directed):
    w = random_walks(small_directed, 50, 12, seed=2)
    # node 3 has no out-edges: a walk starting there is [3, -1, ...]
    np.testing.assert_array_equal(w[w[:, 0] == 3, 1:], -1)
    first_pad = np.where((w < 0).any(axis=1), np.argmax(w < 0, axis=1), w.shape[1])
    for row, k in zip(w, first_pad):
        assert np.all(row[k:] == -1) and np.all(row[:k] >= 0)
        if k < w.shape[1]:
            assert row[k - 1] == 3  # the only sink
    assert (first_pad < w.shape[1]).sum() > 100  # 2 -> 3 has probability 1/2 at each visit of 2: stops happen


def test_isolated_node_walk_is_padding(graph_with_isolated):
    w = random_walks(graph_with_isolated, 3, 6, seed=0)
    np.testing.assert_array_equal(w[w[:, 0] == 3], [[3, -1, -1, -1, -1, -1]] * 3)
    assert np.all(w[w[:, 0] != 3] >= 0)  # the triangle never runs out of edges


def test_directed_walk_restarts_at_its_start(small_directed):
    # dead_end="restart": after the sink 3 the walk continues from its own first node; only walks that start at the
    # sink itself stop (they cannot restart), and nothing else is padding.
    w = random_walks(small_directed, 50, 12, seed=2, dead_end="restart")
    from_sink = w[w[:, 0] == 3]
    np.testing.assert_array_equal(from_sink[:, 1:], -1)
    rest = w[w[:, 0] != 3]
    assert (rest >= 0).all()
    prev, nxt = rest[:, :-1], rest[:, 1:]
    starts = np.broadcast_to(rest[:, :1], nxt.shape)
    assert np.all(nxt[prev == 3] == starts[prev == 3])
    # every other step follows an edge
    adj = {(0, 1), (1, 2), (2, 0), (2, 3)}
    assert all((a, b) in adj for a, b in zip(prev[prev != 3], nxt[prev != 3]))
    n_restarts = int((prev == 3).sum())
    assert n_restarts > 100
    assert gw.count_restarts(w, small_directed) == n_restarts
    # the stopped version is the same walk up to the first sink visit
    stopped = random_walks(small_directed, 50, 12, seed=2)
    first_pad = np.where((stopped < 0).any(axis=1), np.argmax(stopped < 0, axis=1), 12)
    for row_s, row_r, k in zip(stopped, w, first_pad):
        np.testing.assert_array_equal(row_s[:k], row_r[:k])
    assert gw.count_restarts(stopped, small_directed) == 0


def edge_ids(g, u, v):
    """Position in g.indices of each edge (u[i], v[i]) (rows are sorted, so global keys are too)."""
    keys = np.repeat(np.arange(g.n_nodes, dtype=np.int64), g.degrees()) * g.n_nodes + g.indices
    pos = np.searchsorted(keys, u.astype(np.int64) * g.n_nodes + v)
    assert np.all(keys[pos] == u.astype(np.int64) * g.n_nodes + v)  # every step followed an edge
    return pos


def pooled_chisquare(groups):
    """Pearson's chi-square summed over independent multinomial groups [(observed, probabilities)]: the sum of the
    statistics is chi-square with the summed degrees of freedom (scipy.stats.chi2). Every expected count is >= 5
    (common practice for the approximation). Returns the p-value."""
    stat, dof = 0.0, 0
    for observed, prob in groups:
        expected = observed.sum() * prob / prob.sum()
        assert expected.min() >= 5
        stat += float(((observed - expected) ** 2 / expected).sum())
        dof += observed.size - 1
    return scipy.stats.chi2.sf(stat, dof)


def test_weighted_transitions_chi_square():
    # From every node the next node must be drawn with probability w / sum(w) over its out-edges. Graph: networkx
    # gnm_random_graph(60, 240), weights uniform in [0.2, 5]. Sample: 60 x 300 walks x 49 steps = 882,000
    # transitions, pooled over the 60 source nodes (the next node depends only on the current one, so per-node
    # counts are multinomial). Significance 1e-3 with a fixed seed; the same counts tested against the uniform
    # choice (the wrong answer) must be rejected at 1e-12, so the test has the power to see a broken sampler.
    g = with_weights(graph_from_nx(nx.gnm_random_graph(60, 240, seed=8)), seed=1)
    w = random_walks(g, 300, 50, seed=13)
    u, v = w[:, :-1].ravel(), w[:, 1:].ravel()
    counts = np.bincount(edge_ids(g, u, v), minlength=g.n_edges)
    assert counts.sum() == 60 * 300 * 49
    groups = [(counts[a:b], g.weights[a:b].astype(np.float64))
              for a, b in zip(g.indptr[:-1], g.indptr[1:]) if b - a > 1]
    assert pooled_chisquare(groups) > 1e-3
    wrong = [(obs, np.ones(obs.size)) for obs, _ in groups]
    assert pooled_chisquare(wrong) < 1e-12


def second_order_probabilities(g, t, c, p, q, weighted):
    """Exact next-node probabilities from c after t (Grover & Leskovec 2016, section 3.2.2): edge weight times
    1/p back to t, 1 to an out-neighbour of t, 1/q elsewhere; normalised over c's out-edges."""
    a, b = g.indptr[c], g.indptr[c + 1]
    x = g.indices[a:b]
    w = g.weights[a:b].astype(np.float64) if weighted else np.ones(b - a)
    f = np.where(x == t, 1 / p, np.where(np.isin(x, g.neighbors(t)), 1.0, 1 / q))
    return w * f / (w * f).sum()


@pytest.mark.parametrize("p, q, weighted, directed", [
    (0.5, 2.0, False, False),
    (0.25, 4.0, True, False),
    (4.0, 0.25, True, True),
])
def test_second_order_transitions_chi_square(p, q, weighted, directed):
    # Empirical frequencies of x given (previous t, current c) against the exact formula, pooled over every (t, c)
    # pair with at least 5 expected visits per cell. Graph: networkx gnm_random_graph(40, 160) (triangles, so all
    # three classes occur); the directed case adds the cycle 0 -> 1 -> ... -> 0 so that no node is a dead end.
    # Weights uniform in [0.5, 2]. Sample: 40 x 400 walks x 28 second-order steps = 448,000. Significance 1e-3 with a
    # fixed seed; the first-order probabilities (what a walk ignoring p, q would give) must be rejected at 1e-12.
    g_nx = nx.gnm_random_graph(40, 160 if not directed else 200, seed=21, directed=directed)
    if directed:
        g_nx.add_edges_from((i, (i + 1) % 40) for i in range(40))
    g = with_weights(graph_from_nx(g_nx), seed=3, low=0.5, high=2.0)
    assert (g.degrees() > 0).all()
    w = random_walks(g, 400, 30, seed=17, weighted=weighted, p=p, q=q)
    assert (w >= 0).all()
    t, c, x = w[:, :-2].ravel(), w[:, 1:-1].ravel(), w[:, 2:].ravel()
    pair = t.astype(np.int64) * g.n_nodes + c
    e = edge_ids(g, c, x)
    groups, wrong, n_used = [], [], 0
    order = np.argsort(pair, kind="stable")
    keys, first = np.unique(pair[order], return_index=True)
    for key, lo, hi in zip(keys, first, np.append(first[1:], order.size)):
        tt, cc = divmod(int(key), g.n_nodes)
        a, b = g.indptr[cc], g.indptr[cc + 1]
        prob = second_order_probabilities(g, tt, cc, p, q, weighted)
        if b - a < 2 or (hi - lo) * prob.min() < 5:
            continue
        observed = np.bincount(e[order[lo:hi]] - a, minlength=b - a)
        groups.append((observed, prob))
        wrong.append((observed, g.weights[a:b].astype(np.float64) if weighted else np.ones(b - a)))
        n_used += hi - lo
    assert len(groups) > 100 and n_used > 0.5 * pair.size
    assert pooled_chisquare(groups) > 1e-3
    assert pooled_chisquare(wrong) < 1e-12


# ------------------------------------------------------------------------------------------ seeds and threads
def test_same_bytes_for_any_threads_and_cut(planted_graph):
    g, _ = planted_graph
    n_walks = 2 * g.n_nodes
    whole = random_walks(g, 2, 15, seed=21, threads=1)
    assert whole.tobytes() == random_walks(g, 2, 15, seed=21, threads=2).tobytes()
    cuts = [0, 1, 7, 9_999, 10_000, 13_333, n_walks]
    pieces = [walk_range(g, a, b, per_node=2, length=15, seed=21, threads=t)
              for (a, b), t in zip(zip(cuts[:-1], cuts[1:]), [1, 2, 1, 2, 1, 2])]
    assert np.concatenate(pieces).tobytes() == whole.tobytes()
    other = random_walks(g, 2, 15, seed=22)
    assert (other != whole).mean() > 0.9
    # a longer walk extends a shorter one with the same seed: steps never depend on the length
    np.testing.assert_array_equal(random_walks(g, 2, 20, seed=21)[:, :15], whole)


@pytest.mark.parametrize("opts", [dict(weighted=True), dict(weighted=True, p=0.5, q=2.0),
                                  dict(weighted=False, p=2.0, q=0.5, dead_end="restart")], ids=str)
def test_same_bytes_for_any_threads_and_cut_weighted_and_second_order(planted_graph, opts):
    g = with_weights(planted_graph[0], seed=9)
    n_walks = 2 * g.n_nodes
    alias = gw.alias_table(g)
    whole = random_walks(g, 2, 15, seed=21, threads=1, **opts)
    assert whole.tobytes() == random_walks(g, 2, 15, seed=21, threads=2, alias=alias if opts["weighted"] else None,
                                           **opts).tobytes()
    cuts = [0, 1, 7, 9_999, 10_000, 13_333, n_walks]
    pieces = [walk_range(g, a, b, per_node=2, length=15, seed=21, threads=t, **opts)
              for (a, b), t in zip(zip(cuts[:-1], cuts[1:]), [1, 2, 1, 2, 1, 2])]
    assert np.concatenate(pieces).tobytes() == whole.tobytes()
    np.testing.assert_array_equal(random_walks(g, 2, 20, seed=21, **opts)[:, :15], whole)
    # and the options matter: each differs from the plain uniform corpus after the first step
    plain = random_walks(g, 2, 15, seed=21, weighted=False)
    np.testing.assert_array_equal(plain[:, 0], whole[:, 0])
    assert (plain[:, 2:] != whole[:, 2:]).mean() > 0.5


def test_memory_mapped_weighted_graph_and_alias_give_same_walks(two_cliques, tmp_path):
    g = with_weights(two_cliques)
    g.save(tmp_path / "g")
    np.save(tmp_path / "alias.npy", gw.alias_table(g))
    mapped = AdjacencyArrays.load(tmp_path / "g", mmap=True)
    alias = np.load(tmp_path / "alias.npy", mmap_mode="r")
    np.testing.assert_array_equal(random_walks(mapped, 3, 8, seed=5, p=0.5, q=2.0, alias=alias),
                                  random_walks(g, 3, 8, seed=5, p=0.5, q=2.0))


def test_memory_mapped_graph_gives_same_walks(two_cliques, tmp_path):
    two_cliques.save(tmp_path / "g")
    g = AdjacencyArrays.load(tmp_path / "g", mmap=True)
    np.testing.assert_array_equal(random_walks(g, 3, 8, seed=5), random_walks(two_cliques, 3, 8, seed=5))


def test_empty_range_and_empty_graph(path_graph):
    assert walk_range(path_graph, 3, 3, per_node=1, length=4, seed=0).shape == (0, 4)
    empty = AdjacencyArrays.from_edges([], [], n_nodes=0)
    assert random_walks(empty, 2, 4).shape == (0, 4)


# ------------------------------------------------------------------------------------------ count_visits
def test_count_visits_matches_bincount(two_cliques):
    w = random_walks(two_cliques, 4, 10, seed=8)
    w[::3, 5:] = -1
    expected = np.bincount(w[w >= 0], minlength=10)  # numpy reference
    got = count_visits(w, 10)
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, expected)


# ------------------------------------------------------------------------------------------ diagnostics
def test_visit_slope_matches_degree_slope_on_a_scale_free_graph():
    # Barabasi-Albert preferential attachment (networkx.barabasi_albert_graph, m = 3) has the power-law degree
    # distribution P(k) ~ k**-3 (Barabasi & Albert, Science 1999; exactly 2m(m+1) / (k(k+1)(k+2)), Bollobas,
    # Riordan, Spencer & Tusnady 2001; both from memory). A walk visits nodes about in proportion to their degree
    # (stationary distribution deg / 2|E|), so visit counts follow the same law: the observation DeepWalk rests
    # on (Perozzi et al. 2014, its Figure 2, from memory). Measured on this graph: both slopes -2.84..-2.86 for
    # seeds 0..3 (a finite graph's fit is a little flatter than -3).
    g = graph_from_nx(nx.barabasi_albert_graph(20_000, 3, seed=1))
    w = random_walks(g, 1, 40, seed=0)
    d = gw.walk_diagnostics(count_visits(w, g.n_nodes), g.degrees(), per_node=1)
    visit, degree = d["visit_slope"], d["degree_slope"]
    assert visit["n_bins"] >= 10 and degree["n_bins"] >= 10
    assert abs(visit["slope"] - degree["slope"]) < 0.15
    assert -3.4 < visit["slope"] < -2.5 and -3.4 < degree["slope"] < -2.5
    assert "least squares" in visit["method"]
    assert (d["n_walks"], d["n_tokens"], d["n_steps"]) == (20_000, 800_000, 780_000)
    assert d["nodes_never_visited"] == d["isolated_nodes"] == d["dead_end_nodes"] == 0
    # negative controls: Poisson degrees (networkx gnm_random_graph) and visits that ignore the graph fall off far
    # faster than any power law seen here
    er = graph_from_nx(nx.gnm_random_graph(20_000, 60_000, seed=1))
    assert gw.loglog_slope(er.degrees())["slope"] < -5
    assert gw.loglog_slope(np.random.default_rng(0).poisson(40, 20_000))["slope"] < -8


def test_diagnostics_counts(small_directed):
    # 0->1, 1->2, 2->0, 2->3 plus two isolated nodes 4, 5 (no edge in or out)
    g = AdjacencyArrays.from_edges([0, 1, 2, 2], [1, 2, 0, 3], n_nodes=6, directed=True)
    w = random_walks(g, 5, 10, seed=1, dead_end="restart")
    visits = count_visits(w, 6)
    d = gw.walk_diagnostics(visits, g.degrees(), per_node=5, in_degrees=np.bincount(g.indices, minlength=6),
                            n_restarts=gw.count_restarts(w, g))
    assert d["n_walks"] == 30 and d["n_tokens"] == int((w >= 0).sum()) == int(visits.sum())
    assert d["n_steps"] == d["n_tokens"] - 30
    assert d["n_restarts"] == gw.count_restarts(w, g) > 0
    assert d["isolated_nodes"] == 2 and d["dead_end_nodes"] == 3  # 3 has an in-edge, 4 and 5 none
    assert d["nodes_never_visited"] == 0  # every node starts walks
    assert d["nodes_never_entered"] == 2  # 4 and 5 appear only as their own starts
    json.dumps(d)  # goes into the manifest as it is
    assert gw.walk_diagnostics(np.zeros(3, int), np.zeros(3, int), per_node=1)["nodes_never_visited"] == 3
    assert gw.loglog_slope([])["slope"] is None and gw.loglog_slope([1, 2, 3])["slope"] is None


def test_diagnostics_bad_input():
    with pytest.raises(ConfigError, match=r"one value per node, got lengths 3, 2, 2"):
        gw.walk_diagnostics([1, 2, 3], [1, 1], per_node=1)
    with pytest.raises(ConfigError, match=r">= 0"):
        gw.walk_diagnostics([1, -2], [1, 1], per_node=1)
    with pytest.raises(ConfigError, match=r"per_node must be >= 1, got 0"):
        gw.walk_diagnostics([1], [1], per_node=0)


# ------------------------------------------------------------------------------------------ bad input
@pytest.mark.parametrize("kwargs, match", [
    (dict(per_node=0), r"per_node must be >= 1, got 0"),
    (dict(length=1), r"length must be >= 2, got 1"),
    (dict(seed=-1), r"seed must be >= 0, got -1"),
    (dict(seed=2**64), r"seed must be <= "),
    (dict(seed=1.5), r"seed must be an integer, got 1.5"),
    (dict(length=True), r"length must be an integer, got True"),
    (dict(threads=0), r"threads must be >= 1, got 0"),
    (dict(threads=10_000), r"threads must be <= "),
    (dict(p=0), r"p must lie in \[0.001, 1000\], got 0.0"),
    (dict(q=float("nan")), r"q must lie in \[0.001, 1000\], got nan"),
    (dict(q=1e4), r"q must lie in \[0.001, 1000\], got 10000.0"),
    (dict(p="2"), r"p must be a number, got '2'"),
    (dict(p=True), r"p must be a number, got True"),
    (dict(dead_end="loop"), r"dead_end must be one of 'stop', 'restart', got 'loop'"),
    (dict(weighted="yes"), r"weighted must be true or false, got 'yes'"),
])
def test_bad_parameters_raise(path_graph, kwargs, match):
    args = dict(per_node=2, length=5, seed=0) | kwargs
    opts = {k: args.pop(k) for k in ("threads", "weighted", "p", "q", "dead_end") if k in args}
    with pytest.raises(ConfigError, match=match):
        random_walks(path_graph, args["per_node"], args["length"], args["seed"], **opts)


def test_bad_alias_and_unsorted_graph_raise(two_cliques, path_graph):
    g = with_weights(two_cliques)
    with pytest.raises(ConfigError, match=r"alias must be alias_table\(graph\): uint64 of shape \(42,\), got int64"):
        random_walks(g, 1, 5, alias=np.zeros(g.n_edges, np.int64))
    with pytest.raises(ConfigError, match=r"alias was given but the walks are unweighted"):
        random_walks(g, 1, 5, weighted=False, alias=gw.alias_table(g))
    with pytest.raises(ConfigError, match=r"graph has no edge weights"):
        gw.alias_table(path_graph)
    with pytest.raises(ConfigError, match=r"out must be a writeable C-contiguous uint64 array of shape \(42,\)"):
        gw.alias_table(g, out=np.zeros(3, np.uint64))
    bad = AdjacencyArrays(g.indptr, g.indices, np.where(np.arange(g.n_edges) == 3, 0, g.weights).astype(np.float32))
    with pytest.raises(ConfigError, match=r"weights must be finite and > 0"):
        random_walks(bad, 1, 5)
    # rows not sorted: fine for first-order walks, refused for second-order ones (their edge test bisects rows)
    rows = AdjacencyArrays.from_arrays([0, 2, 3, 4], [2, 1, 0, 0])
    assert random_walks(rows, 1, 4, seed=0).shape == (3, 4)
    with pytest.raises(ConfigError, match=r"sorted ascending; node 0 is not"):
        random_walks(rows, 1, 4, p=2.0)


def test_bad_range_and_graph_raise(path_graph):
    with pytest.raises(ConfigError, match=r"stop must be <= 10, got 11"):
        walk_range(path_graph, 0, 11, per_node=2, length=5, seed=0)
    with pytest.raises(ConfigError, match=r"stop must be >= 4, got 3"):
        walk_range(path_graph, 4, 3, per_node=2, length=5, seed=0)
    with pytest.raises(ConfigError, match=r"start must be >= 0, got -1"):
        walk_range(path_graph, -1, 3, per_node=2, length=5, seed=0)
    with pytest.raises(ConfigError, match=r"graph must be an AdjacencyArrays, got dict"):
        random_walks({}, 2, 5)


def test_count_visits_bad_input():
    with pytest.raises(ConfigError, match=r"got values in \[0, 5\]"):
        count_visits(np.array([[0, 5]]), 5)
    with pytest.raises(ConfigError, match=r"values in \[-2, 1\]"):
        count_visits(np.array([[-2, 1]]), 5)
    with pytest.raises(ConfigError, match=r"2-D"):
        count_visits(np.array([0, 1]), 5)
    with pytest.raises(ConfigError, match=r"dtype float64"):
        count_visits(np.zeros((2, 2)), 5)


def test_one_prefetch_hint_for_both_kernels():
    # graphkit.prefetch serves the walks (integer index) and training (row, column); a cache hint never changes
    # a result, and an index that does not match the array's dimensions is refused when the kernel compiles.
    import numba

    from graphkit.prefetch import prefetch

    @numba.njit
    def touch(a, m, i, r, c):
        prefetch(a, i)
        prefetch(m, (r, c))
        return a[i] + m[r, c]

    a, m = np.arange(6.0), np.arange(12, dtype=np.float32).reshape(3, 4)
    assert touch(a, m, 4, 2, 1) == 4.0 + 9.0
    assert gw._prefetch is prefetch

    @numba.njit
    def wrong(m):
        prefetch(m, 1)

    with pytest.raises(numba.core.errors.TypingError):
        wrong(m)
