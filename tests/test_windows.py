"""Window selection and window measures (pure), against scikit-learn, properscoring, scipy
and the CONTRACT definitions in design.md."""

from __future__ import annotations

import numpy as np
import pandas as pd
import properscoring
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn import metrics

from aftercast import measures
from aftercast.config import WindowConfig
from aftercast.windows import DAY, group_horizons, pair_sums, select_window, window_rows

NOW = 1_800_000_000


def make_pairs(
    y: np.ndarray,
    f: np.ndarray,
    horizon: np.ndarray,
    sigma: float = 1.0,
    probs: tuple[float, ...] = (10.0, 50.0, 90.0),
    scale: float = 2.0,
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Pairs of one (series, model) with 80% intervals and quantiles of N(f, sigma)."""
    n = len(y)
    error = measures.forecast_error(y, f)
    pairs = pd.DataFrame(
        {
            "forecast_id": np.arange(1, n + 1),
            "series_id": 1,
            "model_id": 1,
            "horizon": horizon,
            "target_at": NOW - np.arange(n) * 3600,
            "target_period": np.arange(n)[::-1],
            "actual": y,
            "point": f,
            "error": error,
            "abs_error": np.abs(error),
            "sq_error": error**2,
            "ape": measures.absolute_percentage_error(y, f),
            "sape": measures.symmetric_absolute_percentage_error(y, f),
            "scale_abs": scale,
            "scale_sq": scale**2,
            "scaled_error": measures.scaled_error(error, np.full(n, scale)),
        }
    )
    z = stats.norm.ppf(0.9)
    lower, upper = f - z * sigma, f + z * sigma
    intervals = pd.DataFrame(
        {
            "forecast_id": pairs["forecast_id"],
            "level": 80.0,
            "hit": measures.interval_hit(y, lower, upper),
            "width": upper - lower,
            "interval_score": measures.interval_score(y, lower, upper, 80.0),
        }
    )
    grid = np.asarray(probs) / 100
    values = stats.norm.ppf(grid[None, :], loc=f[:, None], scale=sigma)
    quantiles = pd.DataFrame(
        {
            "forecast_id": np.repeat(pairs["forecast_id"].to_numpy(), len(grid)),
            "prob": np.tile(np.asarray(probs), n),
            "value": values.ravel(),
            "pinball": measures.pinball_loss(
                np.repeat(y, len(grid)), values.ravel(), np.tile(grid, n)
            ),
        }
    )
    return pairs, intervals, quantiles


def rows_of(
    pairs: pd.DataFrame,
    intervals: pd.DataFrame,
    quantiles: pd.DataFrame,
    buckets: list[str] | None = None,
) -> pd.DataFrame:
    return window_rows(group_horizons(pair_sums(pairs, intervals, quantiles), buckets))


@pytest.fixture
def gaussian() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(11)
    n = 600
    f = rng.uniform(50, 150, n)
    y = f + rng.normal(0.0, 1.0, n)
    return y, f, rng.integers(1, 5, n)


def test_days_window_edges_start_exclusive_end_inclusive() -> None:
    # CONTRACT: window.days D holds the pairs with now - D days < target_at <= now.
    targets = np.array([NOW - 2 * DAY, NOW - 2 * DAY + 1, NOW - DAY, NOW, NOW + 1])
    pairs = pd.DataFrame(
        {"series_id": 1, "model_id": 1, "target_at": targets, "target_period": np.arange(5)}
    )
    chosen = select_window(pairs, WindowConfig(days=2), NOW)
    assert chosen["target_at"].tolist() == [NOW - 2 * DAY + 1, NOW - DAY, NOW]


def test_points_window_takes_the_latest_periods_up_to_now() -> None:
    # CONTRACT: window.points N holds the pairs of the N latest target periods (per series and
    # model), here with two horizons per period and a target after now left out.
    pairs = pd.DataFrame(
        {
            "series_id": 1,
            "model_id": [1] * 8 + [2] * 2,
            "target_period": [1, 1, 2, 2, 3, 3, 4, 4, 1, 2],
            "target_at": [10, 10, 20, 20, 30, 30, 40, 40, 10, 20],
        }
    )
    chosen = select_window(pairs, WindowConfig(points=2), now=35)
    assert sorted(chosen.query("model_id == 1")["target_period"]) == [2, 2, 3, 3]
    assert sorted(chosen.query("model_id == 2")["target_period"]) == [1, 2]


def test_window_measures_match_sklearn(gaussian: tuple[np.ndarray, ...]) -> None:
    y, f, horizon = gaussian
    y = y.copy()
    y[:7] = 0.0  # zero actuals: left out of MAPE and counted (CONTRACT)
    rows = rows_of(*make_pairs(y, f, horizon), buckets=["2-3"])
    for label, mask in [
        (1, horizon == 1),
        ("2-3", (horizon >= 2) & (horizon <= 3)),
        ("all", np.ones_like(horizon, dtype=bool)),
    ]:
        row = rows[rows["horizon"] == label].iloc[0]
        yy, ff = y[mask], f[mask]
        nonzero = yy != 0
        assert row["n"] == mask.sum()
        assert row["me"] == pytest.approx(np.mean(yy - ff))
        assert row["mae"] == pytest.approx(metrics.mean_absolute_error(yy, ff))
        assert row["mse"] == pytest.approx(metrics.mean_squared_error(yy, ff))
        assert row["rmse"] == pytest.approx(metrics.root_mean_squared_error(yy, ff))
        assert row["mape"] == pytest.approx(
            100 * metrics.mean_absolute_percentage_error(yy[nonzero], ff[nonzero])
        )
        assert row["mape_excluded"] == (~nonzero).sum()
        # CONTRACT: WAPE = 100 * sum|e| / sum|y|; MASE = mean |e| / s (Hyndman-Koehler).
        assert row["wape"] == pytest.approx(100 * np.abs(yy - ff).sum() / np.abs(yy).sum())
        assert row["mase"] == pytest.approx(metrics.mean_absolute_error(yy, ff) / 2.0)
        # M5 Competitor's Guide: RMSSE = sqrt(mean(e^2) / s2), s2 = 4 for every pair here.
        assert row["rmsse"] == pytest.approx(np.sqrt(metrics.mean_squared_error(yy, ff) / 4.0))
        for prob in (10, 50, 90):
            q = stats.norm.ppf(prob / 100, loc=ff, scale=1.0)
            assert row[f"pinball_{prob}"] == pytest.approx(
                metrics.mean_pinball_loss(yy, q, alpha=prob / 100)
            )


def test_window_tracking_signal_is_cumulative_error_over_mae() -> None:
    # Common practice: tracking signal = sum(e) / mean|e|; |TS| > 4 flags bias.
    y = np.array([10.0, 12.0, 11.0, 13.0])
    f = np.array([9.0, 10.0, 10.0, 11.0])
    row = rows_of(*make_pairs(y, f, np.ones(4, dtype=int))).iloc[-1]
    assert row["tracking_signal"] == pytest.approx(np.sum(y - f) / np.mean(np.abs(y - f)))
    assert abs(row["tracking_signal"]) == 4  # every error positive: TS = n


def test_window_coverage_of_calibrated_intervals_is_near_nominal(
    gaussian: tuple[np.ndarray, ...],
) -> None:
    # Errors ~ N(0, 1) and 80% intervals f +/- z_0.9: hits ~ Binomial(n, 0.8); the window's
    # coverage must pass scipy's exact binomial test.
    y, f, horizon = gaussian
    row = rows_of(*make_pairs(y, f, horizon)).iloc[-1]
    # CONTRACT: coverage = share of pairs with lower <= y <= upper, counted here with numpy.
    half = stats.norm.ppf(0.9)
    hits = int(((f - half <= y) & (y <= f + half)).sum())
    assert row["hits_80"] == hits and row["coverage_80"] == pytest.approx(hits / len(y))
    assert stats.binomtest(hits, len(y), 0.8).pvalue > 0.001
    assert row["width_80"] == pytest.approx(2 * stats.norm.ppf(0.9))


def test_window_crps_on_a_fine_grid_matches_properscoring(
    gaussian: tuple[np.ndarray, ...],
) -> None:
    # properscoring.crps_gaussian, averaged over the window, against twice the mean pinball
    # loss over 99 quantiles (1%..99%); the grid's tails cost it about one percent.
    y, f, horizon = gaussian
    probs = tuple(float(p) for p in range(1, 100))
    row = rows_of(*make_pairs(y, f, horizon, probs=probs)).iloc[-1]
    reference = properscoring.crps_gaussian(y, f, 1.0).mean()
    assert row["crps"] == pytest.approx(reference, rel=0.02)


def test_window_pit_histogram_matches_scipy(gaussian: tuple[np.ndarray, ...]) -> None:
    # PIT values from scipy's norm.cdf, binned at the quantile levels 10, 50, 90.
    y, f, horizon = gaussian
    row = rows_of(*make_pairs(y, f, horizon)).iloc[-1]
    counts, _ = np.histogram(stats.norm.cdf(y, loc=f), bins=[0, 0.1, 0.5, 0.9, 1.0])
    got = [row["pit_0-10"], row["pit_10-50"], row["pit_50-90"], row["pit_90-100"]]
    np.testing.assert_allclose(got, counts / len(y))


def test_undefined_measures_are_nan() -> None:
    # One pair with a zero actual, no scale: MAPE, MASE and RMSSE undefined (CONTRACT).
    pairs, intervals, quantiles = make_pairs(np.array([0.0]), np.array([0.0]), np.array([1]))
    pairs[["scale_abs", "scale_sq", "scaled_error"]] = np.nan
    row = rows_of(pairs, intervals, quantiles).iloc[0]
    assert np.isnan(row["mape"]) and row["mape_excluded"] == 1
    assert np.isnan(row["mase"]) and np.isnan(row["rmsse"]) and np.isnan(row["smape"])
    assert np.isnan(row["wape"]) and np.isnan(row["tracking_signal"])


errors = st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=1, max_size=40)


@settings(max_examples=50, deadline=None)
@given(
    e=errors,
    horizons=st.lists(st.integers(1, 4), min_size=40, max_size=40),
    width=st.floats(0.0, 1e5),
)
def test_mae_at_most_rmse_and_coverage_a_share(
    e: list[float], horizons: list[int], width: float
) -> None:
    # MAE <= RMSE (Jensen; common practice) and coverage in [0, 1], for every row.
    err = np.asarray(e)
    f = np.full(len(err), 100.0)
    pairs, intervals, quantiles = make_pairs(
        f + err, f, np.asarray(horizons[: len(err)]), sigma=width / 2.5631 + 1e-9
    )
    rows = rows_of(pairs, intervals, quantiles, buckets=["1-2"])
    assert (rows["mae"] <= rows["rmse"] * (1 + 1e-12) + 1e-12).all()
    assert rows["coverage_80"].between(0.0, 1.0).all()
    pit = rows[[c for c in rows.columns if c.startswith("pit_")]].sum(axis=1)
    np.testing.assert_allclose(pit, 1.0)
