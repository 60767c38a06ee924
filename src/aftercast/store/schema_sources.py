"""Tables the pulled sources keep: per-source state, files already read, and a run log.

`source_state` holds one row per configured source name: the SQL watermark (JSON text that keeps
its type), when it was last tried and last succeeded, the last error and how many pulls in a row
failed (what freshness alerts and `/metrics` read). `source_files` lists every file a folder
source has read, by content hash, so a file is read once whatever its name. `source_runs` is one
row per pull, for the status pages and for looking back at what a source delivered.
"""

from __future__ import annotations

from sqlalchemy import BigInteger, Column, Float, Index, Integer, SmallInteger, String, Table, Text

from aftercast.store.schema import Id, metadata

source_state = Table(
    "source_state",
    metadata,
    Column("name", String(100), primary_key=True),
    Column("type", String(16), nullable=False),
    Column("kind", String(16), nullable=False),
    Column("watermark", Text),
    Column("last_attempt_at", BigInteger),
    Column("last_success_at", BigInteger),
    Column("last_error", Text),
    Column("consecutive_failures", Integer, nullable=False, default=0),
)

source_files = Table(
    "source_files",
    metadata,
    Column("source", String(100), primary_key=True),
    Column("content_hash", String(64), primary_key=True),
    Column("path", Text, nullable=False),
    Column("outcome", String(16), nullable=False),  # ingested | unreadable
    Column("detail", Text),
    Column("processed_at", BigInteger, nullable=False),
)

source_runs = Table(
    "source_runs",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("source", String(100), nullable=False),
    Column("cycle_id", BigInteger),  # the cycle that pulled it, null for a scheduled pull
    Column("started_at", BigInteger, nullable=False),
    Column("seconds", Float, nullable=False, default=0.0),
    Column("ok", SmallInteger, nullable=False),
    Column("batches", Integer, nullable=False, default=0),
    Column("accepted", BigInteger, nullable=False, default=0),
    Column("rejected", BigInteger, nullable=False, default=0),
    Column("unchanged", BigInteger, nullable=False, default=0),
    Column("attempts", Integer, nullable=False, default=1),
    Column("error", Text),
    Index("ix_source_runs_source", "source", "started_at"),
)

SOURCE_TABLES = ("source_state", "source_files", "source_runs")
