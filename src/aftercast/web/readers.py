"""Read queries of the API: pages of series, window rows, pairs, alerts and sources as JSON.

Each function returns plain JSON-ready values (times as ISO 8601 UTC, NaN as null) and reads
one page with one or two set-wise queries: series and alerts by `LIMIT`/`OFFSET`, pairs by the
forecast-id cursor, window rows from the fleet frame the pages share.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.periods import iso_texts, to_iso
from aftercast.report import status_json
from aftercast.store.bulk import read_frame
from aftercast.store.queries import PAIR_SELECT, intervals_for, quantiles_for
from aftercast.web.data import has_table, series_labels
from aftercast.windows import level_name

EXTRA_WINDOW_FIELDS = ("tracking_signal", "skill", "benchmark", "alert_state", "alerts_open")


def clock() -> int:
    return int(time.time())


def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows as dicts of plain Python values, NaN and NA as None."""
    if frame.empty:
        return []
    clean = frame.astype(object).where(frame.notna(), None)
    return [
        {k: (v.item() if isinstance(v, np.generic) else v) for k, v in row.items()}
        for row in clean.to_dict("records")
    ]


def series_page(
    engine: Engine, labels: dict[str, str], text: str, limit: int, offset: int
) -> tuple[list[dict[str, Any]], int]:
    frame = series_labels(engine).sort_values("key")
    keep = pd.Series(True, index=frame.index)
    for name, value in labels.items():
        column = f"label_{name}"
        keep &= frame[column].eq(value) if column in frame else False
    if text:
        keep &= frame["key"].str.contains(text, case=False, regex=False)
    chosen = frame[keep].iloc[offset : offset + limit]
    if chosen.empty:
        return [], int(keep.sum())
    with engine.connect() as connection:
        staged = read_frame(
            connection,
            "SELECT id, key, frequency, season, timezone, unit, labels FROM series "
            "WHERE id IN (" + ",".join(str(int(i)) for i in chosen["id"]) + ") ORDER BY key",
        )
    staged["labels"] = [json.loads(t) for t in staged["labels"]]
    items = records(staged.rename(columns={"key": "series_id"}).drop(columns="id"))
    return items, int(keep.sum())


def window_page(
    frame: pd.DataFrame,
    series_id: str | None,
    model: str | None,
    horizon: str | None,
    limit: int,
    offset: int,
) -> tuple[list[dict[str, Any]], int]:
    if frame.empty:
        return [], 0
    keep = pd.Series(True, index=frame.index)
    if series_id is not None:
        keep &= frame["series_id"] == series_id
    if model is not None:
        keep &= frame["model"] == model
    if horizon is not None:
        keep &= frame["horizon"].astype(str) == horizon
    chosen = frame[keep].iloc[offset : offset + limit]
    if chosen.empty:
        return [], int(keep.sum())
    items = status_json(chosen)
    extras = records(chosen[[c for c in EXTRA_WINDOW_FIELDS if c in chosen.columns]])
    return [{**row, **extra} for row, extra in zip(items, extras, strict=True)], int(keep.sum())


@dataclass(frozen=True)
class PairFilter:
    series_id: str | None = None
    model: str | None = None
    horizon: int | None = None
    since: int | None = None
    until: int | None = None

    def where(self) -> tuple[str, dict[str, Any]]:
        clauses, params = ["p.forecast_id > :after"], {}
        for column, value, name in (
            ("s.key", self.series_id, "series"),
            ("m.name", self.model, "model"),
            ("p.horizon", self.horizon, "horizon"),
        ):
            if value is not None:
                clauses.append(f"{column} = :{name}")
                params[name] = value
        if self.since is not None:
            clauses.append("p.target_at > :since")
            params["since"] = self.since
        if self.until is not None:
            clauses.append("p.target_at <= :until")
            params["until"] = self.until
        return " WHERE " + " AND ".join(clauses), params


def _nested(frame: pd.DataFrame, key: str, columns: list[str]) -> dict[int, dict[str, Any]]:
    """forecast_id -> {level name: {column: value}} for one page of pairs."""
    out: dict[int, dict[str, Any]] = {}
    for row in records(frame):
        out.setdefault(int(row["forecast_id"]), {})[level_name(float(row[key]))] = {
            c: row[c] for c in columns
        }
    return out


def pairs_page(engine: Engine, filters: PairFilter, after: int, limit: int) -> list[dict[str, Any]]:
    where, params = filters.where()
    with engine.connect() as connection:
        frame = read_frame(
            connection,
            PAIR_SELECT + where + " ORDER BY p.forecast_id LIMIT :limit",
            {**params, "after": after, "limit": limit},
        )
        if frame.empty:
            return []
        intervals = intervals_for(connection, frame["forecast_id"])
        quantiles = quantiles_for(connection, frame["forecast_id"])
    bands = _nested(intervals, "level", ["lower", "upper", "hit", "width", "interval_score"])
    probs = _nested(quantiles, "prob", ["value", "pinball"])
    for column in ("issued_at", "target_at"):
        frame[column] = iso_texts(frame[column])
    items = records(frame.drop(columns=["target_period"]))
    for item in items:
        item["intervals"] = bands.get(item["forecast_id"], {})
        item["quantiles"] = probs.get(item["forecast_id"], {})
    return items


def alerts_page(
    engine: Engine, state: str | None, series_id: str | None, limit: int, offset: int
) -> tuple[list[dict[str, Any]], int]:
    """Alert rows as `aftercast alerts --json` shows them (worst first), one page."""
    if not has_table(engine, "alerts"):
        return [], 0
    from aftercast.alerts.listing import alert_rows

    with engine.connect() as connection:
        rows = alert_rows(connection, include_cleared=state in (None, "cleared"))
    chosen = [
        r
        for r in rows
        if (state is None or r["state"] == state)
        and (series_id is None or r["series_id"] == series_id)
    ]
    return chosen[offset : offset + limit], len(chosen)


def sources(engine: Engine, config: Config) -> list[dict[str, Any]]:
    """Every configured source with its health (never-pulled ones too)."""
    from aftercast.sources.state import source_health

    health = source_health(engine, clock()) if has_table(engine, "source_state") else None
    known = {row["name"]: row for row in records(health)} if health is not None else {}
    out = []
    for settings in config.sources:
        row: dict[str, Any] = known.get(settings.name, {"name": settings.name})
        for column in ("last_attempt_at", "last_success_at"):
            value = row.get(column)
            row[column] = to_iso(int(value)) if value is not None else None
        schedule = settings.schedule.model_dump(exclude_none=True)
        out.append({**row, "type": settings.type, "kind": settings.kind, "schedule": schedule})
    return out


class AckBody(BaseModel):
    model_config = ConfigDict(extra="forbid")
    actor: str = Field("api", min_length=1, max_length=128)
    note: str = Field("", max_length=2_000)


class SnoozeBody(AckBody):
    until: str = Field(description="ISO 8601 time the snooze ends (in the future)")


def alert_action(engine: Engine, alert_id: int, action: str, body: dict[str, Any]) -> Any:
    """Acknowledge or snooze one alert through the alert store; LookupError if unknown."""
    if not has_table(engine, "alerts"):
        raise LookupError(f"no alert with id {alert_id}")
    from aftercast.alerts.store import find_alert_ids, set_attention
    from aftercast.errors import AftercastError

    now = clock()
    until = None
    if action == "snooze":
        from aftercast.alerts.snooze import snooze_end

        try:
            until = snooze_end(body["until"], now, durations=False)
        except ValueError as exc:
            raise ValueError(f"until: {body['until']!r} {exc}") from None
    try:
        with engine.connect() as connection:
            ids = find_alert_ids(connection, [alert_id])
    except AftercastError as exc:
        raise LookupError(str(exc)) from None
    changed = set_attention(engine, ids, action, body["actor"], now, until=until, note=body["note"])
    return {
        "id": alert_id,
        "action": action,
        "changed": changed,
        "until": to_iso(until) if until is not None else None,
    }
