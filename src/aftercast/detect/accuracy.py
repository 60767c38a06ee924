"""Accuracy drift tests: has a model's loss grown, against a benchmark or its own baseline?

Inputs are losses per pair (absolute or squared errors, interval scores, pinball losses: any
loss where lower is better) laid out as a 2-D array keys x time, NaN-padded, one row per
(series, model, horizon). ``diebold_mariano`` compares two forecasts of the same targets (a model
against the seasonal naive benchmark aftercast computes itself); ``mean_shift_test`` compares a
recent window with a baseline window of the same model; ``skill_score`` says by how much one
beats the other. Loss sequences of h-step forecasts are autocorrelated, so every variance here is
a long-run (HAC) variance rather than the plain sample variance.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from aftercast.detect import (
    FloatArray,
    IntArray,
    StatTestResult,
    as_float,
    as_rows,
    compact_rows,
)

Alternative = Literal["two-sided", "greater", "less"]


def _centred_rows(rows: FloatArray) -> tuple[FloatArray, IntArray, FloatArray]:
    """Compact each row, centre it on its mean; padding becomes 0 so it drops out of sums."""
    compact, n = compact_rows(rows)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nansum(compact, axis=1) / n
    centred = np.where(np.isnan(compact), 0.0, compact - mean[:, None])
    return centred, n, mean


def _long_run_variance(centred: FloatArray, n: IntArray, weights: FloatArray) -> FloatArray:
    """gamma_0 + 2 sum_k w_k gamma_k per row, gamma_k = (1/n) sum_t u_t u_(t-k).

    ``weights`` is rows x lags, column k the weight of lag k (column 0 is ignored: weight 1).
    The loop runs over lags only, each step covering every row at once.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        total = (centred**2).sum(axis=1) / n
        for lag in range(1, min(weights.shape[1], centred.shape[1])):
            gamma = (centred[:, lag:] * centred[:, :-lag]).sum(axis=1) / n
            total = total + 2.0 * weights[:, lag] * gamma
    return total


def _pvalue(statistic: FloatArray, df: FloatArray, alternative: Alternative) -> FloatArray:
    """Student t p-value (df = inf is the standard normal) for the chosen alternative."""
    if alternative == "greater":
        return stats.t.sf(statistic, df)
    if alternative == "less":
        return stats.t.cdf(statistic, df)
    if alternative == "two-sided":
        return np.minimum(2.0 * stats.t.sf(np.abs(statistic), df), 1.0)
    raise ValueError(f"alternative must be 'two-sided', 'greater' or 'less'; got {alternative!r}")


def _per_row(values: ArrayLike, rows: int, name: str) -> IntArray:
    """A scalar or one whole number >= 0 per row (horizons, lag counts)."""
    array = np.broadcast_to(as_float(values, name).ravel(), (rows,))
    if (np.isnan(array) | (array < 0) | (array != np.round(array))).any():
        raise ValueError(f"{name} must be whole numbers >= 0")
    return array.astype(np.int64)


def harvey_leybourne_newbold_factor(n: ArrayLike, horizon: ArrayLike) -> FloatArray:
    """Small-sample correction of the Diebold-Mariano statistic.

    sqrt((n + 1 - 2h + h(h - 1) / n) / n) (Harvey, Leybourne and Newbold, 1997, IJF 13(2));
    NaN where the radicand is not positive (too few pairs for the horizon).

    >>> round(float(harvey_leybourne_newbold_factor(10, 2)), 4)
    0.8485
    """
    size = as_float(n, "n")
    h = as_float(horizon, "horizon")
    with np.errstate(invalid="ignore", divide="ignore"):
        radicand = (size + 1 - 2 * h + h * (h - 1) / size) / size
    return np.where(radicand > 0, np.sqrt(np.where(radicand > 0, radicand, 1.0)), np.nan)


def diebold_mariano(
    loss_a: ArrayLike,
    loss_b: ArrayLike,
    horizon: ArrayLike = 1,
    alternative: Alternative = "two-sided",
) -> StatTestResult:
    """Diebold-Mariano test of equal expected loss, with the Harvey-Leybourne-Newbold correction.

    With the loss differential d_t = a_t - b_t on the same targets, its mean d_bar and the
    long-run variance V = gamma_0 + 2 sum_(k=1)^(h-1) gamma_k (rectangular kernel, since
    optimal h-step errors are MA(h - 1)), DM = d_bar / sqrt(V / n) (Diebold and Mariano, 1995,
    JBES 13(3)), multiplied by ``harvey_leybourne_newbold_factor(n, h)`` and compared with
    Student t, n - 1 df. ``alternative="greater"`` tests "a is worse than b" (mean d > 0).

    Rows are keys, the last axis time; a NaN in either loss drops that pair and the remaining
    pairs count as consecutive. ``horizon`` is a scalar or one per row. Where V <= 0 (constant
    differential, or the rectangular kernel's rare negative estimate) or n is too small for h,
    statistic and p-value are NaN: no evidence either way, and ``fleet.benjamini_hochberg``
    ignores NaN.

    >>> result = diebold_mariano([3.0, 2.0, 4.0, 3.0, 5.0], [1.0, 2.0, 1.0, 2.0, 1.0])
    >>> round(float(result.statistic), 4), round(float(result.pvalue), 4)
    (2.8284, 0.0474)
    """
    a, shape = as_rows(loss_a, "loss_a")
    b = np.broadcast_to(as_rows(loss_b, "loss_b")[0], a.shape)
    h = _per_row(horizon, a.shape[0], "horizon")
    if (h < 1).any():
        raise ValueError("horizon must be >= 1")
    centred, n, mean = _centred_rows(a - b)
    lags = np.arange(int(h.max(initial=1)))
    weights = (lags[None, :] < h[:, None]).astype(np.float64)
    variance = _long_run_variance(centred, n, weights)
    factor = harvey_leybourne_newbold_factor(n, h)
    valid = (variance > 0) & (n >= 2) & ~np.isnan(factor)
    with np.errstate(invalid="ignore", divide="ignore"):
        statistic = np.where(valid, mean / np.sqrt(variance / n) * factor, np.nan)
    pvalue = _pvalue(statistic, (n - 1).astype(np.float64), alternative)
    return StatTestResult(statistic.reshape(shape), pvalue.reshape(shape))


def newey_west_lags(n: ArrayLike) -> IntArray:
    """Automatic HAC lag count floor(4 (n / 100)^(2/9)) (Newey and West, 1994; common practice).

    >>> newey_west_lags([50, 100, 500]).tolist()
    [3, 4, 5]
    """
    return np.floor(4.0 * (np.maximum(as_float(n, "n"), 0.0) / 100.0) ** (2.0 / 9.0)).astype(
        np.int64
    )


def _hac_variance_of_mean(
    values: ArrayLike, lags: ArrayLike | None, name: str
) -> tuple[FloatArray, FloatArray, IntArray, tuple[int, ...]]:
    """Mean and Newey-West (Bartlett) variance of the mean of every row, with its n."""
    rows, shape = as_rows(values, name)
    centred, n, mean = _centred_rows(rows)
    lag_count = newey_west_lags(n) if lags is None else _per_row(lags, rows.shape[0], "lags")
    k = np.arange(int(lag_count.max(initial=0)) + 1)
    weights = np.clip(1.0 - k[None, :] / (lag_count[:, None] + 1.0), 0.0, None)
    with np.errstate(invalid="ignore", divide="ignore"):
        variance = _long_run_variance(centred, n, weights) / n
    return mean, variance, n, shape


def mean_shift_test(
    recent: ArrayLike,
    baseline: ArrayLike,
    lags: ArrayLike | None = None,
    alternative: Alternative = "greater",
) -> StatTestResult:
    """Is the mean loss on a recent window larger than on an earlier, separate baseline window?

    z = (mean_r - mean_b) / sqrt(V_r / n_r + V_b / n_b), each V a Newey-West long-run variance
    with Bartlett weights 1 - k / (L + 1), k <= L (Newey and West, 1987, Econometrica 55(3)),
    referred to the standard normal: the windows are independent and each mean is
    asymptotically normal. ``lags`` L is a scalar, one per row, or None for
    ``newey_west_lags(n)`` per window. Rows are keys (the same keys in both arrays), NaN is
    padding. NaN where either window has fewer than two values or both variances are zero.

    >>> result = mean_shift_test([2.0, 3.0, 2.5, 3.5], [1.0, 1.5, 1.0, 1.5], lags=0)
    >>> round(float(result.statistic), 3), f"{float(result.pvalue):.1e}"
    (4.899, '4.8e-07')
    """
    mean_r, var_r, n_r, shape = _hac_variance_of_mean(recent, lags, "recent")
    mean_b, var_b, n_b, shape_b = _hac_variance_of_mean(baseline, lags, "baseline")
    if shape != shape_b:
        raise ValueError(f"recent and baseline need the same keys; got {shape} and {shape_b}")
    total = var_r + var_b
    valid = (n_r >= 2) & (n_b >= 2) & (total > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        statistic = np.where(valid, (mean_r - mean_b) / np.sqrt(total), np.nan)
    # Infinite df is the normal: two HAC variances of different windows have no pooled df.
    pvalue = _pvalue(statistic, np.full(statistic.shape, np.inf), alternative)
    return StatTestResult(statistic.reshape(shape), pvalue.reshape(shape))


def skill_score(model_loss: ArrayLike, benchmark_loss: ArrayLike) -> FloatArray:
    """Skill against a benchmark: 1 - model_loss / benchmark_loss (higher is better).

    1 is a perfect forecast, 0 no better than the benchmark, negative worse (the generic skill
    score, e.g. Murphy, 1988, Monthly Weather Review 116; with MAE against the seasonal naive
    forecast it is 1 - relative MAE, cf. Hyndman and Koehler, 2006). Elementwise on mean
    losses; NaN where the benchmark loss is 0.

    >>> skill_score([0.5, 2.0, 1.0], [1.0, 1.0, 0.0])
    array([ 0.5, -1. ,  nan])
    """
    model = as_float(model_loss, "model_loss")
    benchmark = as_float(benchmark_loss, "benchmark_loss")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(benchmark != 0, 1.0 - model / benchmark, np.nan)
