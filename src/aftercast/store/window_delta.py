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

from collections.abc import Sequence

import pandas as pd
from sqlalchemy import Connection, text

from aftercast.store.bulk import read_frame
from aftercast.store.schema_windows import SUM_TABLES
from aftercast.store.window_sums import ALL_PARTS, GROUP, PARTS, aggregates_select
from aftercast.windows import EXTREMES, HORIZON_KEY, WindowSums


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


def without_extremes(sums: WindowSums) -> WindowSums:
    """`sums` with the extremes zeroed, as a `days` window stores them."""
    return WindowSums(sums.points.assign(**{c: 0 for c in EXTREMES}), sums.levels, sums.quantiles)


# The pair columns the sums read (`window_sums.PARTS`); the strips carry only these.
_STRIP_COLUMNS = (
    "forecast_id, series_id, model_id, horizon, actual, error, abs_error, sq_error, ape, sape, "
    "scaled_error, scale_sq"
)


def _stage_strips(connection: Connection, params: dict[str, int]) -> str:
    """The two strips of pairs in one temporary table, each pair with its sign.

    Staged once for the three sum tables, which each read it, instead of each statement
    selecting the strips from pairs again; each strip is a range of ix_pairs_target (grouping
    straight over pairs let SQLite walk the whole (series, model, target) index in group order).
    The caller drops it when done; both stores undo its creation if the transaction rolls back.
    """
    table = "tmp_window_strips"
    connection.execute(text(f"DROP TABLE IF EXISTS {table}"))
    connection.execute(
        text(
            f"CREATE TEMP TABLE {table} AS "
            f"SELECT {_STRIP_COLUMNS}, 1 AS sign FROM pairs "
            "WHERE target_at > :before AND target_at <= :now "
            "UNION ALL "
            f"SELECT {_STRIP_COLUMNS}, -1 AS sign FROM pairs "
            "WHERE target_at > :left_from AND target_at <= :left_to"
        ),
        params,
    )
    return table


def apply_strips(
    connection: Connection,
    window_name: str,
    before: int,
    now: int,
    span: int,
    parts: Sequence[str] = ALL_PARTS,
) -> None:
    """Move the stored sums (of `parts`) of a `span`-second window from `before` to `now`
    by deltas.

    One INSERT ... SELECT ... ON CONFLICT DO UPDATE per table (both stores speak it): the
    database sums the two strips with a sign per pair, +1 entering and -1 leaving (the strips
    are disjoint while now - before < span), and adds the result to the stored rows, so no
    strip is read into memory whatever the fleet's size. Rows left with no pairs are dropped.
    Extremes of new rows are zero, as a `days` window stores them (`without_extremes`).
    The sums go in key order: rows arriving in the primary key's order touch its index pages
    one after another instead of at random (a quarter less time on PostgreSQL at 10,000
    series, bench/EXPLAIN.md).
    """
    strips = _stage_strips(
        connection,
        {"before": before, "now": now, "left_from": before - span, "left_to": now - span},
    )
    for part in parts:
        table, extra = SUM_TABLES[part]
        join, extra_column, aggregates = PARTS[part]
        group = f"{GROUP}, {extra_column}" if extra_column else GROUP
        keys = [*HORIZON_KEY, *([extra] if extra else [])]
        sums = [name for name, _kind, _expression in aggregates]
        zeros = [] if extra else list(EXTREMES)
        columns = ", ".join([*keys, *sums, *zeros])
        sums_select = aggregates_select(aggregates, weight="p.sign")
        zero_values = "".join(f", 0 AS {c}" for c in zeros)
        assign = ", ".join(f"{c} = {table.name}.{c} + excluded.{c}" for c in sums)
        # "WHERE" before GROUP BY also keeps SQLite from reading ON CONFLICT as a join's ON.
        connection.execute(
            text(
                f"INSERT INTO {table.name} (window_name, {columns}) "
                f"SELECT CAST(:w AS VARCHAR(64)), {group}, {sums_select}"
                f"{zero_values} FROM {strips} p {join} WHERE true GROUP BY {group} "
                f"ORDER BY {group} "
                f"ON CONFLICT (window_name, {', '.join(keys)}) DO UPDATE SET {assign}"
            ),
            {"w": window_name},
        )
        connection.execute(
            text(f"DELETE FROM {table.name} WHERE window_name = :w AND n <= 0"), {"w": window_name}
        )
    # Up to two days of pairs: not left on a pooled connection until the next cycle.
    connection.execute(text(f"DROP TABLE {strips}"))
