"""Window sums per key and window marks, kept by the cycle's windows stage.

Revision ID: 0002_windows
Revises: 0001
"""

from alembic import op

from aftercast.store.schema import metadata
from aftercast.store.schema_windows import WINDOW_TABLES

revision = "0002_windows"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    tables = [metadata.tables[name] for name in WINDOW_TABLES]
    metadata.create_all(bind=op.get_bind(), tables=tables)


def downgrade() -> None:
    tables = [metadata.tables[name] for name in WINDOW_TABLES]
    metadata.drop_all(bind=op.get_bind(), tables=tables)
