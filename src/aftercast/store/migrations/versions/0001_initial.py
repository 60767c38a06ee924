"""Initial schema: series, forecasts, actuals with history, pairs, quarantine, ingest log.

The tables this revision created and a later revision changed are frozen here as they were
first created (`forecasts` and its bound and quantile child tables, reshaped by
`0007_packed_bounds`; `quarantine`, indexed for its re-ingest lookup by
`0009_quarantine_lookup`), so upgrading an empty store replays the same history as an old store.

Revision ID: 0001
Revises:
"""

from alembic import op
from sqlalchemy import (
    BigInteger,
    Column,
    Float,
    Index,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

from aftercast.store.schema import INITIAL_TABLES, metadata

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

frozen = MetaData()
Table(
    "forecasts",
    frozen,
    Column("id", BigInteger().with_variant(Integer(), "sqlite"), primary_key=True),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("issued_at", BigInteger, nullable=False),
    Column("target_at", BigInteger, nullable=False),
    Column("issue_period", BigInteger, nullable=False),
    Column("target_period", BigInteger, nullable=False),
    Column("horizon", Integer, nullable=False),
    Column("point", Float, nullable=False),
    Column("ingested_at", BigInteger, nullable=False),
    UniqueConstraint("series_id", "model_id", "issued_at", "target_at", name="uq_forecast_key"),
    Index("ix_forecasts_target", "series_id", "target_period"),
    Index("ix_forecasts_issue", "series_id", "issue_period"),
)
Table(
    "forecast_intervals",
    frozen,
    Column("forecast_id", BigInteger, primary_key=True),
    Column("level", Float, primary_key=True),
    Column("lower", Float, nullable=False),
    Column("upper", Float, nullable=False),
)
Table(
    "forecast_quantiles",
    frozen,
    Column("forecast_id", BigInteger, primary_key=True),
    Column("prob", Float, primary_key=True),
    Column("value", Float, nullable=False),
)
Table(
    "quarantine",
    frozen,
    Column("id", BigInteger().with_variant(Integer(), "sqlite"), primary_key=True),
    Column("batch_id", BigInteger, nullable=False),
    Column("kind", String(16), nullable=False),
    Column("source", Text, nullable=False),
    Column("row_number", BigInteger),
    Column("reason", Text, nullable=False),
    Column("raw", Text, nullable=False),
    Column("recorded_at", BigInteger, nullable=False),
    Index("ix_quarantine_batch", "batch_id"),
)


def upgrade() -> None:
    bind = op.get_bind()
    frozen.create_all(bind=bind)
    tables = [metadata.tables[name] for name in INITIAL_TABLES if name not in frozen.tables]
    metadata.create_all(bind=bind, tables=tables)


def downgrade() -> None:
    bind = op.get_bind()
    tables = [metadata.tables[name] for name in INITIAL_TABLES if name not in frozen.tables]
    metadata.drop_all(bind=bind, tables=tables)
    frozen.drop_all(bind=bind)
