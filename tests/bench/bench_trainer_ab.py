"""Trainer speed of two commits on one machine, in one session: is a slower training run the code or the machine?

Each side runs in its own process from its own checkout (``git worktree add --detach`` of ``--against`` in a
temporary folder; the working tree for the other side), builds the same uniform random graph with its own
CSR graph class (``from_edges``) and ``random_walks``, compiles on a small slice, then times ``train_vectors`` on the
whole corpus. The sides alternate (A, B, A, B, ...) so that a change of load hits both; the load average is printed
beside each run. Run by hand, not by the test suite::

    .venv/bin/python tests/bench/bench_trainer_ab.py --against b7af78b --nodes 200k --rounds 2
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

CHILD = r"""
import sys, time
import numpy as np
import graphkit.graph as gg
from graphkit.walks import random_walks
from graphkit.train import train_vectors
n, per_node, length, dim = (int(a) for a in sys.argv[1:5])
rng = np.random.default_rng(0)
src, dst = rng.integers(0, n, n * 10), rng.integers(0, n, n * 10)
graph_class = getattr(gg, "AdjacencyArrays", None) or getattr(gg, "SparseGraph")  # the class's name before 2026-12-04
walks = random_walks(graph_class.from_edges(src, dst, n_nodes=n), per_node, length, seed=0)
train_vectors(walks[:2000], n, dim=dim)  # compile (or load the cache) outside the clock
t0 = time.perf_counter()
train_vectors(walks, n, dim=dim)
seconds = time.perf_counter() - t0
print(walks.size, seconds)
"""


def parse_size(text: str) -> int:
    text = text.strip().lower()
    scale = {"k": 1_000, "m": 1_000_000}.get(text[-1:], 1)
    return int(float(text[:-1] if scale > 1 else text) * scale)


def run_side(checkout: Path, args) -> tuple[int, float]:
    env = {**os.environ, "PYTHONPATH": str(checkout)}
    out = subprocess.run([sys.executable, "-c", CHILD, str(args.nodes), str(args.per_node), str(args.length),
                          str(args.dim)], env=env, cwd=checkout, capture_output=True, text=True, check=True)
    tokens, seconds = out.stdout.split()
    return int(tokens), float(seconds)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--against", required=True, help="the other commit (e.g. the last one measured faster)")
    p.add_argument("--nodes", type=parse_size, default=200_000)
    p.add_argument("--per-node", type=int, default=2)
    p.add_argument("--length", type=int, default=40)
    p.add_argument("--dim", type=int, default=128)
    p.add_argument("--rounds", type=int, default=2)
    args = p.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="graphkit-ab-") as tmp:
        other = Path(tmp) / "other"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(other), args.against],
                       check=True, capture_output=True)
        try:
            sides = [(args.against, other), ("working tree", ROOT)]
            rates: dict[str, list[float]] = {name: [] for name, _ in sides}
            for r in range(args.rounds):
                for name, checkout in sides:
                    tokens, seconds = run_side(checkout, args)
                    rates[name].append(tokens / seconds)
                    print(f"round {r + 1}: {name}: {tokens / seconds / 1e6:.3f}M tokens/s ({seconds:.1f} s), "
                          f"load average {os.getloadavg()[0]:.2f}", flush=True)
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(other)], check=False)
    a, b = (sum(v) / len(v) for v in rates.values())
    print(f"mean: {args.against} {a / 1e6:.3f}M, working tree {b / 1e6:.3f}M tokens/s; "
          f"working tree / {args.against} = {b / a:.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
