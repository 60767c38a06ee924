"""Window sum tables leave room on each page, so the daily update of every row stays in place.

A `days` window moves forward by updating every key's sums each cycle. With full pages each
update writes the new row version to another page and a new entry in the primary-key index;
with free room on the page PostgreSQL updates in place (a heap-only tuple) and leaves the
index alone, which halved the windows stage at 10,000 series (bench/bench_postgres.py).
SQLite has no such setting: nothing to do there.

Revision ID: 0006_window_fillfactor
Revises: 0002_windows
"""

from alembic import op

revision = "0006_window_fillfactor"
down_revision = "0002_windows"
branch_labels = None
depends_on = None

TABLES = ("window_point_sums", "window_level_sums", "window_quantile_sums")
FILLFACTOR = 45  # just under half: an updated row fits beside the old one on its page


def upgrade() -> None:
    if op.get_bind().dialect.name != "postgresql":
        return
    for table in TABLES:
        op.execute(f"ALTER TABLE {table} SET (fillfactor = {FILLFACTOR})")


def downgrade() -> None:
    if op.get_bind().dialect.name != "postgresql":
        return
    for table in TABLES:
        op.execute(f"ALTER TABLE {table} RESET (fillfactor)")
