"""Benchmarks, baselines, detection findings and backtests (see `store/schema_detect.py`).

Revision ID: 0002_detect
Revises: 0001
"""

from alembic import op

from aftercast.store.schema import metadata
from aftercast.store.schema_detect import DETECT_TABLES

revision = "0002_detect"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    tables = [metadata.tables[name] for name in DETECT_TABLES]
    metadata.create_all(bind=op.get_bind(), tables=tables)


def downgrade() -> None:
    tables = [metadata.tables[name] for name in DETECT_TABLES]
    metadata.drop_all(bind=op.get_bind(), tables=tables)
