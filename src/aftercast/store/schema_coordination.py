"""Tables that let several replicas share one store: shard leases, members and a cycle log.

Series are split into shards (see `aftercast.coordination`). `shard_leases` has one row per shard:
who holds it (`holder`), until when (`expires_at`, the database's clock in epoch seconds) and a
fencing token that grows by one at every acquisition, so a replica that lost its lease can tell
and its late writes are refused. `cycle_now` is the evaluation time of the shard's last finished
cycle, which keeps a shard from being cycled twice for one scheduled slot when it changes hands.
`replicas` lists the live members (each renews its row), from which a replica works out its fair
share of shards. `shard_cycles` records every shard cycle begun and finished, by whom, under
which token: what an operator reads to see who did what, and what the replica tests check.
"""

from __future__ import annotations

from sqlalchemy import BigInteger, Column, Index, Integer, String, Table

from aftercast.store.schema import Id, metadata

shard_leases = Table(
    "shard_leases",
    metadata,
    Column("shard", Integer, primary_key=True),
    Column("shards", Integer, nullable=False),  # the shard count the row belongs to
    Column("holder", String(255)),  # null: never taken or released
    Column("token", BigInteger, nullable=False, default=0),
    Column("acquired_at", BigInteger),
    Column("expires_at", BigInteger, nullable=False, default=0),
    Column("cycle_now", BigInteger),  # evaluation time of the last finished cycle
)

replicas = Table(
    "replicas",
    metadata,
    Column("name", String(255), primary_key=True),
    Column("started_at", BigInteger, nullable=False),
    Column("seen_at", BigInteger, nullable=False),
    Column("expires_at", BigInteger, nullable=False),
)

shard_cycles = Table(
    "shard_cycles",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("shard", Integer, nullable=False),
    Column("now", BigInteger, nullable=False),  # the cycle's evaluation time
    Column("holder", String(255), nullable=False),
    Column("token", BigInteger, nullable=False),
    Column("cycle_id", BigInteger),
    Column("started_at", BigInteger, nullable=False),
    Column("finished_at", BigInteger),  # null: the cycle did not finish (crash, lost lease)
    Index("ix_shard_cycles_shard_now", "shard", "now"),
)

COORDINATION_TABLES = ("shard_leases", "replicas", "shard_cycles")
