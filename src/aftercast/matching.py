"""Matching: queued (series, period) keys -> scored pairs.

Ingest queues every (series, target period) whose forecasts or actual changed. A cycle takes the
queue in batches of series, joins stored forecasts to stored actuals on (series, period), so a
forecast that arrives after its actual matches as well as one that arrived before, and scores
each pair once with `measures`. A changed actual also feeds the seasonal naive scale of every
pair issued after it, so those pairs are rescored too. Each batch is one transaction: its pairs
are replaced and its queue rows removed together, so a crash repeats a batch, never half of one.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine, text

from aftercast import measures
from aftercast.store import schema
from aftercast.store.bounds import unpack_bounds
from aftercast.store.bulk import (
    delete_by_ids,
    id_condition,
    insert_frame,
    read_frame,
    stage_keys,
)
from aftercast.store.catalog import register_levels
from aftercast.store.db import refresh_statistics, write
from aftercast.store.parallel import each

PAIR_COLUMNS = [c.name for c in schema.pairs.columns]
_CANDIDATE_COLUMNS = (
    "f.id AS forecast_id, f.series_id, f.model_id, f.horizon, f.issued_at, f.target_at, "
    "f.issue_period, f.target_period, f.point, f.bound_layout, f.bounds, a.value AS actual, "
    "a.revision AS actual_revision"
)


@dataclass
class MatchStats:
    queued: int = 0
    pairs_scored: int = 0
    touched: pd.DataFrame | None = None  # distinct (series_id, model_id) with new or changed pairs


def _candidates(connection: Connection, staged: str) -> pd.DataFrame:
    """The forecasts to score, with their actual: those targeting a queued (series, period),
    and those issued after a changed actual, whose scale it feeds."""
    targeted = read_frame(
        connection,
        f"SELECT {_CANDIDATE_COLUMNS} FROM forecasts f "
        f"JOIN (SELECT DISTINCT series_id, period FROM {staged}) q "
        "ON f.series_id = q.series_id AND f.target_period = q.period "
        "JOIN actuals a ON a.series_id = f.series_id AND a.period = f.target_period",
    )
    # Two steps, so that the join starts from the few pairs issued after a changed actual:
    # in one statement PostgreSQL joined every forecast to every actual first.
    later = read_frame(
        connection,
        "SELECT p.forecast_id FROM pairs p "
        f"JOIN (SELECT series_id, MIN(period) AS period FROM {staged} WHERE kind = 1 "
        "GROUP BY series_id) q ON p.series_id = q.series_id AND p.issue_period > q.period",
    )
    rescaled = targeted.iloc[0:0]
    if len(later):
        condition, params = id_condition(connection, "f.id", later["forecast_id"], "rescaled")
        rescaled = read_frame(
            connection,
            f"SELECT {_CANDIDATE_COLUMNS} FROM forecasts f "
            "JOIN actuals a ON a.series_id = f.series_id AND a.period = f.target_period "
            f"WHERE {condition}",
            params,
        )
    both = (
        pd.concat([f for f in (targeted, rescaled) if not f.empty], ignore_index=True)
        if (len(targeted) or len(rescaled))
        else targeted
    )
    return both.drop_duplicates("forecast_id")


def _bounds_and_paired(
    connection: Connection, candidates: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame, np.ndarray]:
    """The candidates' interval bounds and quantiles, and which of them have a stored pair.

    The bounds came with the candidates, read from the forecast rows the join already visited:
    probing forecasts again by id for them was the match stage's third-largest statement at
    100,000 series. Only the pairs' primary key is probed, to find the few candidates paired
    before; the replacement's deletes are kept to those instead of probing three tables for
    every candidate.
    """
    ids = candidates["forecast_id"].to_numpy(np.int64)
    intervals, quantiles = unpack_bounds(ids, candidates["bound_layout"], candidates["bounds"])
    condition, params = id_condition(connection, "forecast_id", ids, "pair_ids")
    paired = read_frame(connection, f"SELECT forecast_id FROM pairs WHERE {condition}", params)
    return intervals, quantiles, paired["forecast_id"].to_numpy(np.int64)


def _scales(connection: Connection, pairs: pd.DataFrame) -> pd.DataFrame:
    series_ids = pd.DataFrame({"series_id": pairs["series_id"].unique()})
    staged = stage_keys(connection, "scale_series", series_ids)
    history = read_frame(
        connection,
        f"SELECT a.series_id, a.period, a.value, s.season FROM actuals a "
        f"JOIN {staged} k ON k.series_id = a.series_id JOIN series s ON s.id = a.series_id",
    )
    queries = pairs[["series_id", "issue_period"]].drop_duplicates()
    return measures.seasonal_scales(history, queries)


def score_pairs(candidates: pd.DataFrame, scales: pd.DataFrame, now: int) -> pd.DataFrame:
    """Point measures for each candidate pair (pure: frames in, frame out)."""
    pairs = candidates.merge(scales, on=["series_id", "issue_period"], how="left")
    y = pairs["actual"].to_numpy(np.float64)
    f = pairs["point"].to_numpy(np.float64)
    error = measures.forecast_error(y, f)
    pairs["error"] = error
    pairs["abs_error"] = np.abs(error)
    pairs["sq_error"] = error**2
    pairs["ape"] = measures.absolute_percentage_error(y, f)
    pairs["sape"] = measures.symmetric_absolute_percentage_error(y, f)
    pairs["scaled_error"] = measures.scaled_error(error, pairs["scale_abs"].to_numpy())
    pairs["scored_at"] = now
    return pairs[PAIR_COLUMNS]


def score_intervals(intervals: pd.DataFrame, actual: pd.Series) -> pd.DataFrame:
    """Hit, width and interval score per (pair, level); `actual` is indexed by forecast_id."""
    y = actual.reindex(intervals["forecast_id"]).to_numpy(np.float64)
    lower = intervals["lower"].to_numpy(np.float64)
    upper = intervals["upper"].to_numpy(np.float64)
    level = intervals["level"].to_numpy(np.float64)
    scored = intervals.copy()
    scored["hit"] = measures.interval_hit(y, lower, upper).astype(np.int16)
    scored["width"] = upper - lower
    scored["interval_score"] = measures.interval_score(y, lower, upper, level)
    return scored


def score_quantiles(quantiles: pd.DataFrame, actual: pd.Series) -> pd.DataFrame:
    y = actual.reindex(quantiles["forecast_id"]).to_numpy(np.float64)
    scored = quantiles.copy()
    scored["pinball"] = measures.pinball_loss(
        y, quantiles["value"].to_numpy(np.float64), quantiles["prob"].to_numpy(np.float64) / 100.0
    )
    return scored


def _match_batch(connection: Connection, queue: pd.DataFrame, now: int) -> tuple[pd.DataFrame, int]:
    staged = stage_keys(connection, "match_batch", queue)
    candidates = _candidates(connection, staged)
    if not candidates.empty:
        intervals, quantiles, replaced = _bounds_and_paired(connection, candidates)
        scored = score_pairs(candidates, _scales(connection, candidates), now)
        actual = pd.Series(scored["actual"].to_numpy(), index=scored["forecast_id"].to_numpy())
        delete_by_ids(
            connection, [schema.pairs, schema.pair_intervals, schema.pair_quantiles], replaced
        )
        insert_frame(connection, schema.pairs, scored)
        scored_intervals = score_intervals(intervals, actual)
        insert_frame(connection, schema.pair_intervals, scored_intervals)
        register_levels(connection, scored_intervals["level"].unique())
        insert_frame(connection, schema.pair_quantiles, score_quantiles(quantiles, actual))
    connection.execute(
        text(
            # Row-value IN lets both engines hash the staged keys instead of a nested scan.
            "DELETE FROM match_queue WHERE (series_id, period, kind) IN "
            f"(SELECT series_id, period, kind FROM {staged})"
        )
    )
    return candidates[["series_id", "model_id"]].drop_duplicates(), len(candidates)


def match(
    engine: Engine, now: int, batch_rows: int = 50_000, series_ids: np.ndarray | None = None
) -> MatchStats:
    """Drain the match queue (optionally only for some series), scoring pairs batch by batch."""
    with engine.connect() as connection:
        queue = read_frame(
            connection,
            f"SELECT series_id, period, kind FROM match_queue WHERE kind < {schema.QUEUE_ISSUE}",
        )
    if series_ids is not None:
        queue = queue[queue["series_id"].isin(series_ids)]
    stats = MatchStats(queued=len(queue))
    if len(queue):
        refresh_statistics(engine, ("forecasts", "actuals", "pairs", "match_queue"))
    touched = []
    sizes = queue.groupby("series_id").size()
    batch_of = (sizes.cumsum() // batch_rows).rename("batch")
    queue = queue.join(batch_of, on="series_id")
    batches = [batch.drop(columns="batch") for _, batch in queue.groupby("batch", sort=True)]

    def run(batch: pd.DataFrame) -> tuple[pd.DataFrame, int]:
        with write(engine) as connection:
            return _match_batch(connection, batch, now)

    # Batches hold disjoint series: on PostgreSQL two run at once (`store.parallel`).
    for keys, scored in each(engine, batches, run):
        touched.append(keys)
        stats.pairs_scored += scored
    stats.touched = pd.concat(touched, ignore_index=True).drop_duplicates() if touched else None
    return stats
