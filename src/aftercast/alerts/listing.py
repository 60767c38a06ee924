"""Alerts as people read them: for `aftercast alerts`, the API and the status pages.

Each row names the series and model by their own keys, says the lifecycle state, since when,
who acknowledged or snoozed it, the latest evidence, and how its latest notification fared
(delivered, retrying with the reason, or dead; a failing one is shown before a later success
on another channel), so a channel that fails is visible where the alerts are. Nothing here
ever holds a channel's configuration, so no secret can show.
"""

from __future__ import annotations

import json
import time
from typing import Any

import pandas as pd
from sqlalchemy import Connection

from aftercast.alerts.lifecycle import ACKNOWLEDGED, OPEN_STATES, RAISED, snooze_running
from aftercast.periods import to_iso
from aftercast.store.bulk import read_frame

_SELECT = (
    "SELECT a.id, s.key AS series_id, m.name AS model, a.horizon, a.rule, a.state, a.severity, "
    "a.since_at, a.raised_at, a.cleared_at, a.episode, a.acknowledged_by, a.acknowledged_at, "
    "a.snoozed_until, a.snoozed_by, a.statistic, a.p_value, a.summary, a.evidence, "
    "o.status AS notification_status, o.attempts AS notification_attempts, "
    "o.detail AS notification_detail "
    "FROM alerts a JOIN series s ON s.id = a.series_id JOIN models m ON m.id = a.model_id "
    # The alert's failing notification if it has one (retrying or dead), else its latest.
    "LEFT JOIN (SELECT l.alert_id, MAX(n.id) AS latest_id, MAX(CASE WHEN n.status = 'dead' "
    "OR (n.status = 'pending' AND n.attempts > 0) THEN n.id END) AS failing_id "
    "FROM outbox_alerts l JOIN notification_outbox n ON n.id = l.outbox_id "
    "GROUP BY l.alert_id) sent ON sent.alert_id = a.id "
    "LEFT JOIN notification_outbox o ON o.id = COALESCE(sent.failing_id, sent.latest_id)"
)
_TIMES = ("since_at", "raised_at", "cleared_at", "acknowledged_at", "snoozed_until")


def _clean(value: Any) -> Any:
    if value is None or (isinstance(value, float) and pd.isna(value)):
        return None
    if hasattr(value, "item"):  # numpy scalars
        return value.item()
    return value


def alert_rows(
    connection: Connection, include_cleared: bool = False, now: int | None = None
) -> list[dict[str, Any]]:
    """Alerts, worst first; open ones only unless `include_cleared`.

    Each row: id, series_id, model, horizon, rule, state, active (raised or acknowledged),
    severity, opened_at (start of the run of cycles that raised it), raised_at, cleared_at,
    acknowledged_by/at, snoozed_until/by, snoozed (a snooze that a cycle at `now`, default the
    clock, still honours: one ending within the cycle slack is over), statistic, p_adjusted
    (the fleet-adjusted p-value the rule read), summary, evidence (with the test's raw
    `p_value`) and the latest notification's status, attempts and detail.
    """
    states = OPEN_STATES if not include_cleared else (*OPEN_STATES, "cleared")
    marks = ", ".join(f":s{i}" for i in range(len(states)))
    frame = read_frame(
        connection,
        f"{_SELECT} WHERE a.state IN ({marks}) ORDER BY a.id",
        {f"s{i}": s for i, s in enumerate(states)},
    )
    rank = {"critical": 0, "warning": 1, "info": 2}
    frame = frame.assign(_r=frame["severity"].map(rank).fillna(3)).sort_values(
        ["_r", "p_value", "series_id"], na_position="last", kind="stable"
    )
    clock = int(time.time()) if now is None else now
    rows = []
    for record in frame.drop(columns="_r").to_dict("records"):
        row = {k: _clean(v) for k, v in record.items()}
        row["snoozed"] = bool(snooze_running(row["snoozed_until"], clock))
        for name in _TIMES:
            row[name] = to_iso(row[name])
        row["opened_at"] = row.pop("since_at")
        row["active"] = row["state"] in (RAISED, ACKNOWLEDGED)
        row["evidence"] = json.loads(row["evidence"] or "{}")
        # The alert's own p-value is the fleet-adjusted one; the test's raw p-value stays in the
        # evidence (`evidence.p_value`, beside `evidence.p_adjusted`), so the names cannot mix.
        row["p_adjusted"] = row.pop("p_value")
        rows.append(row)
    return rows


def transitions_of(connection: Connection, alert_id: int) -> list[dict[str, Any]]:
    """Every recorded change of one alert, oldest first: time, event, states, actor, evidence."""
    frame = read_frame(
        connection,
        "SELECT at, event, from_state, to_state, actor, note, evidence, cycle_id "
        "FROM alert_transitions WHERE alert_id = :a ORDER BY id",
        {"a": alert_id},
    )
    rows = []
    for record in frame.to_dict("records"):
        row = {k: _clean(v) for k, v in record.items()}
        row["at"] = to_iso(row["at"])
        row["evidence"] = json.loads(row["evidence"] or "{}")
        rows.append(row)
    return rows
