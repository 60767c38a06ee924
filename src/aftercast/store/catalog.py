"""Series and models: surrogate ids and per-series settings.

A series first seen in forecasts or actuals is created with `series_defaults`; `ingest series`
and the config's `series:` entries set frequency, season, time zone, unit and labels. Lookups
are by set (one query per chunk), never per row.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterable

import pandas as pd
from sqlalchemy import Connection, select, text

from aftercast.config import Config
from aftercast.store import schema
from aftercast.store.bulk import insert_frame, read_frame

SETTINGS = ["frequency", "season", "timezone", "unit"]


def series_settings(connection: Connection, keys: Iterable[str]) -> pd.DataFrame:
    """Stored series as a frame indexed by key: id, frequency, season, timezone, unit, labels."""
    wanted = sorted(set(keys))
    if not wanted:
        return pd.DataFrame(columns=["id", *SETTINGS, "labels"]).rename_axis("key")
    frames = []
    for start in range(0, len(wanted), 5_000):
        chunk = wanted[start : start + 5_000]
        query = select(schema.series).where(schema.series.c.key.in_(chunk))
        result = connection.execute(query)
        frames.append(pd.DataFrame(result.fetchall(), columns=list(result.keys())))
    return pd.concat(frames).set_index("key")


def settings_for(config: Config, keys: pd.Series, stored: pd.DataFrame) -> pd.DataFrame:
    """Frequency, season and time zone for each key: stored, else config entry, else defaults."""
    defaults = config.series_defaults
    entries = {e.id: e for e in config.series}
    unique = pd.Index(keys.unique())
    out = pd.DataFrame(index=unique)
    out["frequency"] = defaults.frequency
    out["season"] = defaults.season
    out["timezone"] = defaults.timezone
    for key in unique.intersection(list(entries)):
        entry = entries[key]
        for name in ("frequency", "season", "timezone"):
            if getattr(entry, name) is not None:
                out.loc[key, name] = getattr(entry, name)
    known = unique.intersection(stored.index)
    if len(known):
        out.loc[known, ["frequency", "season", "timezone"]] = stored.loc[
            known, ["frequency", "season", "timezone"]
        ].to_numpy()
    return out


def ensure_series(connection: Connection, config: Config, keys: pd.Series) -> pd.DataFrame:
    """Create any unknown series (config entry, else defaults); return settings indexed by key."""
    stored = series_settings(connection, keys.unique())
    missing = pd.Index(keys.unique()).difference(stored.index)
    if len(missing):
        settings = settings_for(config, pd.Series(missing), stored)
        entries = {e.id: e for e in config.series}
        now = int(time.time())
        frame = settings.reset_index(names="key")
        frame["unit"] = [entries[k].unit if k in entries else None for k in frame["key"]]
        frame["labels"] = [
            json.dumps(entries[k].labels if k in entries else {}) for k in frame["key"]
        ]
        frame["created_at"] = now
        frame["updated_at"] = now
        insert_frame(connection, schema.series, frame)
        stored = series_settings(connection, keys.unique())
    return stored


def ensure_models(connection: Connection, names: Iterable[str]) -> dict[str, int]:
    """Ids of the named models, creating those not yet stored."""
    wanted = sorted(set(names))
    table = schema.models
    query = select(table.c.name, table.c.id).where(table.c.name.in_(wanted))
    known: dict[str, int] = {str(name): int(id_) for name, id_ in connection.execute(query)}
    missing = [n for n in wanted if n not in known]
    if missing:
        insert_frame(connection, table, pd.DataFrame({"name": missing}))
        query = select(table.c.name, table.c.id).where(table.c.name.in_(missing))
        known.update({str(name): int(id_) for name, id_ in connection.execute(query)})
    return known


def all_series(connection: Connection) -> pd.DataFrame:
    """Every stored series with its settings and decoded labels."""
    frame = read_frame(connection, "SELECT * FROM series ORDER BY key")
    frame["labels"] = frame["labels"].map(json.loads)
    return frame


def interval_levels(connection: Connection) -> list[float]:
    """The interval levels pairs have been scored at, ascending (a superset of those stored)."""
    rows = connection.execute(select(schema.interval_levels.c.level)).scalars()
    return sorted(float(level) for level in rows)


def register_levels(connection: Connection, levels: Iterable[float]) -> None:
    """List the `levels` just scored in `interval_levels`, in the caller's transaction.

    Only levels not yet listed are written, so the usual batch writes nothing; two replicas
    registering the same new level at once both succeed (the second insert does nothing).
    """
    new = sorted(set(float(level) for level in levels) - set(interval_levels(connection)))
    if new:
        connection.execute(
            text("INSERT INTO interval_levels (level) VALUES (:level) ON CONFLICT DO NOTHING"),
            [{"level": level} for level in new],
        )
