"""A window mark per part of the window sums, so each part is refreshed on its own.

The three sum tables of a window (points, levels, quantiles) used to share one mark and one
transaction. Each part now has its own mark, written in the transaction that brings that
part's sums to the mark's clock, so on PostgreSQL the three parts can be refreshed side by
side (`store/parallel.py`). The stored sums stay; with no marks, the next cycle recomputes
every window from its pairs, which is what a new or redefined window gets too.

Revision ID: 0012_window_part_marks
Revises: 0006_window_fillfactor
"""

import sqlalchemy as sa
from alembic import op

from aftercast.store.schema import metadata

revision = "0012_window_part_marks"
down_revision = "0006_window_fillfactor"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.drop_table("window_marks")
    metadata.tables["window_marks"].create(bind=op.get_bind())


def downgrade() -> None:
    op.drop_table("window_marks")
    op.create_table(
        "window_marks",
        sa.Column("window_name", sa.String(64), primary_key=True),
        sa.Column("spec", sa.String(255), nullable=False),
        sa.Column("now", sa.BigInteger, nullable=False),
        sa.Column("cycle_id", sa.BigInteger, nullable=False),
        sa.Column("refreshed_at", sa.BigInteger, nullable=False),
    )
