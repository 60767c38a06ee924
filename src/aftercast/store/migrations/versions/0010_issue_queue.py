"""Queue the issue periods of the forecasts waiting in the match queue for the benchmark stage.

Every production forecast now queues its (series, issue period) as kind 2 for the benchmark
stage, which no longer finds new forecasts from a per-series watermark. Forecasts ingested
before the upgrade and not yet cycled queued only their target periods (kind 0): this queues
the issue periods of the forecasts targeting those, so they still get their benchmarks.

Revision ID: 0010_issue_queue
Revises: 0001
"""

from alembic import op

revision = "0010_issue_queue"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.execute(
        "INSERT INTO match_queue (series_id, period, kind) "
        "SELECT DISTINCT f.series_id, f.issue_period, 2 FROM match_queue q JOIN forecasts f "
        "ON f.series_id = q.series_id AND f.target_period = q.period WHERE q.kind = 0 "
        "ON CONFLICT (series_id, period, kind) DO NOTHING"
    )


def downgrade() -> None:
    op.execute("DELETE FROM match_queue WHERE kind = 2")
