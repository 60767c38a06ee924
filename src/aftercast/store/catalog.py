"""Series and models: surrogate ids and per-series settings.

A series first seen in forecasts or actuals is created with its `series:` entry, else
`series_defaults`; `ingest series` sets frequency, season, time zone, unit and labels (a series it
creates takes its entry first too, its own cells only where the entry is silent). The
config's entries stay authoritative for series already stored (`sync_series_entries`, at `init`
and at the start of every cycle), within what the stored data allows. Lookups are by set (one
query per chunk), never per row.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine, select, text

from aftercast.config import Config, SeriesEntry
from aftercast.store import schema
from aftercast.store.bulk import id_condition, insert_new, read_frame
from aftercast.store.db import write

SETTINGS = ["frequency", "season", "timezone", "unit"]
# What decides the period each stored time falls in and the seasonal scale of every pair: fixed
# once a series holds forecasts or actuals, as `ingest series` also has it for its own rows.
PERIOD_SETTINGS = ["frequency", "season", "timezone"]


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
        insert_new(connection, schema.series, frame, "key")  # another writer may be first
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
        insert_new(connection, table, pd.DataFrame({"name": missing}), "name")
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


def sync_series_entries(engine: Engine, config: Config) -> list[str]:
    """Apply the config's `series:` entries to the series already stored; warning lines back.

    Unit and labels follow the entry (labels it does not name, say from a series file, stay).
    Frequency, season and time zone follow it while the series holds no forecasts and no
    actuals; otherwise the stored value stays and a line names the entry's config key. Series
    not stored yet are left to `ensure_series`, which creates them from their entry.
    """
    if not config.series:
        return []  # the usual config: no transaction at all
    with write(engine) as connection:
        return _apply_entries(connection, config, int(time.time()))


def _apply_entries(connection: Connection, config: Config, now: int) -> list[str]:
    # A key listed twice: the later entry wins, as in `ensure_series`.
    entries = {e.id: (index, e) for index, e in enumerate(config.series)}
    stored = series_settings(connection, list(entries))
    if stored.empty:
        return []
    rows = {str(k): _plain(r) for k, r in stored.to_dict("index").items()}
    moves = {key: _period_moves(entries[key][1], row) for key, row in rows.items()}
    held = holding_data(connection, [rows[key]["id"] for key, move in moves.items() if move])
    warnings, updates = [], []
    for key, row in rows.items():
        index, entry = entries[key]
        wanted = {**row, "labels": {**json.loads(row["labels"]), **entry.labels}}
        if entry.unit is not None:
            wanted["unit"] = entry.unit
        for name, value in moves[key].items():
            if row["id"] not in held:
                wanted[name] = value
                continue
            warnings.append(
                f"series[{index}].{name}: series {key!r} is stored with {row[name]!r} and has "
                f"data; {value!r} is not applied (a series with forecasts or actuals keeps its "
                "periods and season)"
            )
        wanted["labels"] = json.dumps(wanted["labels"])
        columns = ["id", *SETTINGS, "labels"]
        if any(wanted[c] != row[c] for c in columns):
            updates.append({**{c: wanted[c] for c in columns}, "updated_at": now})
    if updates:
        connection.execute(
            text(
                "UPDATE series SET frequency = :frequency, season = :season, "
                "timezone = :timezone, unit = :unit, labels = :labels, updated_at = :updated_at "
                "WHERE id = :id"
            ),
            updates,
        )
    return warnings


def _plain(row: dict[str, Any]) -> dict[str, Any]:
    """A stored row with Python values (numpy scalars would print as np.int64(7))."""
    return {
        k: (None if pd.isna(v) else v.item() if hasattr(v, "item") else v) for k, v in row.items()
    }


def _period_moves(entry: SeriesEntry, row: dict[str, Any]) -> dict[str, Any]:
    """The period settings an entry gives that differ from the stored row."""
    wanted = {name: getattr(entry, name) for name in PERIOD_SETTINGS}
    return {k: v for k, v in wanted.items() if v is not None and v != row[k]}


def holding_data(connection: Connection, ids: list[int]) -> set[int]:
    """Those of `ids` whose series hold forecasts or actuals (one indexed probe each).

    The one check of both the config's entries and `ingest series`: the ids come as one array
    (or staged table), so a series file's chunk of any size fits in one statement.
    """
    if not ids:
        return set()
    condition, params = id_condition(connection, "s.id", np.asarray(ids), "held_series")
    query = text(
        f"SELECT s.id FROM series s WHERE {condition} AND ("
        "EXISTS (SELECT 1 FROM forecasts f WHERE f.series_id = s.id) OR "
        "EXISTS (SELECT 1 FROM actuals a WHERE a.series_id = s.id))"
    )
    return {int(i) for i in connection.execute(query, params).scalars()}
