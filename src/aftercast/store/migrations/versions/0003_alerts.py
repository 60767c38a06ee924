"""Alert lifecycle and notification outbox: alerts, alert_transitions, notification_outbox.

Revision ID: 0003_alerts
Revises: 0001
"""

from alembic import op

from aftercast.store.schema import metadata
from aftercast.store.schema_alerts import ALERT_TABLES

revision = "0003_alerts"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    tables = [metadata.tables[name] for name in ALERT_TABLES]
    metadata.create_all(bind=op.get_bind(), tables=tables)


def downgrade() -> None:
    tables = [metadata.tables[name] for name in ALERT_TABLES]
    metadata.drop_all(bind=op.get_bind(), tables=tables)
