"""The numbers behind an alert's chart: recent actuals against the band, and rolling coverage.

For each alert that gets a chart (the worst few of a digest) one query fetches the recent pairs
of its series and model with their intervals; then, vectorised over all those alerts, it keeps
the shortest horizon of the alert's bucket (one forecast per target, so the band reads as a
line), the level the alert is about (else 80%, else the lowest stored), the latest points, and
the rolling share of actuals inside the band. The email channel draws them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from sqlalchemy import Connection

from aftercast.detect import profiles
from aftercast.notify.base import ChartData
from aftercast.periods import to_iso
from aftercast.store.bulk import read_frame, stage_keys

CHART_POINTS = 60
ROLLING_POINTS = 20
LOOKBACK_SECONDS = 120 * 86_400
PREFERRED_LEVEL = 80.0


def bucket_bounds(horizon: pd.Series) -> pd.DataFrame:
    """Lowest and highest horizon of each bucket label ("3", "2-7", "15+"; "all": every one)."""
    labels = [str(b) for b in horizon.unique() if str(b) != "all"]
    known = dict(zip(labels, profiles.bucket_bounds(labels), strict=True))
    known["all"] = (1, profiles.NO_UPPER)
    bounds = horizon.astype(str).map(known)
    return pd.DataFrame(bounds.tolist(), columns=["low", "high"], index=horizon.index)


def chart_data(connection: Connection, alerts: pd.DataFrame, now: int) -> dict[int, ChartData]:
    """Charts keyed by alert id for `alerts` (alert_id, series_id, model_id, horizon, level,
    series_key, model); alerts without recent interval pairs get none."""
    if alerts.empty:
        return {}
    keys = alerts[["series_id", "model_id"]].drop_duplicates().astype("int64")
    staged = stage_keys(connection, "chart_keys", keys)
    pairs = read_frame(
        connection,
        "SELECT p.series_id, p.model_id, p.horizon, p.target_at, p.actual, p.point, "
        "i.level, i.lower, i.upper, i.hit FROM pairs p "
        f"JOIN {staged} k ON k.series_id = p.series_id AND k.model_id = p.model_id "
        "JOIN pair_intervals i ON i.forecast_id = p.forecast_id "
        "WHERE p.target_at <= :now AND p.target_at > :since",
        {"now": now, "since": now - LOOKBACK_SECONDS},
    )
    if pairs.empty:
        return {}
    wanted = alerts.join(bucket_bounds(alerts["horizon"]))
    wanted = wanted.rename(columns={"horizon": "bucket", "level": "alert_level"})
    rows = wanted.merge(pairs, on=["series_id", "model_id"])
    rows = rows.loc[(rows["horizon"] >= rows["low"]) & (rows["horizon"] <= rows["high"])]
    rows = _one_horizon_one_level(rows)
    rows = rows.sort_values(["alert_id", "target_at"]).groupby("alert_id").tail(CHART_POINTS)
    rows["coverage"] = (
        rows.groupby("alert_id")["hit"]
        .rolling(ROLLING_POINTS, min_periods=min(5, ROLLING_POINTS))
        .mean()
        .reset_index(level=0, drop=True)
    )
    return {int(i): _chart(group) for i, group in rows.groupby("alert_id")}


def _one_horizon_one_level(rows: pd.DataFrame) -> pd.DataFrame:
    shortest = rows.groupby("alert_id")["horizon"].transform("min")
    rows = rows.loc[rows["horizon"] == shortest]
    wanted = rows["alert_level"].astype(float).fillna(PREFERRED_LEVEL)
    has_wanted = (rows["level"] == wanted).groupby(rows["alert_id"]).transform("any")
    lowest = rows.groupby("alert_id")["level"].transform("min")
    chosen = np.where(has_wanted, wanted, lowest)
    return rows.loc[rows["level"].to_numpy() == chosen]


def _chart(group: pd.DataFrame) -> ChartData:
    times = [str(to_iso(int(t))) for t in group["target_at"]]
    coverage = group["coverage"]
    first = group.iloc[0]

    def values(column: str) -> list[float | None]:
        return [None if np.isnan(v) else float(v) for v in group[column].astype(float)]

    return ChartData(
        series_id=str(first["series_key"]),
        model=str(first["model"]),
        level=float(first["level"]),
        times=times,
        actual=values("actual"),
        point=values("point"),
        lower=values("lower"),
        upper=values("upper"),
        coverage_times=[t for t, c in zip(times, coverage, strict=True) if not np.isnan(c)],
        coverage=[float(c) for c in coverage if not np.isnan(c)],
        bucket=str(first["bucket"]),
        horizon=int(first["horizon"]),
    )
