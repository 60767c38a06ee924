"""Initial schema: series, forecasts, actuals with history, pairs, quarantine, ingest log.

Revision ID: 0001
Revises:
"""

from alembic import op

from aftercast.store.schema import INITIAL_TABLES, metadata

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    tables = [metadata.tables[name] for name in INITIAL_TABLES]
    metadata.create_all(bind=op.get_bind(), tables=tables)


def downgrade() -> None:
    tables = [metadata.tables[name] for name in INITIAL_TABLES]
    metadata.drop_all(bind=op.get_bind(), tables=tables)
