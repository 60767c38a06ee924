"""Index the quarantine by (kind, source, row number) for ingesting a file again.

Ingesting a file again looks up which of its rejected rows the quarantine already holds, so
each is stored once (`ingest._not_yet_quarantined`). Without an index that lookup read the
whole quarantine for every chunk with a rejected row, a cost that grew with every bad row
ever received.

Revision ID: 0009_quarantine_lookup
Revises: 0001
"""

from alembic import op

revision = "0009_quarantine_lookup"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index("ix_quarantine_lookup", "quarantine", ["kind", "source", "row_number"])


def downgrade() -> None:
    op.drop_index("ix_quarantine_lookup", table_name="quarantine")
