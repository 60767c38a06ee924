"""Tables of the alert lifecycle and of the notification outbox.

`alerts` holds one row per fingerprint (rule, series, model, horizon bucket): its current state,
the streak counters hysteresis needs and who acknowledged or snoozed it. A fingerprint that
clears and later trips again reopens the same row, so there is never more than one alert for
one problem. `alert_transitions` keeps every change of state with its time, actor and evidence,
and is never updated. `notification_outbox` is the transactional outbox: rows are written in the
same transaction as the state changes they announce and sent later by the deliverer, which
claims them with a lease (`claimed_by`, `claimed_until`) so several replicas can share the work;
`outbox_alerts` says which alerts each notification carries.
"""

from __future__ import annotations

from sqlalchemy import BigInteger, Column, Float, Index, Integer, String, Table, Text

from aftercast.store.schema import Id, metadata

alerts = Table(
    "alerts",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("fingerprint", String(255), nullable=False, unique=True),
    Column("rule", String(64), nullable=False),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("horizon", String(16), nullable=False),  # bucket: "1", "2-7", "15+" or "all"
    Column("state", String(16), nullable=False),  # pending | raised | acknowledged | cleared
    Column("severity", String(16), nullable=False),
    Column("met_streak", Integer, nullable=False),
    Column("unmet_streak", Integer, nullable=False),
    Column("episode", Integer, nullable=False),  # how many times it has been raised
    Column("since_at", BigInteger),  # start of the current run of cycles meeting the rule
    Column("raised_at", BigInteger),
    Column("cleared_at", BigInteger),
    Column("notified_at", BigInteger),  # last message of this episode; null: nobody told yet
    Column("acknowledged_by", String(128)),
    Column("acknowledged_at", BigInteger),
    Column("snoozed_until", BigInteger),
    Column("snoozed_by", String(128)),
    Column("statistic", Float),
    Column("p_value", Float),
    Column("summary", Text, nullable=False, default=""),
    Column("evidence", Text, nullable=False, default="{}"),
    Column("cycle_id", BigInteger),
    Column("updated_at", BigInteger, nullable=False),
    Index("ix_alerts_state", "state"),
    Index("ix_alerts_series", "series_id", "model_id"),
)

alert_transitions = Table(
    "alert_transitions",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("alert_id", BigInteger, nullable=False),
    Column("cycle_id", BigInteger),  # null for changes made by a person
    Column("at", BigInteger, nullable=False),  # evaluation clock of the cycle, or wall clock
    Column("recorded_at", BigInteger, nullable=False),
    Column("event", String(16), nullable=False),
    Column("from_state", String(16)),
    Column("to_state", String(16), nullable=False),
    Column("actor", String(128), nullable=False),
    Column("note", Text, nullable=False, default=""),
    Column("evidence", Text, nullable=False, default="{}"),
    Index("ix_alert_transitions_alert", "alert_id", "id"),
)

notification_outbox = Table(
    "notification_outbox",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("notification_id", String(64), nullable=False, unique=True),  # idempotency key
    Column("channel", String(255), nullable=False),
    Column("route", String(255), nullable=False),
    Column("kind", String(16), nullable=False),
    Column("alert_count", Integer, nullable=False),
    Column("payload", Text, nullable=False),  # Notification.to_json()
    Column("status", String(16), nullable=False),  # pending | delivered | dead
    Column("attempts", Integer, nullable=False, default=0),
    Column("created_at", BigInteger, nullable=False),
    Column("due_at", BigInteger, nullable=False),
    Column("claimed_by", String(128)),
    Column("claimed_until", BigInteger),
    Column("last_attempt_at", BigInteger),
    Column("delivered_at", BigInteger),
    Column("detail", Text, nullable=False, default=""),
    Column("cycle_id", BigInteger),
    Index("ix_outbox_due", "status", "due_at"),
)

outbox_alerts = Table(
    "outbox_alerts",
    metadata,
    Column("outbox_id", BigInteger, primary_key=True),
    Column("alert_id", BigInteger, primary_key=True),
    Index("ix_outbox_alerts_alert", "alert_id"),
)

ALERT_TABLES = ("alerts", "alert_transitions", "notification_outbox", "outbox_alerts")
