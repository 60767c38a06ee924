"""Windows of real-shaped series through ingest, matching and the windows stage.

An hourly series in Europe/Berlin across the spring daylight-saving change (expected counts
and horizons from pandas' own time-zone arithmetic), a weekly open series
(`statsmodels.datasets.co2`) with seasonal naive forecasts made here (MASE per Hyndman and
Koehler 2006, RMSSE per the M5 Competitor's Guide, sMAPE per the M4 Competitor's Guide,
MAE per scikit-learn), and the CONTRACT's window edges.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from sklearn import metrics
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.ingest import ingest_records
from aftercast.matching import match
from aftercast.window_store import current_windows, refresh_windows
from tests.conftest import make_config

LOCAL = "%Y-%m-%dT%H:%M:%S"


def _run(engine: Engine, config: Config, now: int) -> None:
    refresh_windows(engine, config, now, match(engine, now).touched)


def _row(rows: pd.DataFrame, horizon: object) -> pd.Series:
    chosen = rows[rows["horizon"].astype(str) == str(horizon)]
    assert len(chosen) == 1
    return chosen.iloc[0]


def test_hourly_series_across_daylight_saving_change(engine: Engine, store_url: str) -> None:
    zone = "Europe/Berlin"
    config = make_config(
        store_url,
        series=[{"id": "load", "frequency": "h", "season": 24, "timezone": zone}],
        window={"name": "day", "days": 1},
    )
    # 2026-03-29 02:00 local does not exist: clocks jump from 02:00 to 03:00.
    hours = pd.date_range("2026-03-28 00:00", "2026-03-30 00:00", freq="h", tz=zone)
    values = np.arange(len(hours), dtype=float) % 17 + 10.0
    actuals = [
        {"series_id": "load", "observed_at": t.strftime(LOCAL), "value": v}
        for t, v in zip(hours, values, strict=True)
    ]
    forecasts: list[dict[str, Any]] = []
    value_at = dict(zip(hours, values, strict=True))
    for issued in hours[:-3]:
        for h in (1, 3):
            target = issued + pd.Timedelta(hours=h)  # elapsed hours, as pandas counts them
            forecasts.append(
                {
                    "series_id": "load",
                    "model": "m",
                    "issued_at": (issued + pd.Timedelta(minutes=30)).strftime(LOCAL),
                    "target_at": target.strftime(LOCAL),
                    "point": value_at[target] + h,
                }
            )
    ingest_records(engine, config, "actuals", actuals, "test")
    report = ingest_records(engine, config, "forecasts", forecasts, "test")
    assert report.rejected == 0
    now_local = pd.Timestamp("2026-03-29 12:00", tz=zone)
    now = int(now_local.timestamp())
    _run(engine, config, now)
    rows = current_windows(engine, config, now)
    assert {str(h) for h in rows["horizon"]} == {"1", "3", "all"}
    for h in (1, 3):
        targets = hours[:-3] + pd.Timedelta(hours=h)
        inside = (targets > now_local - pd.Timedelta(days=1)) & (targets <= now_local)
        row = _row(rows, h)
        assert row["n"] == inside.sum() == 24  # a day of elapsed time holds 24 hours
        assert row["mae"] == pytest.approx(float(h))


@pytest.fixture
def co2_weeks() -> pd.Series:
    from statsmodels.datasets import co2

    weekly = co2.load_pandas().data["co2"].iloc[-260:]
    # The few missing weeks are filled by linear interpolation (pandas), before anything else.
    return weekly.interpolate()


def test_weekly_co2_with_seasonal_naive_forecasts(
    engine: Engine, store_url: str, co2_weeks: pd.Series
) -> None:
    m, n = 52, len(co2_weeks)
    config = make_config(
        store_url,
        series_defaults={"frequency": "W", "season": m, "timezone": "UTC"},
        window={"name": "recent", "points": 20},
    )
    y = co2_weeks.to_numpy()
    dates = co2_weeks.index.tz_localize("UTC")
    stamp = "%Y-%m-%dT%H:%M:%SZ"
    actuals = [
        {"series_id": "co2", "observed_at": d.strftime(stamp), "value": v}
        for d, v in zip(dates, y, strict=True)
    ]
    forecasts, expected = [], []
    for origin in range(n - 30, n - 1):
        # Seasonal naive: the value of the same week a year before the target.
        for h in range(1, 5):
            target = origin + h
            if target >= n:
                continue
            f = y[target - m]
            forecasts.append(
                {
                    "series_id": "co2",
                    "model": "snaive",
                    "issued_at": (dates[origin] + pd.Timedelta(hours=1)).strftime(stamp),
                    "target_at": dates[target].strftime(stamp),
                    "point": f,
                }
            )
            # Scales over the weeks strictly before the issue week (Hyndman and Koehler, 2006).
            diffs = y[m:origin] - y[: origin - m]
            expected.append((target, h, y[target], f, np.abs(diffs).mean(), (diffs**2).mean()))
    ingest_records(engine, config, "actuals", actuals, "test")
    ingest_records(engine, config, "forecasts", forecasts, "test")
    now = int(dates[-1].timestamp())
    _run(engine, config, now)
    frame = pd.DataFrame(expected, columns=["target", "h", "y", "f", "s", "s2"])
    frame = frame[frame["target"] >= n - 20]  # the 20 latest target weeks
    row = _row(current_windows(engine, config, now), "all")
    e = frame["y"] - frame["f"]
    assert row["n"] == len(frame)
    assert row["mae"] == pytest.approx(metrics.mean_absolute_error(frame["y"], frame["f"]))
    assert row["mase"] == pytest.approx(np.mean(np.abs(e) / frame["s"]))
    assert row["rmsse"] == pytest.approx(np.sqrt(np.mean(e**2 / frame["s2"])))
    m4 = 200 * np.mean(np.abs(e) / (np.abs(frame["y"]) + np.abs(frame["f"])))
    assert row["smape"] == pytest.approx(m4)
    by_h = _row(current_windows(engine, config, now), 4)
    assert by_h["n"] == (frame["h"] == 4).sum()


def test_daily_window_edges_through_the_store(engine: Engine, store_url: str) -> None:
    # CONTRACT: now - D days < target_at <= now, and the N latest target periods <= now.
    config = make_config(
        store_url,
        window={"name": "three", "days": 3},
        windows=[{"name": "two", "points": 2}],
    )
    days = pd.date_range("2026-01-01", periods=10, freq="D", tz="UTC")
    ingest_records(
        engine,
        config,
        "actuals",
        [
            {"series_id": "s", "observed_at": d.isoformat(), "value": 10.0 + i}
            for i, d in enumerate(days)
        ],
        "test",
    )
    ingest_records(
        engine,
        config,
        "forecasts",
        [
            {
                "series_id": "s",
                "model": "m",
                "issued_at": (d - pd.Timedelta(hours=18)).isoformat(),
                "target_at": d.isoformat(),
                "point": 10.0,
            }
            for d in days[1:]
        ],
        "test",
    )
    now = int(days[6].timestamp())  # exactly on a target: included; days[3] is excluded
    _run(engine, config, now)
    three = _row(current_windows(engine, config, now, "three"), "all")
    assert three["n"] == 3 and three["me"] == pytest.approx(np.mean([4.0, 5.0, 6.0]))
    assert three["window_start"] == int(days[3].timestamp()) and three["window_end"] == now
    two = _row(current_windows(engine, config, now, "two"), "all")
    assert two["n"] == 2 and two["window_start"] == int(days[5].timestamp())
    # One second earlier the target on days[6] is out and days[3] is in.
    earlier = current_windows(engine, config, now - 1, "three")
    assert _row(earlier, "all")["me"] == pytest.approx(np.mean([3.0, 4.0, 5.0]))
