"""Read queries used by status, exports and the web: pairs with their series and model names."""

from __future__ import annotations

from collections.abc import Iterator

import pandas as pd
from sqlalchemy import Connection

from aftercast.store.bulk import id_condition, read_frame
from aftercast.store.catalog import interval_levels

PAIR_SELECT = (
    "SELECT p.forecast_id, s.key AS series_id, m.name AS model, p.horizon, p.issued_at, "
    "p.target_at, p.target_period, p.actual, p.point, p.error, p.abs_error, p.sq_error, p.ape, "
    "p.sape, p.scale_abs, p.scale_sq, p.scaled_error, p.actual_revision "
    "FROM pairs p JOIN series s ON s.id = p.series_id JOIN models m ON m.id = p.model_id"
)


def pairs_upto(connection: Connection, now: int, since: int | None = None) -> pd.DataFrame:
    """Pairs with since < target_at <= now (all up to now when since is None)."""
    where = " WHERE p.target_at <= :now" + (
        " AND p.target_at > :since" if since is not None else ""
    )
    return read_frame(connection, PAIR_SELECT + where, {"now": now, "since": since})


def intervals_for(connection: Connection, forecast_ids: pd.Series) -> pd.DataFrame:
    condition, params = id_condition(connection, "forecast_id", forecast_ids, "window_ids")
    return read_frame(
        connection,
        "SELECT forecast_id, level, lower, upper, hit, width, interval_score "
        f"FROM pair_intervals WHERE {condition}",
        params,
    )


def quantiles_for(connection: Connection, forecast_ids: pd.Series) -> pd.DataFrame:
    condition, params = id_condition(connection, "forecast_id", forecast_ids, "window_qids")
    return read_frame(
        connection,
        f"SELECT forecast_id, prob, value, pinball FROM pair_quantiles WHERE {condition}",
        params,
    )


INTERVAL_MEASURES = ("lower", "upper", "hit", "width", "interval_score")
QUANTILE_MEASURES = (("value", "q_"), ("pinball", "pinball_"))
EXPORT_BATCH = 100_000


def export_columns(connection: Connection) -> list[str]:
    """The measure columns of a pair export, one per level and quantile of any pair.

    Fixed for the whole export, so every batch has the same columns in the same order (a
    CSV has one header). Levels come from the `interval_levels` catalogue, which matching
    extends in the transaction that scores a new level; a level whose pairs are all gone
    stays listed and exports as an empty column. Quantiles have no catalogue: their
    probabilities are read from the scored quantiles themselves.
    """
    from aftercast.windows import level_name

    levels = [level_name(level) for level in interval_levels(connection)]
    probs = read_frame(connection, "SELECT DISTINCT prob FROM pair_quantiles")["prob"]
    prob_names = [level_name(prob) for prob in sorted(probs.astype(float).tolist())]
    return [
        *(f"{measure}_{level}" for measure in INTERVAL_MEASURES for level in levels),
        *(f"{prefix}{prob}" for _, prefix in QUANTILE_MEASURES for prob in prob_names),
    ]


def iter_pair_export(connection: Connection, batch: int = EXPORT_BATCH) -> Iterator[pd.DataFrame]:
    """All pairs with per-pair interval measures, in forecast-id order, a batch at a time.

    Every batch has the columns of `PAIR_SELECT` then `export_columns`, whatever levels and
    quantiles its own pairs have; a measure a pair lacks is missing (NaN, or NA for `hit_`).
    A store without pairs gives one empty batch, so that a CSV export still has its header.
    """
    columns = export_columns(connection)
    last = 0
    while True:
        frame = read_frame(
            connection,
            PAIR_SELECT + " WHERE p.forecast_id > :last ORDER BY p.forecast_id LIMIT :n",
            {"last": last, "n": batch},
        )
        if frame.empty:
            if last == 0:
                yield _widen(frame, pd.DataFrame(), pd.DataFrame(), columns)
            return
        last = int(frame["forecast_id"].iloc[-1])
        intervals = intervals_for(connection, frame["forecast_id"])
        quantiles = quantiles_for(connection, frame["forecast_id"])
        yield _widen(frame, intervals, quantiles, columns)


def _widen(
    frame: pd.DataFrame, intervals: pd.DataFrame, quantiles: pd.DataFrame, columns: list[str]
) -> pd.DataFrame:
    """One column per level and quantile measure (hit_80, width_80, ...), exactly `columns`."""
    from aftercast.windows import level_names

    out = frame.set_index("forecast_id")
    if not intervals.empty:
        intervals = intervals.assign(level=level_names(intervals["level"]))
        for column in INTERVAL_MEASURES:
            wide = intervals.pivot(index="forecast_id", columns="level", values=column)
            out = out.join(wide.add_prefix(f"{column}_"))
    if not quantiles.empty:
        quantiles = quantiles.assign(prob=level_names(quantiles["prob"]))
        for column, prefix in QUANTILE_MEASURES:
            wide = quantiles.pivot(index="forecast_id", columns="prob", values=column)
            out = out.join(wide.add_prefix(prefix))
    unlisted = out.columns.difference([*frame.columns, *columns])
    if len(unlisted):  # reindexing would drop them without a word
        raise RuntimeError(f"pair measures {list(unlisted)} are not in the interval catalogue")
    out = out.reindex(columns=[*frame.columns.drop("forecast_id"), *columns])
    hits = [c for c in columns if c.startswith("hit_")]
    # Whole numbers whether or not a batch has gaps (NaN would make them floats: 1 vs 1.0).
    out[hits] = out[hits].astype("Int64")
    return out.reset_index()
