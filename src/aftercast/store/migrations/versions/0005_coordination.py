"""Coordination of several replicas: shard_leases, replicas, shard_cycles; pairs by scored_at.

The fleet-wide stages of a slot find the keys the shards touched by the time they were scored.

Revision ID: 0005_coordination
Revises: 0001
"""

from alembic import op

from aftercast.store.schema import metadata
from aftercast.store.schema_coordination import COORDINATION_TABLES

revision = "0005_coordination"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    tables = [metadata.tables[name] for name in COORDINATION_TABLES]
    metadata.create_all(bind=op.get_bind(), tables=tables)
    op.create_index("ix_pairs_scored_at", "pairs", ["scored_at"])


def downgrade() -> None:
    op.drop_index("ix_pairs_scored_at", table_name="pairs")
    tables = [metadata.tables[name] for name in COORDINATION_TABLES]
    metadata.drop_all(bind=op.get_bind(), tables=tables)
