"""Pulled sources: per-source state with the SQL watermark, files already read, run log.

Revision ID: 0004_sources
Revises: 0001
"""

from alembic import op

from aftercast.store.schema import metadata
from aftercast.store.schema_sources import SOURCE_TABLES

revision = "0004_sources"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    tables = [metadata.tables[name] for name in SOURCE_TABLES]
    metadata.create_all(bind=op.get_bind(), tables=tables)


def downgrade() -> None:
    tables = [metadata.tables[name] for name in SOURCE_TABLES]
    metadata.drop_all(bind=op.get_bind(), tables=tables)
