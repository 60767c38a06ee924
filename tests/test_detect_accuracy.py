"""Accuracy drift tests checked against statsmodels HAC, scikit-learn and simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from sklearn.metrics import d2_absolute_error_score, mean_absolute_error, r2_score
from statsmodels.stats.sandwich_covariance import S_hac_simple

from aftercast.detect.accuracy import (
    diebold_mariano,
    harvey_leybourne_newbold_factor,
    mean_shift_test,
    newey_west_lags,
    skill_score,
)


def _moving_average_errors(rng: np.random.Generator, rows: int, n: int, h: int) -> np.ndarray:
    """Errors of an optimal h-step forecast: MA(h - 1) with unit variance."""
    shocks = rng.standard_normal((rows, n + h - 1))
    return np.asarray(sum(shocks[:, j : j + n] for j in range(h)) / math.sqrt(h))


def _autoregressive(rng: np.random.Generator, rows: int, n: int, phi: float) -> np.ndarray:
    burn_in = 50
    shocks = rng.standard_normal((rows, n + burn_in))
    values = np.zeros_like(shocks)
    for t in range(1, shocks.shape[1]):
        values[:, t] = phi * values[:, t - 1] + shocks[:, t]
    return values[:, burn_in:]


def _hac_bse_of_mean(values: np.ndarray, maxlags: int, kernel: str) -> tuple[float, float]:
    # Reference: statsmodels OLS on a constant with HAC covariance, no small-sample correction.
    fit = sm.OLS(values, np.ones_like(values)).fit(
        cov_type="HAC", cov_kwds={"maxlags": maxlags, "kernel": kernel, "use_correction": False}
    )
    return float(fit.params[0]), float(fit.bse[0])


@pytest.mark.parametrize(("n", "h"), [(10, 1), (10, 2), (50, 4), (7, 4)])
def test_harvey_leybourne_newbold_factor_is_the_published_formula(n: int, h: int) -> None:
    # Harvey, Leybourne and Newbold (1997), IJF 13(2): sqrt((n + 1 - 2h + h(h - 1)/n) / n).
    expected = math.sqrt((n + 1 - 2 * h + h * (h - 1) / n) / n)
    assert float(harvey_leybourne_newbold_factor(n, h)) == pytest.approx(expected, rel=1e-14)
    assert np.isnan(harvey_leybourne_newbold_factor(3, 3))  # radicand (3 + 1 - 6 + 2) / 3 = 0


@pytest.mark.parametrize("h", [1, 2, 4])
def test_diebold_mariano_equals_statsmodels_uniform_kernel_hac(h: int) -> None:
    # Reference: Diebold and Mariano (1995) variance = statsmodels HAC with the uniform kernel and
    # maxlags h - 1; then the HLN factor and Student t with n - 1 df (scipy.stats.t).
    rng = np.random.default_rng(h)
    loss_a = _moving_average_errors(rng, 6, 120, h) ** 2 + 0.1
    loss_b = _moving_average_errors(rng, 6, 120, h) ** 2
    loss_a[2, 90:] = np.nan  # a shorter row: padding
    loss_b[3, [5, 17, 60]] = np.nan  # gaps drop the pair
    result = diebold_mariano(loss_a, loss_b, h)
    greater = diebold_mariano(loss_a, loss_b, h, alternative="greater")
    for row in range(6):
        d = loss_a[row] - loss_b[row]
        d = d[~np.isnan(d)]
        mean, bse = _hac_bse_of_mean(d, h - 1, "uniform")
        expected = mean / bse * math.sqrt((d.size + 1 - 2 * h + h * (h - 1) / d.size) / d.size)
        assert result.statistic[row] == pytest.approx(expected, rel=1e-10)
        two_sided = 2 * stats.t.sf(abs(expected), d.size - 1)
        assert result.pvalue[row] == pytest.approx(two_sided, rel=1e-8)
        assert greater.pvalue[row] == pytest.approx(stats.t.sf(expected, d.size - 1), rel=1e-8)


def test_diebold_mariano_per_row_horizons_match_single_calls() -> None:
    rng = np.random.default_rng(12)
    loss_a, loss_b = rng.exponential(size=(2, 4, 80))
    horizons = np.array([1, 2, 3, 5])
    together = diebold_mariano(loss_a, loss_b, horizons).statistic
    alone = [float(diebold_mariano(loss_a[i], loss_b[i], horizons[i]).statistic) for i in range(4)]
    np.testing.assert_allclose(together, alone, rtol=1e-12)


def test_diebold_mariano_without_variance_is_nan() -> None:
    same = np.arange(30.0)
    result = diebold_mariano(np.vstack([same, same + 1]), np.vstack([same, same]))
    assert np.isnan(result.statistic).all() and np.isnan(result.pvalue).all()


@pytest.mark.parametrize("h", [1, 4])
def test_diebold_mariano_size_under_the_null(h: int) -> None:
    # Two equally good h-step forecasts: rejection rate at 5% over 2000 replications must lie in
    # 0.05 +/- 4 binomial standard errors (sqrt(0.05 * 0.95 / 2000) = 0.0049), i.e. 0.03-0.07.
    rng = np.random.default_rng(100 + h)
    loss_a = _moving_average_errors(rng, 2000, 200, h) ** 2
    loss_b = _moving_average_errors(rng, 2000, 200, h) ** 2
    rate = (diebold_mariano(loss_a, loss_b, h).pvalue < 0.05).mean()
    assert 0.03 <= rate <= 0.07


@pytest.mark.parametrize("lags", [0, 3, 7])
def test_mean_shift_variance_equals_statsmodels_bartlett_hac(lags: int) -> None:
    # Reference: Newey and West (1987) variance of each window's mean = statsmodels HAC with the
    # Bartlett kernel and maxlags L; z = difference / sqrt(sum of the two variances).
    rng = np.random.default_rng(lags)
    recent = np.abs(_autoregressive(rng, 5, 60, 0.4))
    baseline = np.abs(_autoregressive(rng, 5, 200, 0.4))
    baseline[1, 150:] = np.nan
    result = mean_shift_test(recent, baseline, lags=lags)
    for row in range(5):
        mean_r, bse_r = _hac_bse_of_mean(recent[row], lags, "bartlett")
        kept = baseline[row][~np.isnan(baseline[row])]
        mean_b, bse_b = _hac_bse_of_mean(kept, lags, "bartlett")
        expected = (mean_r - mean_b) / math.hypot(bse_r, bse_b)
        assert result.statistic[row] == pytest.approx(expected, rel=1e-10)
        assert result.pvalue[row] == pytest.approx(stats.norm.sf(expected), rel=1e-8)


def _variance_of_mean_default_lags(values: np.ndarray) -> float:
    # Reference: statsmodels S_hac_simple with its default nlags, floor(4 (n / 100)^(2/9)).
    centred = (values - values.mean())[:, None]
    return float(S_hac_simple(centred)[0, 0]) / values.size**2


@pytest.mark.parametrize(("n_recent", "n_baseline"), [(30, 99), (100, 250), (60, 1000)])
def test_default_lags_follow_the_statsmodels_newey_west_rule(
    n_recent: int, n_baseline: int
) -> None:
    rng = np.random.default_rng(n_recent)
    recent = np.abs(_autoregressive(rng, 1, n_recent, 0.5))[0] + 0.3
    baseline = np.abs(_autoregressive(rng, 1, n_baseline, 0.5))[0]
    variance = _variance_of_mean_default_lags(recent) + _variance_of_mean_default_lags(baseline)
    expected = (recent.mean() - baseline.mean()) / math.sqrt(variance)
    assert float(mean_shift_test(recent, baseline).statistic) == pytest.approx(expected, rel=1e-10)
    assert newey_west_lags([n_recent, n_baseline]).tolist() == [
        math.floor(4 * (n / 100) ** (2 / 9)) for n in (n_recent, n_baseline)
    ]


def test_mean_shift_size_under_null_and_power_against_half_again_the_loss() -> None:
    # Absolute AR(1) errors, phi = 0.3: recent 60 pairs, baseline 200, 2000 replications.
    # Size: 0.05 +/- 4 binomial standard errors (0.03-0.07). Power: a 50% loss increase is
    # caught at 5% in at least 90% of runs (common practice power target).
    rng = np.random.default_rng(42)
    recent = np.abs(_autoregressive(rng, 2000, 60, 0.3))
    baseline = np.abs(_autoregressive(rng, 2000, 200, 0.3))
    size = (mean_shift_test(recent, baseline).pvalue < 0.05).mean()
    assert 0.03 <= size <= 0.07
    power = (mean_shift_test(1.5 * recent, baseline).pvalue < 0.05).mean()
    assert power >= 0.9


def test_skill_score_equals_scikit_learn_d2_and_r2() -> None:
    # Reference: sklearn d2_absolute_error_score = 1 - MAE / MAE of the median forecast, and
    # r2_score = 1 - MSE / MSE of the mean forecast: skill scores against constant benchmarks.
    rng = np.random.default_rng(4)
    actual = rng.normal(10, 3, size=300)
    forecast = actual + rng.normal(0, 2, size=300)
    mae = mean_absolute_error(actual, forecast)
    median_mae = mean_absolute_error(actual, np.full_like(actual, np.median(actual)))
    mse = np.mean((actual - forecast) ** 2)
    mean_mse = np.var(actual)
    scores = skill_score([mae, mse], [median_mae, mean_mse])
    assert scores[0] == pytest.approx(d2_absolute_error_score(actual, forecast), rel=1e-12)
    assert scores[1] == pytest.approx(r2_score(actual, forecast), rel=1e-12)
    assert np.isnan(skill_score(1.0, 0.0))
