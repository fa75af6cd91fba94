"""Generate the demo data: a month of transfers in a fictional peer-to-peer payments app.

The scenario is our own. About 3,000 accounts belong to 12 "circles" (people who mostly pay each other: flatmates,
colleagues, a sports club); most transfers stay inside a circle. Four small rings of accounts pass money around in
dense cycles, as a fraud ring might, with a few transfers out to random accounts. The table is messy on purpose, as
production tables are: repeated transfers between the same pair (merged at ingest), a few transfers from an account
to itself (self-loops, dropped) and a few with no receiver (null ids, dropped).

Writes ``transfers.parquet`` (sender, receiver, amount, sent_at) and ``labels.parquet`` (account, label; ring
members carry two labels) next to this script. Fixed seed: running it again gives the same files.

Run: ``python sample_parquet/make_demo.py``
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

SEED = 20261201
N_CIRCLES = 12
CIRCLE_SIZE = 250
N_RINGS = 4
RING_SIZE = 8
TRANSFERS_PER_ACCOUNT = 8
INSIDE_SHARE = 0.8


def account_id(i: int) -> str:
    return f"acct-{i:05d}"


def make_demo(out_dir: Path = Path(__file__).resolve().parent, seed: int = SEED) -> dict[str, int]:
    rng = np.random.default_rng(seed)
    n = N_CIRCLES * CIRCLE_SIZE
    # shuffle account numbers so that circles are not contiguous id ranges
    acct = rng.permutation(n) + 10_000
    circle = np.repeat(np.arange(N_CIRCLES), CIRCLE_SIZE)

    senders, receivers = [], []
    n_tx = n * TRANSFERS_PER_ACCOUNT // 2
    s = rng.integers(0, n, n_tx)
    inside = rng.random(n_tx) < INSIDE_SHARE
    r_inside = circle[s] * CIRCLE_SIZE + rng.integers(0, CIRCLE_SIZE, n_tx)
    r_any = rng.integers(0, n, n_tx)
    r = np.where(inside, r_inside, r_any)
    senders.append(s)
    receivers.append(r)

    # rings: members drawn from different circles, money passed around a cycle several times plus shortcuts
    ring_members = rng.choice(n, size=(N_RINGS, RING_SIZE), replace=False)
    for members in ring_members:
        for _ in range(6):
            senders.append(members)
            receivers.append(np.roll(members, -1))
        a = rng.choice(members, 20)
        b = rng.choice(members, 20)
        senders.append(a)
        receivers.append(b)
        senders.append(rng.choice(members, 6))
        receivers.append(rng.integers(0, n, 6))
    s = np.concatenate(senders)
    r = np.concatenate(receivers)

    # repeated payments between the same pair happen in real tables: repeat a share of rows
    rep = rng.choice(s.size, size=s.size // 10, replace=False)
    s = np.concatenate([s, s[rep]])
    r = np.concatenate([r, r[rep]])
    # a few self-transfers (self-loops) remain even where the app forbids them
    loops = rng.integers(0, n, 12)
    s = np.concatenate([s, loops])
    r = np.concatenate([r, loops])

    sender = np.array([account_id(acct[i]) for i in s], dtype=object)
    receiver = np.array([account_id(acct[i]) for i in r], dtype=object)
    missing = rng.choice(sender.size, size=7, replace=False)  # receivers lost by an upstream export bug
    receiver[missing] = None
    amount = np.round(np.exp(rng.normal(3.0, 1.0, sender.size)), 2) + 0.5
    start = datetime(2026, 11, 1, tzinfo=timezone.utc)
    offsets = rng.integers(0, 30 * 86400, sender.size)
    order = np.argsort(offsets, kind="stable")

    transfers = pa.table({
        "sender": pa.array(sender[order], pa.string()),
        "receiver": pa.array(receiver[order], pa.string()),
        "amount": pa.array(amount[order], pa.float64()),
        "sent_at": pa.array([start + timedelta(seconds=int(x)) for x in offsets[order]],
                            pa.timestamp("s", tz="UTC")),
    })
    pq.write_table(transfers, out_dir / "transfers.parquet", compression="zstd")

    label_acct = [account_id(acct[i]) for i in range(n)]
    label = [f"circle-{c:02d}" for c in circle]
    for k, members in enumerate(ring_members):
        label_acct += [account_id(acct[i]) for i in members]
        label += [f"ring-{k + 1}"] * RING_SIZE
    labels = pa.table({"account": pa.array(label_acct, pa.string()), "label": pa.array(label, pa.string())})
    pq.write_table(labels, out_dir / "labels.parquet", compression="zstd")
    return {"transfers": transfers.num_rows, "labels": labels.num_rows}


if __name__ == "__main__":
    print(make_demo())
