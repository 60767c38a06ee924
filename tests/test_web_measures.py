"""What the pages compute themselves: PIT histogram, rolling means, skill, tracking signal.

Outside references: the PIT of an outcome under a normal forecast is `scipy.stats.norm.cdf`, so
binning it at the forecast's probabilities with numpy gives the histogram a quantile forecast
must produce (Gneiting, Balabdaoui and Raftery 2007); under calibration each bin's expected
share is its width, checked with `scipy.stats.binomtest`. The skill score is 1 - loss / loss of
the reference (Murphy 1988, Monthly Weather Review 116). The tracking signal is cumulative error
over mean absolute error (common practice, flag beyond +/-4). Rolling windows follow the
CONTRACT (now - D days < target_at <= now), computed here directly with numpy.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from aftercast.config import WindowConfig
from aftercast.web.charts import pit_chart, rolling_mean
from aftercast.web.data import add_skill, fleet_frame
from aftercast.web.pit import forecast_quantiles, pit_histogram

PROBS = np.array([0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95])


def _normal_forecasts(
    n: int, rng: np.random.Generator, spread: float = 1.0
) -> tuple[pd.Series, pd.DataFrame, np.ndarray]:
    mu = rng.normal(100, 10, n)
    sigma = rng.uniform(1, 5, n)
    y = rng.normal(mu, sigma * spread)
    ids = np.arange(1, n + 1)
    bounds = pd.DataFrame(
        {
            "forecast_id": np.repeat(ids, len(PROBS)),
            "prob": np.tile(PROBS, n),
            "value": stats.norm.ppf(
                np.tile(PROBS, n), np.repeat(mu, len(PROBS)), np.repeat(sigma, len(PROBS))
            ),
        }
    )
    pit = stats.norm.cdf(y, mu, sigma)
    return pd.Series(y, index=ids), bounds, pit


def test_pit_bins_equal_scipy_normal_cdf_binned_at_the_quantile_probabilities() -> None:
    actual, bounds, pit = _normal_forecasts(2_000, np.random.default_rng(3))
    histogram = pit_histogram(actual, bounds)
    assert histogram is not None
    expected = np.bincount(np.digitize(pit, PROBS), minlength=len(PROBS) + 1)
    assert histogram.counts.tolist() == expected.tolist()
    assert histogram.expected == pytest.approx(np.diff(np.r_[0, PROBS, 1]))


def test_a_calibrated_forecast_fills_each_bin_by_its_width_and_a_narrow_one_does_not() -> None:
    actual, bounds, _ = _normal_forecasts(4_000, np.random.default_rng(11))
    histogram = pit_histogram(actual, bounds)
    assert histogram is not None
    for count, share in zip(histogram.counts, histogram.expected, strict=True):
        assert stats.binomtest(int(count), histogram.n, share).pvalue > 0.001
    narrow_actual, narrow_bounds, _ = _normal_forecasts(4_000, np.random.default_rng(5), 2.0)
    narrow = pit_histogram(narrow_actual, narrow_bounds)
    assert narrow is not None
    assert narrow.ratio[0] > 2 and narrow.ratio[-1] > 2  # too many outcomes beyond the tails
    assert pit_chart(narrow).startswith("<svg")


def test_interval_bounds_are_central_quantiles_and_odd_forecasts_are_left_out() -> None:
    intervals = pd.DataFrame(
        {
            "forecast_id": [1, 2, 3],
            "level": [80.0, 80.0, 50.0],
            "lower": [8.0, 8.0, 9.0],
            "upper": [12.0, 12.0, 11.0],
        }
    )
    quantiles = pd.DataFrame(
        {
            "forecast_id": [1, 1, 2, 2],
            "prob": [10.0, 50.0, 10.0, 50.0],
            "value": [8.0, 10.0, 8.0, 10.0],
        }
    )
    bounds = forecast_quantiles(intervals, quantiles)
    # An 80% central interval is the 10% and 90% quantiles (alpha/2 and 1 - alpha/2).
    assert bounds[bounds["forecast_id"] == 1]["prob"].tolist() == [0.1, 0.5, 0.9]
    histogram = pit_histogram(pd.Series([7.0, 11.0, 10.0], index=[1, 2, 3]), bounds)
    assert histogram is not None and histogram.n == 2  # forecast 3 has other probabilities
    assert histogram.counts.tolist() == [1, 0, 1, 0]


@pytest.mark.parametrize("window", [WindowConfig(days=3), WindowConfig(points=4)])
def test_rolling_mean_follows_the_window_definition(window: WindowConfig) -> None:
    rng = np.random.default_rng(0)
    times = np.sort(rng.choice(np.arange(0, 30 * 86_400, 3_600), size=80, replace=False))
    values = rng.normal(size=80)
    got = rolling_mean(times, values, window)
    for i, t in enumerate(times):
        if window.days is not None:  # CONTRACT: now - D days < target_at <= now
            inside = (times > t - window.days * 86_400) & (times <= t)
        else:
            inside = np.zeros(80, dtype=bool)
            inside[max(0, i - int(window.points or 0) + 1) : i + 1] = True
        assert got[i] == pytest.approx(values[inside].mean())


def test_skill_is_one_minus_the_mae_ratio_to_aftercasts_benchmark() -> None:
    rows = pd.DataFrame(
        {
            "series_id": ["a", "a", "a", "b", "b"],
            "model": ["m", "benchmark:naive", "benchmark:seasonal-naive", "m", "benchmark:naive"],
            "horizon": [1, 1, 1, "all", "all"],
            "mae": [2.0, 5.0, 4.0, 3.0, 0.0],
        }
    )
    skill = add_skill(rows).set_index(["series_id", "model"])["skill"]
    assert skill[("a", "m")] == pytest.approx(1 - 2.0 / 4.0)  # the seasonal naive is preferred
    assert np.isnan(skill[("b", "m")])  # a perfect benchmark: undefined, not infinite
    assert np.isnan(skill[("a", "benchmark:naive")])
    assert "skill" not in add_skill(rows[rows["model"] == "m"]).columns  # no benchmark, no column


def test_tracking_signal_is_cumulative_error_over_mean_absolute_error(
    tmp_path: object,
) -> None:
    from pathlib import Path

    from aftercast.periods import parse_instant
    from aftercast.store.bulk import read_frame
    from aftercast.store.queries import PAIR_SELECT
    from tests.test_web import NOW, seeded_store

    engine, config = seeded_store(Path(str(tmp_path)))
    now = parse_instant(NOW)
    frame = fleet_frame(engine, config.window, now)
    with engine.connect() as connection:
        pairs = read_frame(
            connection,
            PAIR_SELECT + " WHERE p.target_at <= :now AND p.target_at > :since",
            {"now": now, "since": now - 28 * 86_400},
        )
    grouped = pairs.groupby(["series_id", "model"])["error"]
    direct = grouped.sum() / grouped.apply(lambda e: e.abs().mean())
    shown = frame[frame["horizon"] == "all"].set_index(["series_id", "model"])["tracking_signal"]
    assert shown.sort_index().to_numpy() == pytest.approx(direct.sort_index().to_numpy())
    engine.dispose()
