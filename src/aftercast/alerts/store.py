"""Reading and writing alerts and their transitions, in bulk, inside the caller's transaction.

The cycle stage loads the alerts a cycle concerns, hands them to the pure lifecycle and writes
back what changed (one executemany of updates, one bulk insert of new alerts and one of
transitions). Acknowledge and snooze from the command line (and later the API) go through
`set_attention`, which records each change as a transition with the person's name. On
PostgreSQL the alert stage holds a transaction-scoped advisory lock, so two replicas running a
cycle at once take turns instead of both raising the same alert; `set_attention` takes the same
lock, so an acknowledgement never lands on a state a cycle is rewriting.
"""

from __future__ import annotations

import json
import time
from collections.abc import Sequence
from typing import Any

import pandas as pd
from sqlalchemy import Connection, Engine, bindparam, select, text, update

from aftercast.alerts.lifecycle import ACKNOWLEDGED, ALERT_COLUMNS, OPEN_STATES, RAISED, Advance
from aftercast.errors import AftercastError
from aftercast.notify.base import jsonable
from aftercast.store.bulk import allocate_ids, insert_frame, is_postgres, read_frame, stage_keys
from aftercast.store.db import write
from aftercast.store.schema_alerts import alert_transitions, alerts

ALERT_LOCK_KEY = 0x61667465  # "afte": the advisory lock that serialises alert stages
ATTENTION_EVENTS = {"acknowledge": "acknowledged", "snooze": "snoozed", "unsnooze": "unsnoozed"}
_EPOCHS = ["since_at", "raised_at", "cleared_at", "notified_at", "acknowledged_at"]


def lock_alert_stage(connection: Connection) -> None:
    """Make concurrent alert stages (several replicas) queue; SQLite's write lock already does."""
    if is_postgres(connection):
        connection.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": ALERT_LOCK_KEY})


def _decode(frame: pd.DataFrame) -> pd.DataFrame:
    frame["evidence"] = [json.loads(e) if e else {} for e in frame["evidence"]]
    return frame


def load_alerts(connection: Connection, evaluated: pd.DataFrame) -> pd.DataFrame:
    """Open alerts, plus cleared ones that may reopen (same series and model as a met rule)."""
    columns = ", ".join(ALERT_COLUMNS)
    states = ", ".join(f"'{s}'" for s in OPEN_STATES)
    current = read_frame(connection, f"SELECT {columns} FROM alerts WHERE state IN ({states})")
    met = evaluated.loc[evaluated["met"].astype(bool), ["series_id", "model_id"]]
    if not met.empty:
        staged = stage_keys(connection, "alert_keys", met.drop_duplicates())
        closed = read_frame(
            connection,
            f"SELECT {', '.join('a.' + c for c in ALERT_COLUMNS)} FROM alerts a JOIN {staged} k "
            "ON k.series_id = a.series_id AND k.model_id = a.model_id WHERE a.state = 'cleared'",
        )
        current = pd.concat([current, closed], ignore_index=True) if len(closed) else current
    if current.empty:
        return pd.DataFrame(columns=ALERT_COLUMNS)
    return _decode(current)


def _plain(frame: pd.DataFrame) -> pd.DataFrame:
    """Alert rows as the table stores them: JSON evidence, whole epoch seconds, None for NaN."""
    out = frame.copy()
    out["evidence"] = [json.dumps(jsonable(e or {}), allow_nan=False) for e in out["evidence"]]
    out["summary"] = out["summary"].fillna("")
    for column in [*_EPOCHS, "snoozed_until"]:
        # Plain ints and None as objects: drivers bind those, not pandas' NA.
        whole = pd.to_numeric(out[column]).round().astype("Int64").astype(object)
        out[column] = whole.where(whole.notna(), None)
    for column in ("met_streak", "unmet_streak", "episode", "series_id", "model_id"):
        out[column] = out[column].astype("int64")
    return out


def save_advance(
    connection: Connection, advance: Advance, cycle_id: int | None, now: int
) -> pd.Series:
    """Write the advanced alerts and their transitions; returns alert id by fingerprint."""
    rows = _plain(advance.alerts).assign(cycle_id=cycle_id, updated_at=now)
    new = rows["id"].isna().to_numpy()
    rows.loc[new, "id"] = allocate_ids(connection, alerts, int(new.sum()))
    rows["id"] = rows["id"].astype("int64")
    if new.any():
        insert_frame(connection, alerts, rows.loc[new])
    old = rows.loc[~new]
    if len(old):
        changing = [c for c in rows.columns if c not in ("id", "fingerprint")]
        statement = (
            update(alerts)
            .where(alerts.c.id == bindparam("_id"))
            .values({c: bindparam(c) for c in changing})
        )
        records = old.astype(object).where(old.notna(), None).to_dict("records")
        connection.execute(statement, [{**r, "_id": r["id"]} for r in records])
    ids = rows.set_index("fingerprint")["id"]
    record_transitions(connection, advance.transitions, ids, cycle_id, now, actor="cycle")
    return ids


def record_transitions(
    connection: Connection,
    transitions: pd.DataFrame,
    ids: pd.Series,
    cycle_id: int | None,
    at: int,
    actor: str,
) -> None:
    """Append transitions (fingerprint, event, from_state, to_state, note, evidence)."""
    if transitions.empty:
        return
    frame = pd.DataFrame(
        {
            "alert_id": ids.reindex(transitions["fingerprint"]).to_numpy(dtype="int64"),
            "cycle_id": cycle_id,
            "at": at,
            "recorded_at": int(time.time()),
            "event": transitions["event"].to_numpy(),
            "from_state": transitions["from_state"].to_numpy(),
            "to_state": transitions["to_state"].to_numpy(),
            "actor": actor,
            "note": transitions["note"].fillna("").to_numpy(),
            "evidence": [
                json.dumps(jsonable(e or {}), allow_nan=False) for e in transitions["evidence"]
            ],
        }
    )
    insert_frame(connection, alert_transitions, frame)


def find_alert_ids(
    connection: Connection,
    ids: Sequence[int],
    series: str | None = None,
    rule: str | None = None,
) -> list[int]:
    """Open alerts chosen by id, or by series key (and rule); an unknown id is an error."""
    query = select(alerts.c.id, alerts.c.state)
    if ids:
        query = query.where(alerts.c.id.in_(list(ids)))
    else:
        sql = "SELECT a.id, a.state FROM alerts a JOIN series s ON s.id = a.series_id WHERE "
        sql += "s.key = :series" + (" AND a.rule = :rule" if rule else "")
        found = read_frame(connection, sql, {"series": series, "rule": rule})
        return found.loc[found["state"].isin(OPEN_STATES), "id"].astype(int).tolist()
    found = pd.DataFrame(connection.execute(query).all(), columns=["id", "state"])
    missing = sorted(set(ids) - set(found["id"].astype(int)))
    if missing:
        raise AftercastError(f"no alert with id {missing[0]}; `aftercast alerts` lists them")
    return found["id"].astype(int).tolist()


def set_attention(
    engine: Engine,
    ids: Sequence[int],
    action: str,
    actor: str,
    now: int,
    until: int | None = None,
    note: str = "",
) -> int:
    """Acknowledge, snooze or unsnooze alerts, each recorded as a transition; returns the count.

    Only raised alerts can be acknowledged and only open ones snoozed or unsnoozed (the others
    are left alone and not counted). On PostgreSQL it waits for the alert
    stage's lock first, so it reads the state a running cycle leaves, never one it is replacing.
    """
    with write(engine) as connection:
        lock_alert_stage(connection)
        staged = stage_keys(connection, "attention", pd.DataFrame({"id": list(ids)}))
        rows = read_frame(
            connection, f"SELECT a.id, a.state FROM alerts a JOIN {staged} k ON k.id = a.id"
        )
        if action == "acknowledge":
            rows = rows.loc[rows["state"] == RAISED]
            changes: dict[str, Any] = {
                "acknowledged_by": actor,
                "acknowledged_at": now,
                "state": ACKNOWLEDGED,
            }
        elif action == "snooze":
            rows = rows.loc[rows["state"].isin(OPEN_STATES)]  # a cleared alert has nothing to hold
            changes = {"snoozed_until": until, "snoozed_by": actor}
        else:
            rows = rows.loc[rows["state"].isin(OPEN_STATES)]
            changes = {"snoozed_until": None, "snoozed_by": None}
        if rows.empty:
            return 0
        chosen = rows["id"].astype("int64")
        connection.execute(
            update(alerts).where(alerts.c.id.in_(chosen.tolist())).values(**changes, updated_at=now)
        )
        transitions = pd.DataFrame(
            {
                "fingerprint": chosen.to_numpy(),
                "event": ATTENTION_EVENTS[action],
                "from_state": rows["state"].to_numpy(),
                "to_state": changes.get("state") or rows["state"].to_numpy(),
                "note": note,
                "evidence": [{"until": until} if until is not None else {}] * len(rows),
            }
        )
        record_transitions(connection, transitions, chosen.set_axis(chosen), None, now, actor)
        return len(rows)
