"""Benchmark: the ingest of a big Parquet edge table (issue 14, item 6: input discovery must not slow it down).

Writes a fictional transfers table (senders and receivers among 200k accounts, a positive amount) of ``--edges``
rows as one Parquet file, as a hive-partitioned folder of the same rows (``day=.../part-0.parquet``, 8 days) and,
with ``--input csv``, as one CSV file,
then times, each in a fresh state (the per-process row-check cache emptied):

* the preflight (``validate_edge_tables``: discovery, footers and the one scan of the rows),
* the ingest (``ingest_tables``: discovery, the row checks and the DuckDB ingest into CSR arrays).

Run by hand:  .venv/bin/python tests/bench/bench_ingest.py [--edges 2000000] [--repeat 3]
It only uses the public functions, so the same script times an older commit checked out elsewhere.
"""

from __future__ import annotations

import argparse
import resource
import statistics
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import graphkit
from graphkit import ingest as gi
from graphkit.errors import GraphDataWarning
from graphkit.ingest import EdgeTable, ingest_tables, validate_edge_tables


def write_inputs(folder: Path, n_edges: int, n_accounts: int = 200_000, n_days: int = 8,
                 csv: bool = False) -> tuple[Path, Path, Path | None]:
    rng = np.random.default_rng(14)
    sender = rng.integers(0, n_accounts, n_edges)
    receiver = rng.integers(0, n_accounts, n_edges)
    amount = rng.uniform(1.0, 500.0, n_edges)
    one = folder / "transfers.parquet"
    pq.write_table(pa.table({"sender": sender, "receiver": receiver, "amount": amount}), one)
    text = None
    if csv:
        import pyarrow.csv as pcsv

        text = folder / "transfers.csv"
        pcsv.write_csv(pa.table({"sender": sender, "receiver": receiver, "amount": amount}), text)
    parts = folder / "transfers"
    day = rng.integers(0, n_days, n_edges)
    for d in range(n_days):
        keep = day == d
        (parts / f"day=2026-11-{d + 1:02d}").mkdir(parents=True)
        pq.write_table(pa.table({"sender": sender[keep], "receiver": receiver[keep], "amount": amount[keep]}),
                       parts / f"day=2026-11-{d + 1:02d}" / "part-0.parquet")
    return one, parts, text


def timed(fn, repeat: int) -> tuple[list[float], list[float]]:
    """Wall and CPU seconds (all threads of the process) of each call; CPU time moves less on a shared machine."""
    wall, cpu = [], []
    for _ in range(repeat):
        gi._CHECKED.clear()
        if hasattr(gi, "_discover"):  # the discovery cache, where there is one
            from graphkit import discover as gd
            gd._DISCOVERED.clear()
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return wall, cpu


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--edges", type=int, default=2_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--input", choices=("file", "hive", "both", "csv"), default="both",
                    help="which input to time (one per process gives a peak memory figure for it alone)")
    args = ap.parse_args(argv)
    print(f"graphkit from {Path(graphkit.__file__).parent}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        one, parts, text = write_inputs(tmp, args.edges, csv=args.input == "csv")
        inputs = {"file": [("one file", one)], "hive": [("hive folder", parts)], "csv": [("one CSV", text)],
                  "both": [("one file", one), ("hive folder", parts)]}[args.input]
        for name, path in inputs:
            tables = [EdgeTable(str(path), "sender", "receiver", "amount")]
            pre, _ = timed(lambda: validate_edge_tables(tables), args.repeat)

            def ingest():
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", GraphDataWarning)
                    return ingest_tables(tables, tmp / "out", threads=2)

            ing, cpu = timed(ingest, args.repeat)
            print(f"{name:12s} {args.edges:,} edges: preflight best {min(pre):.2f} s (median "
                  f"{statistics.median(pre):.2f}), ingest best {min(ing):.2f} s (median {statistics.median(ing):.2f}),"
                  f" ingest CPU best {min(cpu):.2f} s (median {statistics.median(cpu):.2f})")
        # the process's peak, input generation included (about the same for every commit timed)
        print(f"peak RSS of the process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB")


if __name__ == "__main__":
    main()
