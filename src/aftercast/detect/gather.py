"""Reading what the detection stage tests: the window's pairs, baselines, activity, freshness.

Every read is one set-based query (joins against staged key tables), never one per series.
The window is the configured detection window (`detection.window`, default the first
configured window): `days` holds targets in (now - D days, now], `points` the N latest target
periods per (series, model) at or before now.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection

from aftercast.benchmark_methods import BENCHMARK_PREFIX, model_name
from aftercast.config import Config, WindowConfig
from aftercast.detect.profiles import KEY, with_buckets
from aftercast.periods import periods_by_series
from aftercast.settings.detection import bucket_labels
from aftercast.store.bulk import id_condition, is_postgres, read_frame, stage_keys
from aftercast.store.catalog import interval_levels
from aftercast.window_store import find_window

DAY = 86_400
# What the tests read. Tested models: every pair column the checks use and the interval
# measures of each level (width is upper - lower). The reference benchmark only feeds the
# benchmark check, which needs its absolute errors and interval scores on the same targets.
_PAIR_COLUMNS = (
    "p.forecast_id, p.series_id, p.model_id, p.horizon, p.issued_at, p.target_at, "
    "p.target_period, p.actual, p.point, p.error, p.abs_error, p.sq_error"
)
_HIT_MEASURES = ("lower", "upper", "hit", "interval_score")
_BENCHMARK_PAIR_COLUMNS = (
    "p.forecast_id, p.series_id, p.model_id, p.horizon, p.issued_at, p.target_at, "
    "p.target_period, p.abs_error"
)
_BENCHMARK_HIT_MEASURES = ("interval_score",)
# Up to this many levels are read as columns of their pair (one LEFT JOIN each); beyond it,
# as a row per (pair, level).
MAX_JOINED_LEVELS = 12


@dataclass
class WindowData:
    """The window's pairs (production models, bucketed), their interval hits, the benchmark's."""

    pairs: pd.DataFrame
    hits: pd.DataFrame
    benchmark: pd.DataFrame
    benchmark_hits: pd.DataFrame
    models: pd.Series = field(default_factory=lambda: pd.Series(dtype=object))  # id -> name


def detection_window(config: Config) -> WindowConfig:
    """The window the tests look at: `detection.window`, default the first configured."""
    return find_window(config, config.detection.window)


@dataclass
class _Source:
    """The window's pairs as `p`: joins after `FROM pairs p`, the WHERE condition, its
    parameters, and for a `points` window the N latest periods to keep (the clause selects
    each key's periods from its N-th latest on). `probe` joins child rows by a lookup per
    pair (PostgreSQL)."""

    joins: str
    where: str
    params: dict[str, Any]
    points: int | None = None
    probe: bool = False

    def select(self, columns: str) -> str:
        return f"SELECT {columns} FROM pairs p {self.joins}WHERE {self.where}"

    def select_intervals(self, measures: tuple[str, ...]) -> str:
        """The interval rows of the window's pairs, as `i`, joined in the database.

        PostgreSQL is made to look each pair's rows up by key (a lateral subquery that the
        planner may not flatten): left to choose, it hashed every interval row in the store
        once per page of series, so detection grew with the square of the fleet.
        """
        columns = ", ".join(f"i.{name}" for name in ("forecast_id", "level", *measures))
        if self.probe:
            rows = (
                "CROSS JOIN LATERAL (SELECT * FROM pair_intervals i0 "
                "WHERE i0.forecast_id = p.forecast_id OFFSET 0) i "
            )
        else:
            rows = "JOIN pair_intervals i ON i.forecast_id = p.forecast_id "
        return f"SELECT {columns} FROM pairs p {self.joins}{rows}WHERE {self.where}"

    def select_with_levels(
        self, columns: str, measures: tuple[str, ...], levels: list[float]
    ) -> tuple[str, dict[str, Any]]:
        """The window's pairs, each with its interval measures of every level as columns
        `{measure}_{j}` (NULL where the pair has no interval at `levels[j]`).

        One row per pair instead of one per (pair, level): a pair's key columns are turned
        into Python values once, not once per level, and no merge joins them up afterwards;
        this read is most of detection's time on SQLite.
        """
        joins, selected, params = [], [columns], dict(self.params)
        for j, level in enumerate(levels):
            params[f"level_{j}"] = level
            selected += [f"i{j}.{name} AS {name}_{j}" for name in measures]
            if self.probe:  # a keyed lookup per pair, as in `select_intervals`
                joins.append(
                    f"LEFT JOIN LATERAL (SELECT * FROM pair_intervals l{j} WHERE "
                    f"l{j}.forecast_id = p.forecast_id AND l{j}.level = :level_{j} "
                    f"OFFSET 0) i{j} ON TRUE "
                )
            else:
                joins.append(
                    f"LEFT JOIN pair_intervals i{j} ON i{j}.forecast_id = p.forecast_id "
                    f"AND i{j}.level = :level_{j} "
                )
        sql = (
            f"SELECT {', '.join(selected)} FROM pairs p {self.joins}{''.join(joins)}"
            f"WHERE {self.where}"
        )
        return sql, params


def _window_source(
    connection: Connection,
    window: WindowConfig,
    now: int,
    model_ids: list[int],
    series_ids: np.ndarray | None,
) -> _Source:
    models = f"({', '.join(str(int(i)) for i in model_ids) or 'NULL'})"
    probe = is_postgres(connection)
    chosen, page = "", ""
    params: dict[str, Any] = {}
    if series_ids is not None and probe:
        # The page as an array: the planner walks (series, model, target) per series instead
        # of the window's whole range of targets.
        condition, params = id_condition(connection, "p.series_id", series_ids, "page")
        page = f" AND {condition}"
    elif series_ids is not None:
        staged_series = stage_keys(
            connection, "detect_page", pd.DataFrame({"series_id": series_ids})
        )
        chosen = f"JOIN {staged_series} s ON s.series_id = p.series_id "
    if window.days is not None:
        since = now - int(window.days * DAY)
        where = f"p.target_at > :since AND p.target_at <= :now AND p.model_id IN {models}{page}"
        return _Source(chosen, where, {"since": since, "now": now, **params}, probe=probe)
    points = int(window.points or 1)
    # The first of each key's N latest periods, however far back a gap in its targets puts
    # it (a span of a fixed number of periods would cut the window short after a gap).
    first = read_frame(
        connection,
        "SELECT series_id, model_id, MIN(target_period) - 1 AS low FROM ("
        "SELECT p.series_id, p.model_id, p.target_period, DENSE_RANK() OVER (PARTITION BY "
        "p.series_id, p.model_id ORDER BY p.target_period DESC) AS period_rank FROM pairs p "
        f"{chosen}WHERE p.target_at <= :now AND p.model_id IN {models}{page}) ranked "
        "WHERE period_rank <= :points GROUP BY series_id, model_id",
        {"now": now, "points": points, **params},
    )
    staged = stage_keys(connection, "detect_last", first[["series_id", "model_id", "low"]])
    joins = (
        f"JOIN {staged} k ON k.series_id = p.series_id "
        "AND k.model_id = p.model_id AND p.target_period > k.low "
    )
    return _Source(joins, f"p.target_at <= :now{page}", {"now": now, **params}, points, probe)


def _latest_periods(pairs: pd.DataFrame, points: int) -> pd.DataFrame:
    """The pairs of each (series, model)'s `points` latest target periods."""
    periods = pairs[["series_id", "model_id", "target_period"]].drop_duplicates()
    rank = periods.groupby(["series_id", "model_id"])["target_period"].rank(ascending=False)
    latest = periods.loc[rank <= points]
    return pairs.merge(latest, on=["series_id", "model_id", "target_period"])


def _read_window(
    connection: Connection,
    config: Config,
    now: int,
    model_ids: list[int],
    series_ids: np.ndarray | None,
    columns: tuple[str, tuple[str, ...]],
    levels: list[float],
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The window's pairs of `model_ids`, bucketed, and their interval rows (each with the
    pair's key columns), read together in one range read: each level's measures joined to
    its pair in the database, or with many levels the interval rows read on their own."""
    pair_columns, measures = columns
    source = _window_source(connection, detection_window(config), now, model_ids, series_ids)
    wide = len(levels) <= MAX_JOINED_LEVELS
    if wide:
        pairs = read_frame(connection, *source.select_with_levels(pair_columns, measures, levels))
    else:
        pairs = read_frame(connection, source.select(pair_columns), source.params)
    if source.points is not None:
        pairs = _latest_periods(pairs, source.points)
    pairs = with_buckets(pairs, bucket_labels(config.horizon_buckets))
    key = ["forecast_id", *KEY, "horizon", "issued_at", "target_period", "target_at"]
    key += ["actual"] if "actual" in pairs.columns else []
    if wide:
        return _split_levels(pairs, key, measures, levels)
    intervals = read_frame(connection, source.select_intervals(measures), source.params)
    return pairs, intervals.merge(pairs[key], on="forecast_id")


def _split_levels(
    pairs: pd.DataFrame, key: list[str], measures: tuple[str, ...], levels: list[float]
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Pairs read with their levels as columns -> the pairs, and a row per (pair, level)
    where the pair has an interval at that level, in pair order and then level order (as a
    row-per-level read would return them)."""
    columns = {name: [f"{name}_{j}" for j in range(len(levels))] for name in measures}
    present = pairs[columns[measures[0]]].notna().to_numpy()
    rows, slots = np.nonzero(present)  # row-major: pair by pair, each pair's levels in order
    hits = {"forecast_id": pairs["forecast_id"].to_numpy()[rows]}
    hits["level"] = np.asarray(levels, dtype=np.float64)[slots]
    for name, named in columns.items():
        hits[name] = pairs[named].to_numpy(np.float64)[rows, slots]
    hits |= {name: pairs[name].to_numpy()[rows] for name in key[1:]}
    frame = pd.DataFrame(hits)
    if "hit" in frame.columns:
        frame["hit"] = frame["hit"].astype(np.int64)
    return pairs.drop(columns=[c for named in columns.values() for c in named]), frame


def window_data(
    connection: Connection, config: Config, now: int, series_ids: np.ndarray | None = None
) -> WindowData:
    """The detection window's pairs and hits, split into tested models and the benchmark;
    of the series in `series_ids` only (a page of the fleet), or of all of them."""
    models = read_frame(connection, "SELECT id, name FROM models").set_index("id")["name"]
    models = models.astype(str)
    is_benchmark = models.str.startswith(BENCHMARK_PREFIX)
    is_reference = models == model_name(config.detection.benchmark)
    is_tested = ~is_benchmark | (config.detection.include_benchmarks & ~is_reference)
    reads = (
        (is_tested, (_PAIR_COLUMNS, _HIT_MEASURES)),
        (is_reference, (_BENCHMARK_PAIR_COLUMNS, _BENCHMARK_HIT_MEASURES)),
    )
    levels = interval_levels(connection)  # read once for both groups
    (pairs, hits), (benchmark, benchmark_hits) = (
        _read_window(
            connection, config, now, [int(i) for i in models.index[which]], series_ids, columns,
            levels,
        )
        for which, columns in reads
    )  # fmt: skip
    return WindowData(pairs, hits, benchmark, benchmark_hits, models)


def series_periods(connection: Connection, series_ids: np.ndarray, now: int) -> pd.DataFrame:
    """Each series' key and the period ordinal that contains `now` (its own frequency and zone)."""
    staged = stage_keys(connection, "detect_series", pd.DataFrame({"series_id": series_ids}))
    found = read_frame(
        connection,
        f"SELECT s.id AS series_id, s.key, s.frequency, s.timezone FROM series s "
        f"JOIN {staged} k ON k.series_id = s.id",
    )
    found["now_period"] = periods_by_series(
        np.full(len(found), now, dtype=np.int64),
        found["frequency"].to_numpy(),
        found["timezone"].to_numpy(),
    )
    return found.set_index("series_id")


def activity(connection: Connection) -> pd.DataFrame:
    """forecast_activity of the production models (benchmarks are aftercast's own)."""
    return read_frame(
        connection,
        "SELECT a.series_id, a.model_id, a.first_issued_at, a.last_issued_at, a.last_issue_period "
        "FROM forecast_activity a JOIN models m ON m.id = a.model_id WHERE m.name NOT LIKE :p",
        {"p": f"{BENCHMARK_PREFIX}%"},
    )


def overdue_targets(
    connection: Connection, periods: pd.DataFrame, overdue_periods: int, since: int, now: int
) -> pd.DataFrame:
    """Per (series, model): production targets after the series' latest actual, already due.

    A target is due once `overdue_periods` periods have passed since its period; only targets
    after `since` count, so long-retired series are not reported.
    """
    if periods.empty:
        return pd.DataFrame()
    staged = stage_keys(
        connection, "detect_due", periods.reset_index()[["series_id", "now_period"]]
    )
    latest = read_frame(
        connection,
        f"SELECT a.series_id, MAX(a.period) AS last_period, MAX(a.observed_at) AS last_at "
        f"FROM actuals a JOIN {staged} k ON k.series_id = a.series_id GROUP BY a.series_id",
    )
    ranges = periods.reset_index()[["series_id", "now_period"]].merge(
        latest, on="series_id", how="left"
    )
    ranges["low"] = ranges["last_period"].fillna(-(2**62)).astype(np.int64)
    ranges["due"] = ranges["now_period"] - overdue_periods
    staged_ranges = stage_keys(connection, "detect_ranges", ranges[["series_id", "low", "due"]])
    found = read_frame(
        connection,
        "SELECT f.series_id, f.model_id, MIN(f.target_period) AS first_period, "
        "MIN(f.target_at) AS first_at, COUNT(DISTINCT f.target_period) AS targets "
        # CROSS JOIN keeps the few staged ranges as SQLite's outer loop (one index range per
        # series); left to itself it walked all of `forecasts` in group order.
        f"FROM {staged_ranges} r CROSS JOIN forecasts f JOIN models m ON m.id = f.model_id "
        "WHERE r.series_id = f.series_id AND f.target_period > r.low "
        "AND f.target_period <= r.due "
        "AND m.name NOT LIKE :p AND f.target_at > :since AND f.target_at <= :now "
        "GROUP BY f.series_id, f.model_id",
        {"p": f"{BENCHMARK_PREFIX}%", "since": since, "now": now},
    )
    return found.merge(latest[["series_id", "last_at"]], on="series_id", how="left")
