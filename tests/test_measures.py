"""Per-pair measures against outside references: scikit-learn, properscoring, scipy, the
Gneiting-Raftery interval score, the M4 sMAPE and the Hyndman-Koehler MASE scale on
`statsmodels.datasets.co2`."""

from __future__ import annotations

import numpy as np
import pandas as pd
import properscoring
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import stats
from sklearn import metrics

from aftercast import measures

# scikit-learn's documented example for mean_absolute_error / mean_squared_error.
SKLEARN_Y = [3, -0.5, 2, 7]
SKLEARN_F = [2.5, 0.0, 2, 8]


@pytest.fixture
def sample() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(3)
    y = rng.gamma(4.0, 25.0, size=400) + 1.0
    return y, y + rng.normal(0.0, 12.0, size=400)


def test_documented_sklearn_example() -> None:
    # Values printed in the scikit-learn documentation: MAE 0.5, MSE 0.375.
    e = measures.forecast_error(SKLEARN_Y, SKLEARN_F)
    assert np.abs(e).mean() == pytest.approx(0.5) and (e**2).mean() == pytest.approx(0.375)
    assert np.abs(e).mean() == pytest.approx(metrics.mean_absolute_error(SKLEARN_Y, SKLEARN_F))
    assert (e**2).mean() == pytest.approx(metrics.mean_squared_error(SKLEARN_Y, SKLEARN_F))


def test_point_errors_match_sklearn(sample: tuple[np.ndarray, np.ndarray]) -> None:
    y, f = sample
    e = measures.forecast_error(y, f)
    assert np.abs(e).mean() == pytest.approx(metrics.mean_absolute_error(y, f), rel=1e-12)
    assert (e**2).mean() == pytest.approx(metrics.mean_squared_error(y, f), rel=1e-12)
    assert np.sqrt((e**2).mean()) == pytest.approx(metrics.root_mean_squared_error(y, f), rel=1e-12)
    # scikit-learn's MAPE is a fraction, ours a percentage.
    ape = measures.absolute_percentage_error(y, f)
    assert ape.mean() / 100 == pytest.approx(
        metrics.mean_absolute_percentage_error(y, f), rel=1e-12
    )


def test_ape_leaves_out_zero_actuals() -> None:
    # MAPE is undefined against a zero actual (common practice: such pairs are left out).
    ape = measures.absolute_percentage_error([0.0, 100.0, 0.0], [1.0, 150.0, 0.0])
    assert np.isnan(ape[[0, 2]]).all()
    assert ape[1] == pytest.approx(100 * metrics.mean_absolute_percentage_error([100], [150]))


@pytest.mark.parametrize("prob", [0.05, 0.1, 0.5, 0.9, 0.975])
def test_pinball_loss_matches_sklearn(sample: tuple[np.ndarray, np.ndarray], prob: float) -> None:
    y, q = sample
    ours = measures.pinball_loss(y, q, prob).mean()
    assert ours == pytest.approx(metrics.mean_pinball_loss(y, q, alpha=prob), rel=1e-12)


@pytest.mark.parametrize("level", [50.0, 80.0, 95.0])
def test_interval_score_is_the_gneiting_raftery_score(level: float) -> None:
    # Gneiting and Raftery (2007), JASA 102(477), eq. 43, and its quantile form (their
    # section 6.2): IS_alpha = (2 / alpha) * (pinball_{alpha/2}(l) + pinball_{1-alpha/2}(u)),
    # evaluated here with scikit-learn's pinball loss one pair at a time.
    rng = np.random.default_rng(5)
    y = rng.normal(0.0, 3.0, 60)
    centre = rng.normal(0.0, 1.0, 60)
    half = rng.uniform(0.5, 4.0, 60)
    lower, upper = centre - half, centre + half
    alpha = 1 - level / 100
    ours = measures.interval_score(y, lower, upper, level)
    formula = (
        (upper - lower)
        + (2 / alpha) * (lower - y) * (y < lower)
        + (2 / alpha) * (y - upper) * (y > upper)
    )
    np.testing.assert_allclose(ours, formula, rtol=1e-12)
    for i in range(len(y)):
        reference = (2 / alpha) * (
            metrics.mean_pinball_loss([y[i]], [lower[i]], alpha=alpha / 2)
            + metrics.mean_pinball_loss([y[i]], [upper[i]], alpha=1 - alpha / 2)
        )
        assert ours[i] == pytest.approx(reference, rel=1e-9)


def test_smape_is_the_m4_form(sample: tuple[np.ndarray, np.ndarray]) -> None:
    # M4 Competitor's Guide (2018): sMAPE = (2 / h) * sum |Y - F| / (|Y| + |F|) * 100.
    y, f = sample
    h = len(y)
    m4 = 2 / h * np.sum(np.abs(y - f) / (np.abs(y) + np.abs(f))) * 100
    assert measures.symmetric_absolute_percentage_error(y, f).mean() == pytest.approx(m4)


def test_mape_asymmetry() -> None:
    # Common practice: 150 against 100 is 50%, 100 against 150 is 33%.
    ape = measures.absolute_percentage_error([100.0, 150.0], [150.0, 100.0])
    assert ape[0] == pytest.approx(50.0)
    assert ape[1] == pytest.approx(100 / 3)


def _co2() -> pd.Series:
    from statsmodels.datasets import co2

    return co2.load_pandas().data["co2"]


def test_mase_scale_on_co2_matches_direct_computation() -> None:
    # Hyndman and Koehler (2006), IJF 22(4): the scale is the in-sample MAE of the seasonal
    # naive method, here over the weeks strictly before each issue week (NaN weeks missing).
    weekly = _co2()
    m = 52
    direct_abs = (weekly - weekly.shift(m)).abs()
    direct_sq = (weekly - weekly.shift(m)) ** 2
    known = weekly.dropna()
    ordinal = pd.Series(np.arange(len(weekly)), index=weekly.index)
    actuals = pd.DataFrame(
        {"series_id": 1, "period": ordinal[known.index], "value": known, "season": m}
    )
    issue = np.array([60, 100, 400, 1000, 2283])
    queries = pd.DataFrame({"series_id": 1, "issue_period": issue})
    scales = measures.seasonal_scales(actuals, queries)
    for row, period in enumerate(issue):
        assert scales["scale_abs"][row] == pytest.approx(direct_abs.iloc[:period].mean())
        assert scales["scale_sq"][row] == pytest.approx(direct_sq.iloc[:period].mean())


def test_crps_of_gaussian_on_a_fine_grid_matches_properscoring() -> None:
    # CRPS of N(mu, sigma): properscoring.crps_gaussian (the closed form of Gneiting and
    # Raftery, 2007); our estimate uses 1,000 quantiles on the midpoints of an even grid.
    grid = (np.arange(1000) + 0.5) / 1000
    mu, sigma = np.array([0.0, 2.0, -1.0]), np.array([1.0, 0.5, 3.0])
    y = np.array([0.3, 4.0, -1.2])
    q = stats.norm.ppf(grid[None, :], loc=mu[:, None], scale=sigma[:, None])
    ours = measures.crps_from_quantiles(y, q, grid)
    np.testing.assert_allclose(ours, properscoring.crps_gaussian(y, mu, sigma), rtol=2e-3)


def test_crps_of_an_ensemble_matches_properscoring() -> None:
    # The quantile function of an M-member ensemble is a step function, so the midpoint grid
    # of K = 50 M points integrates its pinball loss exactly: equal to crps_ensemble.
    rng = np.random.default_rng(2)
    members = rng.normal(10.0, 2.0, size=(4, 20))
    y = np.array([9.0, 10.5, 16.0, 3.0])
    k = members.shape[1] * 50
    grid = (np.arange(k) + 0.5) / k
    ordered = np.sort(members, axis=1)
    q = ordered[:, np.minimum((grid * members.shape[1]).astype(int), members.shape[1] - 1)]
    ours = measures.crps_from_quantiles(y, q, grid)
    np.testing.assert_allclose(ours, properscoring.crps_ensemble(y, members), rtol=1e-9)


def test_pit_histogram_matches_scipy_pit_values() -> None:
    # PIT of y under N(mu, sigma) is scipy's norm.cdf(y); binned at the quantile levels it is
    # the histogram read off the forecast's quantiles.
    rng = np.random.default_rng(8)
    mu = rng.normal(0.0, 5.0, 500)
    y = mu + rng.normal(0.0, 1.3, 500)
    probs = np.array([0.1, 0.25, 0.5, 0.75, 0.9])
    q = stats.norm.ppf(probs[None, :], loc=mu[:, None], scale=1.0)
    ours = measures.pit_histogram(y, q, probs)
    pit = stats.norm.cdf(y, loc=mu, scale=1.0)
    counts, _ = np.histogram(pit, bins=np.concatenate([[0.0], probs, [1.0]]))
    np.testing.assert_allclose(ours, counts / len(y))
    assert ours.sum() == pytest.approx(1.0)


def test_rmsse_terms_use_the_squared_scale() -> None:
    # M5 Competitor's Guide: RMSSE = sqrt(mean(e^2) / mean((y_t - y_(t-m))^2)); with one
    # scale for all pairs the mean of e^2 / s2 is that ratio.
    e = np.array([1.0, -2.0, 3.0])
    ratio = np.mean(e**2) / 4.0
    assert np.sqrt(measures.squared_scaled_error(e, np.full(3, 4.0)).mean()) == pytest.approx(
        np.sqrt(ratio)
    )
    assert np.isnan(measures.squared_scaled_error([1.0], [0.0])).all()


positive = st.floats(min_value=0.5, max_value=1e4, allow_nan=False)


@settings(max_examples=40, deadline=None)
@given(
    y=arrays(np.float64, st.integers(3, 30), elements=positive),
    noise=st.floats(min_value=-0.9, max_value=3.0),
    factor=st.floats(min_value=1e-3, max_value=1e3),
)
def test_percentage_and_scaled_errors_ignore_units(
    y: np.ndarray, noise: float, factor: float
) -> None:
    # Scale-free measures (Hyndman and Koehler, 2006): multiplying actuals and forecasts by
    # the same factor leaves MAPE, sMAPE and MASE unchanged.
    f = y * (1 + noise) + noise
    n = len(y)
    actuals = pd.DataFrame({"series_id": 1, "period": np.arange(n), "value": y, "season": 1})
    scaled = actuals.assign(value=y * factor)
    query = pd.DataFrame({"series_id": [1], "issue_period": [n]})
    scale = measures.seasonal_scales(actuals, query)["scale_abs"].to_numpy()
    scale_k = measures.seasonal_scales(scaled, query)["scale_abs"].to_numpy()
    # A scale at rounding level (y nearly constant: differences of one ulp) is left out: the
    # difference y_t - y_(t-m) itself then changes with the factor by cancellation.
    assume(scale[0] > 1e-9 * np.abs(y).max())
    for one, other in (
        (
            measures.absolute_percentage_error(y, f),
            measures.absolute_percentage_error(y * factor, f * factor),
        ),
        (
            measures.symmetric_absolute_percentage_error(y, f),
            measures.symmetric_absolute_percentage_error(y * factor, f * factor),
        ),
        (
            measures.scaled_error(y - f, np.repeat(scale, n)),
            measures.scaled_error((y - f) * factor, np.repeat(scale_k, n)),
        ),
    ):
        np.testing.assert_allclose(
            np.nanmean(np.abs(one)), np.nanmean(np.abs(other)), rtol=1e-9, atol=1e-12
        )
