"""The store's tables (SQLAlchemy Core).

Integer surrogate keys for series and models and integer epoch seconds for every instant keep
the bulk paths fast on both SQLite and PostgreSQL and make the store independent of each
dialect's time-zone handling. A forecast's interval bounds and quantiles are packed into its own
row (`bounds.py`: a layout naming the levels and a blob of their values), so any level or
quantile is stored without a schema change and without a child row per bound; a pair's
per-level measures stay in narrow child tables, so window aggregates are plain GROUP BYs.

Tables are created by Alembic revisions (see `migrations/`); a revision that adds tables lists
them by name, so earlier revisions keep creating exactly what they first created.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Column,
    Float,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    SmallInteger,
    String,
    Table,
    Text,
    UniqueConstraint,
)

# SQLite only treats INTEGER PRIMARY KEY as the rowid alias; BIGINT elsewhere.
Id = BigInteger().with_variant(Integer(), "sqlite")

metadata = MetaData()

series = Table(
    "series",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("key", String(255), nullable=False, unique=True),
    Column("frequency", String(16), nullable=False),
    Column("season", Integer, nullable=False),
    Column("timezone", String(64), nullable=False),
    Column("unit", String(64)),
    Column("labels", Text, nullable=False, default="{}"),  # JSON object of label -> value
    Column("created_at", BigInteger, nullable=False),
    Column("updated_at", BigInteger, nullable=False),
)

models = Table(
    "models",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("name", String(255), nullable=False, unique=True),
)

forecasts = Table(
    "forecasts",
    metadata,
    Column("id", Id, primary_key=True),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("issued_at", BigInteger, nullable=False),
    Column("target_at", BigInteger, nullable=False),
    Column("issue_period", BigInteger, nullable=False),
    Column("target_period", BigInteger, nullable=False),
    Column("horizon", Integer, nullable=False),
    Column("point", Float, nullable=False),
    Column("ingested_at", BigInteger, nullable=False),
    Column("bound_layout", Text),  # e.g. "80,95|10,50,90": levels | probabilities, percent
    Column("bounds", LargeBinary),  # little-endian float64 in layout order, NaN where absent
    UniqueConstraint("series_id", "model_id", "issued_at", "target_at", name="uq_forecast_key"),
    Index("ix_forecasts_target", "series_id", "target_period"),
    Index("ix_forecasts_issue", "series_id", "issue_period"),
)

actuals = Table(
    "actuals",
    metadata,
    Column("series_id", BigInteger, primary_key=True),
    Column("period", BigInteger, primary_key=True),
    Column("observed_at", BigInteger, nullable=False),
    Column("value", Float, nullable=False),
    Column("revision", Integer, nullable=False, default=0),
    Column("updated_at", BigInteger, nullable=False),
)

# Every value an actual has had, the first included: a revision never erases history.
actual_history = Table(
    "actual_history",
    metadata,
    Column("series_id", BigInteger, nullable=False),
    Column("period", BigInteger, nullable=False),
    Column("revision", Integer, nullable=False),
    Column("observed_at", BigInteger, nullable=False),
    Column("value", Float, nullable=False),
    Column("recorded_at", BigInteger, nullable=False),
    Column("batch_id", BigInteger),
    Index("ix_actual_history_key", "series_id", "period", "revision", unique=True),
)

# Work for the next cycle: (series, period) whose actual or forecasts changed since the last one.
# kind 0: a forecast targeting the period arrived or changed; kind 1: the actual changed, so
# pairs issued after it (whose scale it feeds) are rescored too; kind 2: a production forecast
# issued in the period arrived or changed, so the benchmark stage makes the benchmarks its issue
# time lacks (matching leaves kind 2 alone).
QUEUE_TARGET, QUEUE_ACTUAL, QUEUE_ISSUE = 0, 1, 2
match_queue = Table(
    "match_queue",
    metadata,
    Column("series_id", BigInteger, primary_key=True),
    Column("period", BigInteger, primary_key=True),
    Column("kind", SmallInteger, primary_key=True),
)

pairs = Table(
    "pairs",
    metadata,
    Column("forecast_id", BigInteger, primary_key=True),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("horizon", Integer, nullable=False),
    Column("issued_at", BigInteger, nullable=False),
    Column("target_at", BigInteger, nullable=False),
    Column("issue_period", BigInteger, nullable=False),
    Column("target_period", BigInteger, nullable=False),
    Column("actual", Float, nullable=False),
    Column("point", Float, nullable=False),
    Column("error", Float, nullable=False),
    Column("abs_error", Float, nullable=False),
    Column("sq_error", Float, nullable=False),
    Column("ape", Float),
    Column("sape", Float),
    Column("scale_abs", Float),
    Column("scale_sq", Float),
    Column("scaled_error", Float),
    Column("actual_revision", Integer, nullable=False),
    Column("scored_at", BigInteger, nullable=False),
    Index("ix_pairs_key_target", "series_id", "model_id", "target_at"),
    Index("ix_pairs_target", "target_at"),
    Index("ix_pairs_issue", "series_id", "issue_period"),
)

pair_intervals = Table(
    "pair_intervals",
    metadata,
    Column("forecast_id", BigInteger, primary_key=True),
    Column("level", Float, primary_key=True),
    Column("lower", Float, nullable=False),
    Column("upper", Float, nullable=False),
    Column("hit", SmallInteger, nullable=False),
    Column("width", Float, nullable=False),
    Column("interval_score", Float, nullable=False),
)

# Every interval level a pair has been scored at (a superset: a level stays listed after its
# pairs are gone). The detection read joins each level's row as columns of its pair instead of
# fetching a row per (pair, level).
interval_levels = Table(
    "interval_levels",
    metadata,
    Column("level", Float, primary_key=True),
)

pair_quantiles = Table(
    "pair_quantiles",
    metadata,
    Column("forecast_id", BigInteger, primary_key=True),
    Column("prob", Float, primary_key=True),
    Column("value", Float, nullable=False),
    Column("pinball", Float, nullable=False),
)

quarantine = Table(
    "quarantine",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("batch_id", BigInteger, nullable=False),
    Column("kind", String(16), nullable=False),  # forecasts | actuals | series
    Column("source", Text, nullable=False),
    Column("row_number", BigInteger),
    Column("reason", Text, nullable=False),
    Column("raw", Text, nullable=False),  # JSON object of the row as read
    Column("recorded_at", BigInteger, nullable=False),
    Index("ix_quarantine_batch", "batch_id"),
    # Ingesting a file again looks up its rows already quarantined (`ingest._not_yet_quarantined`).
    Index("ix_quarantine_lookup", "kind", "source", "row_number"),
)

ingest_log = Table(
    "ingest_log",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("kind", String(16), nullable=False),
    Column("source", Text, nullable=False),
    Column("content_hash", String(64)),
    Column("accepted", BigInteger, nullable=False, default=0),
    Column("rejected", BigInteger, nullable=False, default=0),
    Column("unchanged", BigInteger, nullable=False, default=0),
    Column("started_at", BigInteger, nullable=False),
    Column("finished_at", BigInteger),
    Index("ix_ingest_log_hash", "content_hash"),
)

cycles = Table(
    "cycles",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("now", BigInteger, nullable=False),
    Column("started_at", BigInteger, nullable=False),
    Column("finished_at", BigInteger),
    Column("stats", Text, nullable=False, default="{}"),
)

# The tables revision 0001 created that are still in use (its others are frozen in the revision).
INITIAL_TABLES = (
    "series",
    "models",
    "forecasts",
    "actuals",
    "actual_history",
    "match_queue",
    "pairs",
    "pair_intervals",
    "pair_quantiles",
    "quarantine",
    "ingest_log",
    "cycles",
)
