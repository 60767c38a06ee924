"""The catalogue of interval levels that pairs are scored at (`interval_levels`).

Detection reads each level's interval measures as columns of the pair's row, which needs
the levels up front; matching registers a level when it first scores one. The upgrade fills
the catalogue from the pairs already scored; the downgrade drops it.

Revision ID: 0008_interval_levels
Revises: 0007_packed_bounds
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0008_interval_levels"
down_revision = "0007_packed_bounds"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table("interval_levels", sa.Column("level", sa.Float, primary_key=True))
    op.execute("INSERT INTO interval_levels (level) SELECT DISTINCT level FROM pair_intervals")


def downgrade() -> None:
    op.drop_table("interval_levels")
