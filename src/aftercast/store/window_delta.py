"""Moving a stored `days` window forward by deltas: add the pairs that entered, take out the
pairs that left, without touching the pairs in between.

When the clock moves from `before` to `now` (less than a window apart), the pairs with
before < target_at <= now entered and those with before - D < target_at <= now - D left; a
key's new sums are its stored sums plus the first strip's sums minus the second's. This holds
for every key whose pairs inside the windows kept the values they were summed with: the keys
with a pair scored at this clock and targeted at or before `before` (a revision rescored it,
or a forecast arrived late) are recomputed from their pairs instead, by the caller. Counts stay
exact integers; float sums collect rounding of the order of one ulp per step, which the
caller clears by recomputing a rotating share of the keys from scratch every cycle.
"""

from __future__ import annotations

import pandas as pd
from sqlalchemy import BigInteger, Column, Connection, Float, MetaData, Table, text

from aftercast.store.bulk import insert_frame, read_frame
from aftercast.store.schema_windows import SUM_TABLES
from aftercast.store.window_sums import range_sums
from aftercast.windows import EXTREMES, HORIZON_KEY, WindowSums

_INTEGER_COLUMNS = {
    "series_id",
    "model_id",
    "horizon",
    "n",
    "n_ape",
    "n_sape",
    "n_scaled",
    "n_sq_scaled",
    "hits",
    "below",
    *EXTREMES,
}


def rescored_keys(connection: Connection, now: int, since: int, until: int) -> pd.DataFrame:
    """(series, model) keys with a pair scored at `now` and since < target_at <= until."""
    return read_frame(
        connection,
        "SELECT DISTINCT series_id, model_id FROM pairs WHERE scored_at = :now "
        "AND target_at > :since AND target_at <= :until",
        {"now": now, "since": since, "until": until},
    ).astype("int64")


def scored_keys(connection: Connection, now: int) -> pd.DataFrame:
    """(series, model) keys with any pair scored at `now`."""
    return read_frame(
        connection,
        "SELECT DISTINCT series_id, model_id FROM pairs WHERE scored_at = :now",
        {"now": now},
    ).astype("int64")


def _difference(entered: pd.DataFrame, left: pd.DataFrame, extra: list[str]) -> pd.DataFrame:
    """Entered minus left, per key. Extremes are zero: a `days` window keeps none (its edges
    follow the clock), so every path stores the same rows (`without_extremes`)."""
    by = [*HORIZON_KEY, *extra]
    sums = [c for c in entered.columns if c not in by and c not in EXTREMES]
    negative = left.copy()
    negative[sums] = -negative[sums]
    both = pd.concat(
        [
            entered.drop(columns=list(EXTREMES), errors="ignore"),
            negative.drop(columns=list(EXTREMES), errors="ignore"),
        ]
    )
    delta = both.groupby(by, as_index=False)[sums].sum()
    for column in EXTREMES:
        if column in entered.columns:
            delta[column] = 0
    return delta


def without_extremes(sums: WindowSums) -> WindowSums:
    """`sums` with the extremes zeroed, as a `days` window stores them."""
    return WindowSums(sums.points.assign(**{c: 0 for c in EXTREMES}), sums.levels, sums.quantiles)


def strip_delta(connection: Connection, before: int, now: int, span: int) -> WindowSums:
    """Sums of the pairs entering a `span`-second window minus those leaving it."""
    entered = range_sums(connection, before, now)
    left = range_sums(connection, before - span, now - span)
    return WindowSums(
        _difference(entered.points, left.points, []),
        _difference(entered.levels, left.levels, ["level"]),
        _difference(entered.quantiles, left.quantiles, ["prob"]),
    )


def _staged_delta(connection: Connection, part: str, frame: pd.DataFrame) -> str:
    name = f"tmp_window_delta_{part}"
    columns = [Column(c, BigInteger if c in _INTEGER_COLUMNS else Float) for c in frame.columns]
    table = Table(name, MetaData(), *columns)
    kinds = ", ".join(
        f"{c.name} {'BIGINT' if c.name in _INTEGER_COLUMNS else 'DOUBLE PRECISION'}"
        for c in columns
    )
    connection.execute(text(f"CREATE TEMP TABLE IF NOT EXISTS {name} ({kinds})"))
    connection.execute(text(f"DELETE FROM {name}"))
    insert_frame(connection, table, frame)
    return name


def apply_delta(connection: Connection, window_name: str, delta: WindowSums) -> None:
    """Add `delta` to the stored sums of `window_name`; drop rows left without pairs.

    One upsert per table (INSERT ... ON CONFLICT DO UPDATE, which both stores speak): an
    UPDATE ... FROM plus an INSERT ... WHERE NOT EXISTS let PostgreSQL's planner, which knows
    nothing of the fresh staging table, pick a plan that scanned the stored sums per row.
    """
    for part, (table, extra) in SUM_TABLES.items():
        frame: pd.DataFrame = getattr(delta, part)
        if frame.empty:
            continue
        staged = _staged_delta(connection, part, frame)
        keys = [*HORIZON_KEY, *([extra] if extra else [])]
        sums = [c for c in frame.columns if c not in keys and c not in EXTREMES]
        assign = ", ".join(f"{c} = {table.name}.{c} + excluded.{c}" for c in sums)
        columns = ", ".join(frame.columns)
        params = {"w": window_name}
        # "WHERE true" keeps SQLite from reading ON CONFLICT as a join constraint.
        connection.execute(
            text(
                f"INSERT INTO {table.name} (window_name, {columns}) "
                f"SELECT CAST(:w AS VARCHAR(64)), {', '.join(f'd.{c}' for c in frame.columns)} "
                f"FROM {staged} d WHERE true "
                f"ON CONFLICT (window_name, {', '.join(keys)}) DO UPDATE SET {assign}"
            ),
            params,
        )
        match = " AND ".join(f"d.{k} = {table.name}.{k}" for k in keys)
        connection.execute(
            text(
                f"DELETE FROM {table.name} WHERE window_name = :w AND n <= 0 "
                f"AND EXISTS (SELECT 1 FROM {staged} d WHERE {match})"
            ),
            params,
        )
