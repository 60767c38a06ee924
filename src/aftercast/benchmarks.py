"""The benchmark stage: aftercast's own forecasts at every issue time of a production forecast.

Runs before matching. Every production forecast written queues its (series, issue period), so
the stage reads exactly the issue periods that got new or changed forecasts (an index probe on
(series, issue_period) each, never a scan of the forecasts table), whatever their model and
however old their issue time: a new model's backfill is benchmarked like today's forecasts. It
keeps `forecast_activity` current (first and last issue per series and model, which baselines
and the stalled-forecast check read), and makes the configured benchmark forecasts those issue
times and targets lack, from the actuals of the periods before the issue period
(`benchmark_methods`; optionally ETS); one already stored is not made again. They are stored
as ordinary forecasts under the reserved names `benchmark:<method>` through the ingest path's
upsert, so matching pairs and scores them like any model's. A benchmark is a function of the
data alone: when an actual arrives late or is revised, the benchmarks issued after its period
are made again (unchanged ones are left alone), so the store holds the same benchmarks
whatever order the data came in.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine, text

from aftercast import benchmark_methods
from aftercast.benchmark_methods import BENCHMARK_PREFIX
from aftercast.config import Config
from aftercast.ingest.load import write_forecasts
from aftercast.ingest.validate import Checked
from aftercast.store import schema
from aftercast.store.bulk import insert_frame, key_rows, read_frame, stage_keys
from aftercast.store.catalog import ensure_models
from aftercast.store.db import refresh_statistics, write
from aftercast.store.parallel import each
from aftercast.store.schema_detect import forecast_activity

_FORECAST_COLUMNS = (
    "f.series_id, f.model_id, f.issued_at, f.issue_period, f.target_at, f.target_period, f.horizon"
)
_REQUEST_KEY = ["series_id", "issued_at", "target_at"]


@dataclass
class BenchmarkStats:
    series: int = 0
    issue_times: int = 0
    forecasts: int = 0


def benchmark_methods_in_use(config: Config) -> list[str]:
    methods = list(config.benchmarks.methods)
    return methods + (["ets"] if config.benchmarks.ets else [])


def _queued_series(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT series_id, COUNT(*) AS n FROM match_queue GROUP BY series_id",
        )


@dataclass
class _Fresh:
    """What the benchmark stage reads for a batch of series (production forecasts only)."""

    queued: pd.DataFrame  # issued in a queued issue period: new, or changed, forecasts
    later: pd.DataFrame  # issued after an actual that arrived or changed
    made: pd.DataFrame  # (series, issue time, target, model) of benchmarks already stored

    def production(self) -> pd.DataFrame:
        both = pd.concat([self.queued, self.later], ignore_index=True)
        return both.drop_duplicates(["series_id", "model_id", "issued_at", "target_at"])


def _queued_issues(
    connection: Connection, series_ids: np.ndarray
) -> tuple[str, str, dict[str, Any]]:
    """The staged `series_ids`, and their queued issue periods as key rows `q`."""
    staged_series = stage_keys(connection, "bm_series", pd.DataFrame({"series_id": series_ids}))
    issues = read_frame(
        connection,
        f"SELECT q.series_id, q.period FROM match_queue q JOIN {staged_series} s "
        f"ON s.series_id = q.series_id WHERE q.kind = {schema.QUEUE_ISSUE}",
    )
    queued_issues, params = key_rows(connection, "q", issues)
    return staged_series, queued_issues, params


def _consume_issues(connection: Connection, queued_issues: str, params: dict[str, Any]) -> None:
    connection.execute(
        text(
            "DELETE FROM match_queue WHERE (series_id, period, kind) IN "
            f"(SELECT q.series_id, q.period, {schema.QUEUE_ISSUE} FROM {queued_issues})"
        ),
        params,
    )


def _fresh_forecasts(connection: Connection, series_ids: np.ndarray) -> _Fresh:
    """The forecasts whose benchmarks are missing or may have changed; consumes their queue.

    Those of the issue periods queued since the last cycle (every production forecast queues
    its issue period, whatever its model and however old its issue time), read with the
    benchmarks already stored for them, and those issued after the earliest period whose actual
    arrived or changed since the last cycle (their benchmarks knew less, or another value, when
    they were made).
    """
    staged_series, queued_issues, params = _queued_issues(connection, series_ids)
    queued = read_frame(
        connection,
        f"SELECT {_FORECAST_COLUMNS}, CASE WHEN m.name LIKE :prefix THEN 1 ELSE 0 END AS made "
        # One probe of (series_id, issue_period) per queued issue period: left to itself,
        # SQLite scanned all of `forecasts` for a join to a staged table (the CROSS JOIN order).
        f"FROM {queued_issues} CROSS JOIN forecasts f JOIN models m ON m.id = f.model_id "
        "WHERE f.series_id = q.series_id AND f.issue_period = q.period",
        {"prefix": f"{BENCHMARK_PREFIX}%", **params},
    )
    since = read_frame(
        connection,
        "SELECT q.series_id, MIN(q.period) + 1 AS since FROM match_queue q "
        f"JOIN {staged_series} s ON s.series_id = q.series_id WHERE q.kind = "
        f"{schema.QUEUE_ACTUAL} GROUP BY q.series_id",
    )
    changed, since_params = key_rows(connection, "c", since)
    later = read_frame(
        connection,
        f"SELECT {_FORECAST_COLUMNS} FROM {changed} CROSS JOIN forecasts f "
        "JOIN models m ON m.id = f.model_id WHERE f.series_id = c.series_id "
        # The constant bound is for PostgreSQL's estimate: it cannot size a range whose bound
        # comes from a join, guessed a third of the table and read all of it.
        "AND f.issue_period >= c.since AND f.issue_period >= :low AND m.name NOT LIKE :prefix",
        {
            "prefix": f"{BENCHMARK_PREFIX}%",
            "low": int(since["since"].min()) if len(since) else 0,
            **since_params,
        },
    )
    _consume_issues(connection, queued_issues, params)
    made = queued["made"] == 1
    return _Fresh(
        queued=queued.loc[~made].drop(columns="made"),
        later=later,
        made=queued.loc[made, [*_REQUEST_KEY, "model_id"]],
    )


def activity_of(fresh: pd.DataFrame) -> pd.DataFrame:
    """First and last issue per (series, model) of `fresh` forecasts."""
    return fresh.groupby(["series_id", "model_id"], as_index=False).agg(
        first_issued_at=("issued_at", "min"),
        last_issued_at=("issued_at", "max"),
        last_issue_period=("issue_period", "max"),
    )


def _queued_activity(connection: Connection, series_ids: np.ndarray) -> pd.DataFrame:
    """The activity of the queued issue periods' production forecasts; consumes their queue.

    With no benchmark methods configured the stage only keeps `forecast_activity` current, so
    the database aggregates the forecasts instead of sending every one of them back.
    """
    _, queued_issues, params = _queued_issues(connection, series_ids)
    seen = read_frame(
        connection,
        "SELECT f.series_id, f.model_id, MIN(f.issued_at) AS first_issued_at, "
        "MAX(f.issued_at) AS last_issued_at, MAX(f.issue_period) AS last_issue_period "
        f"FROM {queued_issues} CROSS JOIN forecasts f JOIN models m ON m.id = f.model_id "
        "WHERE f.series_id = q.series_id AND f.issue_period = q.period "
        "AND m.name NOT LIKE :prefix GROUP BY f.series_id, f.model_id",
        {"prefix": f"{BENCHMARK_PREFIX}%", **params},
    )
    _consume_issues(connection, queued_issues, params)
    return seen


def record_activity(connection: Connection, seen: pd.DataFrame) -> None:
    """Merge first/last issue per (series, model), as `activity_of` gives, into the table."""
    if seen.empty:
        return
    staged = stage_keys(connection, "bm_activity", seen[["series_id", "model_id"]])
    stored = read_frame(
        connection,
        "SELECT a.* FROM forecast_activity a JOIN "
        f"{staged} k ON k.series_id = a.series_id AND k.model_id = a.model_id",
    )
    both = pd.concat([seen, stored], ignore_index=True)
    merged = both.groupby(["series_id", "model_id"], as_index=False).agg(
        first_issued_at=("first_issued_at", "min"),
        last_issued_at=("last_issued_at", "max"),
        last_issue_period=("last_issue_period", "max"),
    )
    if len(stored):
        connection.exec_driver_sql(
            "DELETE FROM forecast_activity WHERE (series_id, model_id) IN "
            f"(SELECT series_id, model_id FROM {staged})"
        )
    insert_frame(connection, forecast_activity, merged.astype("int64"))


def _requests(fresh: _Fresh, model_ids: dict[str, int]) -> pd.DataFrame:
    """Each benchmark to make: per method, every (issue time, target) of the queued production
    forecasts that lacks it, and every one of those issued after a changed actual."""
    columns = ["series_id", "issued_at", "issue_period", "target_at", "target_period", "horizon"]
    methods = pd.DataFrame({"method": list(model_ids), "model_id": list(model_ids.values())})
    key = [*_REQUEST_KEY, "model_id"]
    wanted = fresh.queued.drop_duplicates(_REQUEST_KEY)[columns].merge(methods, how="cross")
    wanted = wanted.merge(fresh.made.drop_duplicates(), how="left", on=key, indicator=True)
    lacking = wanted.loc[wanted.pop("_merge") == "left_only"]
    again = fresh.later.drop_duplicates(_REQUEST_KEY)[columns].merge(methods, how="cross")
    both = pd.concat([lacking, again], ignore_index=True)
    return both.drop_duplicates(key, ignore_index=True)


def _history(connection: Connection, requests: pd.DataFrame, lookback: int) -> pd.DataFrame:
    """Actuals of the requested series from `lookback` periods before their first issue."""
    bounds = requests.groupby("series_id", as_index=False).agg(
        low=("issue_period", "min"), high=("issue_period", "max")
    )
    bounds["low"] -= lookback
    staged = stage_keys(connection, "bm_history", bounds)
    return read_frame(
        connection,
        f"SELECT a.series_id, a.period, a.value FROM actuals a JOIN {staged} b "
        "ON a.series_id = b.series_id AND a.period >= b.low AND a.period < b.high",
    )


def _seasons(connection: Connection, series_ids: np.ndarray) -> pd.Series:
    staged = stage_keys(connection, "bm_season", pd.DataFrame({"series_id": series_ids}))
    found = read_frame(
        connection, f"SELECT s.id, s.season FROM series s JOIN {staged} k ON k.series_id = s.id"
    )
    return found.set_index("id")["season"].astype("int64")


def _forecast_frames(
    config: Config, history: pd.DataFrame, missing: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Benchmark forecasts and intervals for the missing (request, method) combinations."""
    settings = config.benchmarks
    frames: list[pd.DataFrame] = []
    bounds: list[pd.DataFrame] = []
    for method, requests in missing.groupby("method", sort=True):
        if method == "ets":
            from aftercast.benchmark_ets import ets_forecasts

            made, intervals = ets_forecasts(
                history, requests, settings.levels, settings.ets_history
            )
        else:
            made, intervals = benchmark_methods.benchmark_forecasts(
                history,
                requests.drop(columns="method"),
                [str(method)],
                settings.levels,
                settings.error_window,
                settings.min_errors,
            )
        shift = sum(len(f) for f in frames)
        frames.append(made.assign(row=made["row"] + shift))
        bounds.append(intervals.assign(row=intervals["row"] + shift))
    return pd.concat(frames, ignore_index=True), pd.concat(bounds, ignore_index=True)


def _store(connection: Connection, made: pd.DataFrame, intervals: pd.DataFrame) -> int:
    """Upsert through the ingest path: new ones inserted, changed ones replaced and queued."""
    good = made.set_index("row").assign(
        series_key=lambda f: f["series_id"], model=lambda f: f["model_id"].astype(str)
    )
    checked = Checked(
        good=good,
        rejected=pd.DataFrame(),
        intervals=intervals,
        quantiles=pd.DataFrame({"row": [], "prob": [], "value": []}),
    )
    ids = made["series_id"].unique()
    models = {str(m): int(m) for m in made["model_id"].unique()}
    written = write_forecasts(
        connection, checked, pd.Series(ids, index=ids), models, int(time.time()), benchmarks=True
    )
    return written.accepted + written.revised


def _benchmark_batch(
    connection: Connection, config: Config, series_ids: np.ndarray
) -> BenchmarkStats:
    stats = BenchmarkStats(series=len(series_ids))
    methods = benchmark_methods_in_use(config)
    if not methods:
        record_activity(connection, _queued_activity(connection, series_ids))
        return stats
    fresh = _fresh_forecasts(connection, series_ids)
    production = fresh.production()
    if production.empty:
        return stats
    record_activity(connection, activity_of(production))
    model_ids = ensure_models(connection, [benchmark_methods.model_name(m) for m in methods])
    by_name = {m: model_ids[benchmark_methods.model_name(m)] for m in methods}
    missing = _requests(fresh, by_name)
    if missing.empty:
        return stats
    missing["season"] = (
        _seasons(connection, missing["series_id"].unique()).reindex(missing["series_id"]).to_numpy()
    )
    settings = config.benchmarks
    lookback = max(settings.error_window, settings.ets_history) + 3 * int(
        missing["season"].max() + missing["horizon"].max()
    )
    history = _history(connection, missing, lookback)
    made, intervals = _forecast_frames(config, history, missing)
    if made.empty:
        return stats
    stats.forecasts = _store(connection, made, intervals)
    stats.issue_times = int(made[["series_id", "issued_at"]].drop_duplicates().shape[0])
    return stats


def make_benchmarks(
    engine: Engine,
    config: Config,
    now: int,
    series_ids: np.ndarray | None = None,
    batch_rows: int = 50_000,
) -> BenchmarkStats:
    """Make the benchmark forecasts for every new issue time (one transaction per batch).

    `series_ids` limits the stage to those series (a replica's shards); None means all.
    """
    del now  # benchmarks depend on issue times and known actuals, not on the cycle clock
    queued = _queued_series(engine)
    if series_ids is not None:
        queued = queued.loc[queued["series_id"].isin(series_ids)]
    total = BenchmarkStats()
    if queued.empty:
        return total
    refresh_statistics(engine, ("forecasts", "actuals", "match_queue"))
    batch = (queued["n"].cumsum() // batch_rows).to_numpy()
    series = queued["series_id"].to_numpy(np.int64)

    def run(index: int) -> BenchmarkStats:
        with write(engine) as connection:
            return _benchmark_batch(connection, config, series[batch == index])

    # Batches hold disjoint series: on PostgreSQL two run at once (`store.parallel`).
    for stats in each(engine, np.unique(batch).tolist(), run):
        total.series += stats.series
        total.issue_times += stats.issue_times
        total.forecasts += stats.forecasts
    return total
