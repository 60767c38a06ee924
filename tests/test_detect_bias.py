"""Bias detection checked against Montgomery's CUSUM ARL table, the normal table and sklearn."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error

from aftercast.detect.bias import (
    cusum_paths,
    normal_scale_from_interval,
    standardise_errors,
    tabular_cusum,
    tracking_signal,
)


def _run_lengths(h: float, shift: float, series: int, seed: int, chunk: int) -> np.ndarray:
    """Steps to the first signal of many simulated N(shift, 1) series, all at once.

    Time is simulated in chunks; series that have not signalled continue from their final
    C+ and C- (``initial``), so no run is cut short however long it lasts.
    """
    rng = np.random.default_rng(seed)
    lengths = np.zeros(series)
    active = np.arange(series)
    upper = lower = np.zeros(series)
    elapsed = 0
    while active.size:
        z = rng.standard_normal((active.size, chunk)) + shift
        result = tabular_cusum(z, k=0.5, h=h, initial=(upper, lower))
        done = result.first_signal >= 0
        lengths[active[done]] = elapsed + result.first_signal[done] + 1
        active, upper, lower = active[~done], result.upper[~done], result.lower[~done]
        elapsed += chunk
    return lengths


@pytest.mark.parametrize(
    ("h", "shift", "table_arl", "series", "chunk"),
    [
        (4.0, 0.0, 168.0, 20000, 600),
        (5.0, 0.0, 465.0, 20000, 1500),
        (4.0, 1.0, 8.38, 20000, 60),
        (5.0, 1.0, 10.4, 20000, 60),
    ],
)
def test_two_sided_cusum_average_run_lengths_match_montgomery(
    h: float, shift: float, table_arl: float, series: int, chunk: int
) -> None:
    # Montgomery, Introduction to Statistical Quality Control, tabular CUSUM ARL table for
    # k = 0.5 (from memory, agrees with simulation). Tolerance: four standard errors of the
    # simulated mean, plus the table's last printed digit.
    lengths = _run_lengths(h, shift, series, seed=int(10 * h + shift), chunk=chunk)
    standard_error = lengths.std(ddof=1) / np.sqrt(lengths.size)
    rounding = 0.5 if table_arl > 100 else 0.05
    assert abs(lengths.mean() - table_arl) <= 4 * standard_error + rounding


def test_cusum_follows_page_recursion_and_flags_the_right_side() -> None:
    # Page (1954) recursion, written out with pandas one step at a time as the reference.
    rng = np.random.default_rng(1)
    z = rng.standard_normal((3, 40))
    z[1] -= 1.5  # over-forecasting: errors below zero drive C-
    upper_path, lower_path = cusum_paths(z)
    upper = pd.Series(0.0, index=range(3))
    lower = pd.Series(0.0, index=range(3))
    for t in range(z.shape[1]):
        upper = (upper + z[:, t] - 0.5).clip(lower=0.0)
        lower = (lower - z[:, t] - 0.5).clip(lower=0.0)
        np.testing.assert_allclose(upper_path[:, t], upper, rtol=1e-12)
        np.testing.assert_allclose(lower_path[:, t], lower, rtol=1e-12)
    result = tabular_cusum(z)
    np.testing.assert_allclose(result.upper, upper_path[:, -1])
    np.testing.assert_allclose(result.lower, lower_path[:, -1])
    assert result.direction[1] == -1
    first = result.first_signal[1]
    assert lower_path[1, first] > 5.0 and (lower_path[1, :first] <= 5.0).all()


def test_cusum_skips_missing_observations_and_continues_from_a_state() -> None:
    rng = np.random.default_rng(2)
    z = rng.standard_normal((50, 80)) + 0.7
    gappy = np.insert(z, [10, 10, 40], np.nan, axis=1)
    whole, with_gaps = tabular_cusum(z), tabular_cusum(gappy)
    np.testing.assert_allclose(with_gaps.upper, whole.upper)
    np.testing.assert_allclose(with_gaps.lower, whole.lower)
    # Continuing from the state after the first half equals one pass over both halves.
    first_half = tabular_cusum(z[:, :30], h=1e9)
    second_half = tabular_cusum(z[:, 30:], h=1e9, initial=(first_half.upper, first_half.lower))
    np.testing.assert_allclose(second_half.upper, tabular_cusum(z, h=1e9).upper)
    np.testing.assert_array_equal(tabular_cusum(z, h=1e9).first_signal, -1)


def test_cusum_onset_estimates_when_the_shift_began() -> None:
    # Montgomery: the shift is estimated to start just after C+ last stood at zero. With a
    # two-sigma shift from t = 100, the estimate lands within a few steps of 100 in most runs.
    rng = np.random.default_rng(3)
    z = rng.standard_normal((2000, 160))
    z[:, 100:] += 2.0
    result = tabular_cusum(z, h=5.0)
    caught_after_shift = result.first_signal >= 100
    assert caught_after_shift.mean() > 0.8
    onset = result.onset[caught_after_shift]
    assert np.median(np.abs(onset - 100)) <= 2
    assert (result.direction[caught_after_shift] == 1).all()


def test_tracking_signal_is_cumulative_error_over_mean_absolute_error() -> None:
    # Reference: pandas cumulative sum and sklearn mean_absolute_error against a zero forecast;
    # the +/-4 limit is common practice.
    rng = np.random.default_rng(6)
    errors = rng.normal(0.0, 1.0, size=(4, 30))
    errors[2] += 1.0  # a persistent under-forecast
    errors[3, 20:] = np.nan
    result = tracking_signal(errors)
    for row in range(4):
        kept = errors[row][~np.isnan(errors[row])]
        expected = pd.Series(kept).cumsum().iloc[-1] / mean_absolute_error(kept, 0 * kept)
        assert result.signal[row] == pytest.approx(expected, rel=1e-12)
    np.testing.assert_array_equal(result.flagged, np.abs(result.signal) > 4)
    assert result.flagged[2]
    assert np.isnan(tracking_signal(np.zeros(5)).signal)


def test_normal_scale_from_interval_uses_the_standard_normal_table() -> None:
    # Standard normal table: central 80% is +/- 1.2816 sigma, 95% is +/- 1.9600 sigma.
    sigma = normal_scale_from_interval(
        [-1.2816, 10 - 2 * 1.96], [1.2816, 10 + 2 * 1.96], [0.8, 0.95]
    )
    np.testing.assert_allclose(sigma, [1.0, 2.0], rtol=1e-4)
    z = standardise_errors([[2.0, 4.0], [1.0, 1.0]], [[2.0], [0.0]])
    np.testing.assert_array_equal(z[0], [1.0, 2.0])
    assert np.isnan(z[1]).all()
