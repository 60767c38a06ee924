"""Bias detection: persistent over- or under-forecasting, by CUSUM chart and tracking signal.

Errors are e = y - f (positive = under-forecast), laid out as a 2-D array series x time with NaN
for "no observation". ``standardise_errors`` divides by a scale (a baseline RMSE, or the
predictive standard deviation implied by an interval, ``normal_scale_from_interval``) so one
threshold serves every series; ``tabular_cusum`` runs the two-sided tabular CUSUM on the
standardised errors and ``tracking_signal`` the classic demand-planning check. The CUSUM loops
over time, never over series: each step updates every series at once.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from aftercast.detect import FloatArray, IntArray, as_float, as_rows, check_level


def standardise_errors(errors: ArrayLike, scale: ArrayLike) -> FloatArray:
    """z = e / scale, broadcast (a scale per series or per pair); NaN where scale <= 0 or NaN.

    >>> standardise_errors([[2.0, -1.0], [3.0, 0.0]], [[2.0], [0.0]])
    array([[ 1. , -0.5],
           [ nan,  nan]])
    """
    e = as_float(errors, "errors")
    s = as_float(scale, "scale")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(s > 0, e / s, np.nan)


def normal_scale_from_interval(lower: ArrayLike, upper: ArrayLike, level: ArrayLike) -> FloatArray:
    """Standard deviation implied by a central interval if the predictive law were normal.

    sigma = (upper - lower) / (2 z), z = Phi^-1((1 + level) / 2): 1.2816 for 80%, 1.9600 for
    95% (standard normal table).

    >>> round(float(normal_scale_from_interval(-1.959964, 1.959964, 0.95)), 6)
    1.0
    """
    width = as_float(upper, "upper") - as_float(lower, "lower")
    return width / (2.0 * stats.norm.ppf((1.0 + check_level(level)) / 2.0))


class CusumResult(NamedTuple):
    """Per series: final C+ and C-, first signal index (-1 if none), its direction and onset.

    ``direction`` is +1 when C+ signalled (errors above zero: under-forecasting), -1 for C-,
    0 without a signal. ``onset`` is the index just after the chart last stood at zero before
    the first signal, Montgomery's estimate of when the shift began (-1 without a signal).
    """

    upper: FloatArray
    lower: FloatArray
    first_signal: IntArray
    direction: IntArray
    onset: IntArray


def _cusum_steps(
    rows: FloatArray, k: float, upper: FloatArray, lower: FloatArray
) -> Iterator[tuple[int, FloatArray, FloatArray, NDArray[np.bool_]]]:
    """Yield (t, C+_t, C-_t, observed_t) for every time step, all series at once.

    A missing observation leaves both sums unchanged: a gap is not evidence either way, and
    resetting would let a bias hide behind gaps.
    """
    for t in range(rows.shape[1]):
        z = rows[:, t]
        seen = ~np.isnan(z)
        upper = np.where(seen, np.maximum(0.0, upper + z - k), upper)
        lower = np.where(seen, np.maximum(0.0, lower - z - k), lower)
        yield t, upper, lower, seen


def tabular_cusum(
    z: ArrayLike,
    k: float = 0.5,
    h: float = 5.0,
    initial: tuple[ArrayLike, ArrayLike] | None = None,
) -> CusumResult:
    """Two-sided tabular CUSUM on standardised errors.

    C+_t = max(0, C+_(t-1) + z_t - k), C-_t = max(0, C-_(t-1) - z_t - k), starting at 0 (or
    ``initial``, to continue a chart from the last cycle), signal when either exceeds h (Page,
    1954, Biometrika 41; the tabular form of Montgomery, Introduction to Statistical Quality
    Control, with K = k sigma, H = h sigma). k = 0.5, h = 5 detect a one-sigma shift in about
    10 steps and raise a false alarm about once in 465 in control. ``z`` is series x time
    with NaN for no observation (skipped, not reset); 1-D is one series.

    >>> result = tabular_cusum([0.2, 1.5, 2.0, 1.8, 1.2, 2.5])
    >>> result.first_signal.item(), result.direction.item(), result.onset.item()
    (5, 1, 1)
    """
    rows, shape = as_rows(z, "z")
    zeros = np.zeros(rows.shape[0])
    start_upper, start_lower = (
        (zeros, zeros)
        if initial is None
        else (np.broadcast_to(as_float(v, "initial").ravel(), zeros.shape) for v in initial)
    )
    upper, lower = start_upper, start_lower
    first = np.full(rows.shape[0], -1, dtype=np.int64)
    direction = np.zeros(rows.shape[0], dtype=np.int64)
    onset = np.full(rows.shape[0], -1, dtype=np.int64)
    # Index just after each side last stood at zero; 0 when the run began before this batch.
    upper_start = np.zeros(rows.shape[0], dtype=np.int64)
    lower_start = np.zeros(rows.shape[0], dtype=np.int64)
    for t, upper, lower, seen in _cusum_steps(rows, k, start_upper, start_lower):
        upper_start = np.where(seen & (upper == 0), t + 1, upper_start)
        lower_start = np.where(seen & (lower == 0), t + 1, lower_start)
        fired = (first < 0) & seen & ((upper > h) | (lower > h))
        if fired.any():
            up = upper >= lower
            first[fired] = t
            direction[fired] = np.where(up, 1, -1)[fired]
            onset[fired] = np.where(up, upper_start, lower_start)[fired]
    return CusumResult(
        upper.reshape(shape),
        lower.reshape(shape),
        first.reshape(shape),
        direction.reshape(shape),
        onset.reshape(shape),
    )


def cusum_paths(z: ArrayLike, k: float = 0.5) -> tuple[FloatArray, FloatArray]:
    """The whole C+ and C- paths of ``tabular_cusum`` (same shape as ``z``), for charts.

    >>> cusum_paths([1.0, 1.0, -2.0])[0]
    array([0.5, 1. , 0. ])
    """
    rows, _ = as_rows(z, "z")
    upper_path = np.empty_like(rows)
    lower_path = np.empty_like(rows)
    zeros = np.zeros(rows.shape[0])
    for t, upper, lower, _seen in _cusum_steps(rows, k, zeros, zeros):
        upper_path[:, t] = upper
        lower_path[:, t] = lower
    shape = np.shape(z)
    return upper_path.reshape(shape), lower_path.reshape(shape)


class TrackingSignal(NamedTuple):
    """Per series: the tracking signal and whether it lies outside +/- limit."""

    signal: FloatArray
    flagged: NDArray[np.bool_]


def tracking_signal(errors: ArrayLike, limit: float = 4.0) -> TrackingSignal:
    """Cumulative error divided by the mean absolute error, per series.

    TS = sum(e) / mean|e| over the row's observed errors (NaN skipped); an unbiased forecast
    keeps it near 0, and |TS| > 4 flags bias (common practice in demand planning). NaN where
    every error is 0 or missing.

    >>> tracking_signal([[1.0, 2.0, 1.0, 2.0, 1.0], [1.0, -1.0, 1.0, -1.0, np.nan]]).signal
    array([5., 0.])
    """
    rows, shape = as_rows(errors, "errors")
    total = np.nansum(rows, axis=1)
    count = (~np.isnan(rows)).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_absolute = np.nansum(np.abs(rows), axis=1) / count
        signal = np.where(mean_absolute > 0, total / mean_absolute, np.nan)
    return TrackingSignal(signal.reshape(shape), (np.abs(signal) > limit).reshape(shape))
