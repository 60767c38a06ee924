"""Window sums in SQL: the additive statistics of `windows.WindowSums`, grouped by the store.

The pairs inside a window are selected and summed per (series, model, horizon), per interval
level and per quantile by three GROUP BY queries, so only one row per key leaves the
database, never the pairs themselves. A query covers the keys of a staged key table: a page
of series (column series_id) or chosen (series, model) keys (series_id, model_id), optionally
with a floor_period below which no pair can be in a `points` window (the cycle knows it from
the previous refresh, which keeps the ranking of target periods to the recent ones).
The same sums are stored per window in the tables of `schema_windows` and read back here.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import pandas as pd
from sqlalchemy import Connection, text

from aftercast.config import WindowConfig
from aftercast.store.bulk import insert_frame, read_frame, stage_keys
from aftercast.store.schema_windows import SUM_TABLES
from aftercast.windows import (
    DAY,
    EXTREMES,
    HORIZON_KEY,
    LEVEL_SUMS,
    POINT_SUMS,
    QUANTILE_SUMS,
    WindowSums,
)

# Lower than any period ordinal: "no floor".
NO_FLOOR = -(2**62)

# Each stored sum as (column, aggregate, expression): "count" counts the rows where the
# expression is not NULL ("*": every row), "sum" adds it, "sum0" adds it with 0 for no rows.
# `aggregates_select` renders them plain, or with each pair weighted +1 or -1 (a window
# moving by deltas).
Aggregate = tuple[str, str, str]
POINT_AGGREGATES: list[Aggregate] = [
    ("n", "count", "*"),
    ("sum_error", "sum", "p.error"),
    ("sum_abs_error", "sum", "p.abs_error"),
    ("sum_sq_error", "sum", "p.sq_error"),
    ("n_ape", "count", "p.ape"),
    ("sum_ape", "sum0", "p.ape"),
    ("n_sape", "count", "p.sape"),
    ("sum_sape", "sum0", "p.sape"),
    ("sum_abs_actual", "sum", "ABS(p.actual)"),
    ("n_scaled", "count", "p.scaled_error"),
    ("sum_abs_scaled", "sum0", "ABS(p.scaled_error)"),
    ("n_sq_scaled", "sum", "CASE WHEN p.scale_sq > 0 THEN 1 ELSE 0 END"),
    ("sum_sq_scaled", "sum0", "CASE WHEN p.scale_sq > 0 THEN p.sq_error / p.scale_sq END"),
]
LEVEL_AGGREGATES: list[Aggregate] = [
    ("n", "count", "*"),
    ("hits", "sum", "i.hit"),
    ("sum_width", "sum", "i.width"),
    ("sum_interval_score", "sum", "i.interval_score"),
]
QUANTILE_AGGREGATES: list[Aggregate] = [
    ("n", "count", "*"),
    ("sum_pinball", "sum", "q.pinball"),
    ("below", "sum", "CASE WHEN p.actual <= q.value THEN 1 ELSE 0 END"),
]
_EXTREMES_SELECT = (
    "MIN(p.target_at) AS first_target, MAX(p.target_at) AS last_target, "
    "MIN(p.target_period) AS first_period"
)
GROUP = "p.series_id, p.model_id, p.horizon"
ALL_PARTS = ("points", "levels", "quantiles")
# Per part of `WindowSums`: the joins to the pairs, the extra key column and the aggregates.
PARTS: dict[str, tuple[str, str | None, list[Aggregate]]] = {
    "points": ("", None, POINT_AGGREGATES),
    "levels": (
        "JOIN pair_intervals i ON i.forecast_id = p.forecast_id",
        "i.level",
        LEVEL_AGGREGATES,
    ),
    "quantiles": (
        "JOIN pair_quantiles q ON q.forecast_id = p.forecast_id",
        "q.prob",
        QUANTILE_AGGREGATES,
    ),
}


def _aggregate(kind: str, expression: str, weight: str | None) -> str:
    """One aggregate; with `weight` (an SQL expression of +1 or -1) each pair counts that much."""
    if kind == "count":
        if weight is None:
            return "COUNT(*)" if expression == "*" else f"COUNT({expression})"
        if expression == "*":
            return f"SUM({weight})"
        return f"SUM(CASE WHEN {expression} IS NOT NULL THEN {weight} ELSE 0 END)"
    total = f"SUM({expression})" if weight is None else f"SUM(({weight}) * ({expression}))"
    return f"COALESCE({total}, 0)" if kind == "sum0" else total


def aggregates_select(aggregates: list[Aggregate], weight: str | None = None) -> str:
    """`aggregates` as SELECT expressions over the chosen pairs, optionally weighted."""
    return ", ".join(f"{_aggregate(kind, e, weight)} AS {name}" for name, kind, e in aggregates)


def window_spec(window: WindowConfig) -> str:
    """'days=28' or 'points=60': what a stored window was computed for."""
    return f"days={window.days:g}" if window.days is not None else f"points={window.points}"


def _key_join(staged: str, columns: list[str]) -> str:
    on = " AND ".join(f"k.{c} = p.{c}" for c in columns if c != "floor_period")
    return f"JOIN {staged} k ON {on}"


def _ranked_cutoffs(
    connection: Connection, staged: str, columns: list[str], points: int, now: int
) -> pd.DataFrame:
    """Per (series, model): the first of its `points` latest target periods <= now (above
    the key's floor_period when given) and how many periods that window holds."""
    floor = " AND p.target_period >= k.floor_period" if "floor_period" in columns else ""
    return read_frame(
        connection,
        "SELECT series_id, model_id, MIN(target_period) AS first_period, "
        "MAX(period_rank) AS periods FROM ("
        "SELECT p.series_id, p.model_id, p.target_period, DENSE_RANK() OVER (PARTITION BY "
        "p.series_id, p.model_id ORDER BY p.target_period DESC) AS period_rank FROM pairs p "
        f"{_key_join(staged, columns)} WHERE p.target_at <= :now{floor}) ranked "
        "WHERE period_rank <= :points GROUP BY series_id, model_id",
        {"now": now, "points": points},
    )


def _points_cutoffs(
    connection: Connection, keys: pd.DataFrame, staged: str, points: int, now: int
) -> str:
    """Stage, per (series, model), the first of its `points` latest target periods <= now."""
    columns = list(keys.columns)
    cutoffs = _ranked_cutoffs(connection, staged, columns, points, now)
    if "floor_period" in columns:
        # A floor only holds where the window above it is full: a key with fewer periods
        # there may take in a pair that arrived late for an older period.
        full = cutoffs.loc[cutoffs["periods"] >= points, ["series_id", "model_id"]]
        full = full.astype("int64")
        short = keys[["series_id", "model_id"]].merge(full, how="left", indicator=True)
        short = short.loc[short["_merge"] == "left_only", ["series_id", "model_id"]]
        if len(short):
            again = stage_keys(connection, "window_short", short)
            unfloored = _ranked_cutoffs(connection, again, ["series_id", "model_id"], points, now)
            cutoffs = pd.concat([cutoffs[cutoffs["periods"] >= points], unfloored])
    if cutoffs.empty:
        cutoffs = pd.DataFrame({"series_id": [], "model_id": [], "first_period": []})
    return stage_keys(
        connection, "window_cutoffs", cutoffs[["series_id", "model_id", "first_period"]]
    )


def _selection(
    connection: Connection, window: WindowConfig, now: int, staged: str, keys: pd.DataFrame
) -> tuple[str, dict[str, Any]]:
    """JOIN and WHERE text choosing the pairs of `window` at `now` for the staged keys."""
    if window.days is not None:
        where = "WHERE p.target_at > :start AND p.target_at <= :now"
        params = {"start": now - int(window.days * DAY), "now": now}
        return f"{_key_join(staged, list(keys.columns))} {where}", params
    cut = _points_cutoffs(connection, keys, staged, int(window.points or 0), now)
    join = f"JOIN {cut} c ON c.series_id = p.series_id AND c.model_id = p.model_id"
    return f"{join} WHERE p.target_period >= c.first_period AND p.target_at <= :now", {"now": now}


def _grouped_sums(
    connection: Connection, chosen: str, params: dict[str, Any], parts: Sequence[str]
) -> WindowSums:
    """The GROUP BY queries of `parts` over the pairs that `chosen` (JOIN ... WHERE ...)
    selects; the other parts come back empty."""
    empty = WindowSums.empty()
    frames = {part: getattr(empty, part) for part in PARTS}
    for part in parts:
        join, extra, aggregates = PARTS[part]
        keys = f"{GROUP}, {extra}" if extra else GROUP
        selected = aggregates_select(aggregates) + ("" if extra else f", {_EXTREMES_SELECT}")
        frames[part] = read_frame(
            connection,
            f"SELECT {keys}, {selected} FROM pairs p {join} {chosen} GROUP BY {keys}",
            params,
        )
    return _typed(WindowSums(**frames))


def compute_sums(
    connection: Connection,
    window: WindowConfig,
    now: int,
    keys: pd.DataFrame,
    parts: Sequence[str] = ALL_PARTS,
) -> WindowSums:
    """Sums of the pairs inside `window` at `now` for `keys` (see the module docstring), of
    the named `parts` (the others empty)."""
    if keys.empty:
        return WindowSums.empty()
    columns = list(keys.columns)
    # One staging table per shape of key: a temporary table keeps the columns it was made with.
    staged = stage_keys(connection, "window_keys_" + "".join(c[0] for c in columns), keys)
    chosen, params = _selection(connection, window, now, staged, keys)
    return _grouped_sums(connection, chosen, params, parts)


_INTEGERS = {"n", "n_ape", "n_sape", "n_scaled", "n_sq_scaled", "hits", "below", *EXTREMES}


def _typed(sums: WindowSums) -> WindowSums:
    """Fixed dtypes, whatever the driver returned (empty results come back as objects)."""

    def cast(frame: pd.DataFrame, extra: list[str], names: list[str]) -> pd.DataFrame:
        frame = frame.reindex(columns=[*HORIZON_KEY, *extra, *names])
        kinds = {c: "int64" for c in [*HORIZON_KEY, *_INTEGERS.intersection(names)]}
        kinds.update({c: "float64" for c in [*extra, *names] if c not in kinds})
        return frame.astype(kinds)

    return WindowSums(
        cast(sums.points, [], [*POINT_SUMS, *EXTREMES]),
        cast(sums.levels, ["level"], LEVEL_SUMS),
        cast(sums.quantiles, ["prob"], QUANTILE_SUMS),
    )


def delete_stored(
    connection: Connection,
    window_name: str,
    keys: pd.DataFrame | None,
    parts: Sequence[str] = ALL_PARTS,
) -> None:
    """Remove the stored sums of `window_name` for `keys` (series_id, model_id), or all."""
    staged = stage_keys(connection, "window_drop", keys) if keys is not None else None
    for part in parts:
        table = SUM_TABLES[part][0]
        sql = f"DELETE FROM {table.name} WHERE window_name = :w"
        if staged is not None:
            # A row-value IN probes the key index per staged key; a correlated EXISTS made
            # SQLite walk every row of the window.
            sql += f" AND (series_id, model_id) IN (SELECT series_id, model_id FROM {staged})"
        connection.execute(text(sql), {"w": window_name})


def store_sums(connection: Connection, window_name: str, sums: WindowSums) -> None:
    for part, (table, _extra) in SUM_TABLES.items():
        frame = getattr(sums, part)
        insert_frame(connection, table, frame.assign(window_name=window_name))


def read_stored(connection: Connection, window_name: str, series_ids: pd.Series) -> WindowSums:
    """The stored sums of `window_name` for a page of series."""
    staged = stage_keys(connection, "window_page", pd.DataFrame({"series_id": series_ids}))
    parts = {}
    for part, (table, _extra) in SUM_TABLES.items():
        parts[part] = read_frame(
            connection,
            f"SELECT t.* FROM {table.name} t JOIN {staged} k ON k.series_id = t.series_id "
            "WHERE t.window_name = :w",
            {"w": window_name},
        ).drop(columns="window_name")
    return _typed(WindowSums(**parts))


def stored_floors(connection: Connection, window_name: str, keys: pd.DataFrame) -> pd.DataFrame:
    """`keys` with floor_period: the first target period each key's stored window held."""
    staged = stage_keys(connection, "window_floor", keys[["series_id", "model_id"]])
    floors = read_frame(
        connection,
        "SELECT t.series_id, t.model_id, MIN(t.first_period) AS floor_period "
        f"FROM window_point_sums t JOIN {staged} k ON k.series_id = t.series_id "
        "AND k.model_id = t.model_id WHERE t.window_name = :w GROUP BY t.series_id, t.model_id",
        {"w": window_name},
    )
    merged = keys[["series_id", "model_id"]].merge(floors, on=["series_id", "model_id"], how="left")
    return merged.fillna({"floor_period": NO_FLOOR}).astype("int64")
