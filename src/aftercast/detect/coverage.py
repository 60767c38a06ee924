"""Interval coverage tests: is a central prediction interval hitting its nominal level?

A hit is an outcome inside its interval, a miss one outside. Counts-based tests
(``binomial_coverage_pvalue``, ``kupiec_pof``, ``traffic_light_zone``) take arrays of hit or miss
counts and trial counts, broadcast together, so the whole fleet is one call; sequence-based tests
(``christoffersen_*``) take a 2-D array series x time of hits (1 inside, 0 outside, NaN no
observation). Levels are fractions in (0, 1): 0.8 for an 80% interval.

Overlapping horizons: forecasts issued at different times for the same target share its actual,
so their hits are dependent. We therefore test per horizon bucket, where each target contributes
one hit per test. Within one horizon h > 1 consecutive targets still share h - 1 periods of
unforeseen shocks, so even a well calibrated forecaster's hits are serially dependent; the
binomial test then rejects a little too often, and ``christoffersen_independence`` is the check
that says whether misses cluster. ``widening_factor`` says how much wider the intervals would
have had to be, as the remedy an alert can quote.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from aftercast.detect import (
    FloatArray,
    IntArray,
    StatTestResult,
    as_float,
    as_rows,
    check_counts,
    check_level,
    compact_rows,
)

# scipy.stats.binomtest's relative tolerance for "as likely as the observed count".
_RELATIVE_TIE = 1 + 1e-7


def _first_true(
    predicate: Callable[[FloatArray], NDArray[np.bool_]], lo: FloatArray, hi: FloatArray
) -> FloatArray:
    """Vectorised bisection: the smallest x in [lo, hi) where a monotone predicate holds (else hi).

    Every element is bisected at once, so the loop runs log2(max n) times, not once per element.
    """
    lo, hi = lo.copy(), hi.copy()
    while (active := lo < hi).any():
        mid = np.floor((lo + hi) / 2)
        holds = predicate(mid)
        hi = np.where(active & holds, mid, hi)
        lo = np.where(active & ~holds, mid + 1, lo)
    return lo


def _two_sided_binomial(k: FloatArray, n: FloatArray, p: FloatArray) -> FloatArray:
    """Minimum-likelihood two-sided binomial p-value for valid 1-D inputs (see caller)."""
    threshold = stats.binom.pmf(k, n, p) * _RELATIVE_TIE
    expected = p * n
    pvalue = np.ones_like(k)

    # Below the mean: add the upper-tail terms no more likely than the observed count. The pmf
    # falls monotonically from ceil(n p) to n, so the first such term is found by bisection.
    low = k < expected
    kl, nl, pl, tl = k[low], n[low], p[low], threshold[low]
    first = _first_true(lambda x: stats.binom.pmf(x, nl, pl) <= tl, np.ceil(pl * nl), nl + 1)
    pvalue[low] = stats.binom.cdf(kl, nl, pl) + stats.binom.sf(first - 1, nl, pl)

    # Above the mean: mirror image on 0..floor(n p), where the pmf rises monotonically.
    high = k > expected
    kh, nh, ph, th = k[high], n[high], p[high], threshold[high]
    count = _first_true(
        lambda x: stats.binom.pmf(x, nh, ph) > th, np.zeros_like(kh), np.floor(ph * nh) + 1
    )
    pvalue[high] = stats.binom.cdf(count - 1, nh, ph) + stats.binom.sf(kh - 1, nh, ph)
    return np.minimum(pvalue, 1.0)


def binomial_coverage_pvalue(hits: ArrayLike, n: ArrayLike, level: ArrayLike) -> FloatArray:
    """Exact two-sided binomial test of interval hits against the nominal level.

    Under the null each of ``n`` outcomes falls inside its interval with probability ``level``,
    so hits ~ Binomial(n, level). The p-value sums P(X = x) over every x no more likely than the
    observed count, with a relative tolerance of 1e-7 for ties (the minimum-likelihood method
    of ``scipy.stats.binomtest(hits, n, level).pvalue``, which this equals; Zar, Biostatistical
    Analysis, 5th ed., 2010). Too few hits and too many are both miscalibration. Arguments
    broadcast; ``n == 0`` or NaN gives NaN.

    >>> binomial_coverage_pvalue([80, 72, 90], 100, 0.8).round(4)
    array([1.    , 0.0595, 0.0118])
    """
    k, trials = check_counts(hits, n, ("hits", "n"))
    k, trials, p = np.broadcast_arrays(k, trials, check_level(level))
    result = np.full(k.shape, np.nan)
    valid = (trials > 0) & ~np.isnan(k)
    result[valid] = _two_sided_binomial(k[valid], trials[valid], p[valid])
    return result


def _xlogy0(count: FloatArray, probability: FloatArray) -> FloatArray:
    """count * log(probability), with 0 * log(anything, even 0 or NaN) = 0."""
    positive = count > 0
    return np.where(positive, count * np.log(np.where(positive, probability, 1.0)), 0.0)


def _binomial_log_likelihood(
    successes: FloatArray, failures: FloatArray, p: FloatArray
) -> FloatArray:
    return _xlogy0(successes, p) + _xlogy0(failures, 1.0 - p)


def kupiec_pof(misses: ArrayLike, n: ArrayLike, level: ArrayLike) -> StatTestResult:
    """Kupiec's proportion-of-failures likelihood-ratio test of the miss rate.

    With miss probability p = 1 - level and observed rate p^ = x / n (Kupiec, 1995, J.
    Derivatives 3(2)):
    LR_pof = -2 ln[(1 - p)^(n - x) p^x] + 2 ln[(1 - p^)^(n - x) p^^x] ~ chi2(1), 0 ln 0 = 0.
    Arguments broadcast; ``n == 0`` gives NaN.

    >>> result = kupiec_pof(4, 100, 0.95)
    >>> round(float(result.statistic), 4), round(float(result.pvalue), 4)
    (0.2253, 0.635)
    """
    x, trials = check_counts(misses, n, ("misses", "n"))
    x, trials, p_miss = np.broadcast_arrays(x, trials, 1.0 - check_level(level))
    with np.errstate(invalid="ignore", divide="ignore"):
        observed = x / trials
        statistic = 2.0 * (
            _binomial_log_likelihood(x, trials - x, observed)
            - _binomial_log_likelihood(x, trials - x, p_miss)
        )
    statistic = np.where(trials > 0, np.maximum(statistic, 0.0), np.nan)
    return StatTestResult(statistic, stats.chi2.sf(statistic, 1))


def _transition_counts(hit_matrix: ArrayLike) -> tuple[FloatArray, ...]:
    """Per row n00, n01, n10, n11: counts of miss-indicator transitions i -> j (1 = miss)."""
    rows, shape = as_rows(hit_matrix, "hit_matrix")
    observed = rows[~np.isnan(rows)]
    if ((observed != 0) & (observed != 1)).any():
        raise ValueError("hit_matrix holds 1 (inside), 0 (outside) or NaN (no observation)")
    compact, _ = compact_rows(1.0 - rows)
    before, after = compact[:, :-1], compact[:, 1:]
    counts = [
        ((before == i) & (after == j)).sum(axis=1).astype(np.float64).reshape(shape)
        for i in (0, 1)
        for j in (0, 1)
    ]
    return tuple(counts)


def christoffersen_independence(hit_matrix: ArrayLike) -> StatTestResult:
    """Christoffersen's test that misses do not cluster (first-order Markov alternative).

    From transition counts n_ij of the miss indicator (i -> j, 1 = miss), with
    pi01 = n01 / (n00 + n01), pi11 = n11 / (n10 + n11), pi = (n01 + n11) / sum n_ij
    (Christoffersen, 1998, Int. Economic Review 39(4)):
    LR_ind = -2 ln[(1 - pi)^(n00 + n10) pi^(n01 + n11)]
             + 2 ln[(1 - pi01)^n00 pi01^n01 (1 - pi11)^n10 pi11^n11] ~ chi2(1), 0 ln 0 = 0.
    ``hit_matrix`` is series x time, 1 inside, 0 outside; NaN entries are skipped (their
    neighbours count as consecutive). Rows with fewer than two observations give NaN.

    >>> result = christoffersen_independence([1, 1, 0, 0, 1, 1, 1, 0, 0, 1])
    >>> round(float(result.statistic), 4)
    0.09
    """
    n00, n01, n10, n11 = _transition_counts(hit_matrix)
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = (n01 + n11) / (n00 + n01 + n10 + n11)
        statistic = 2.0 * (
            _binomial_log_likelihood(n01, n00, n01 / (n00 + n01))
            + _binomial_log_likelihood(n11, n10, n11 / (n10 + n11))
            - _binomial_log_likelihood(n01 + n11, n00 + n10, pooled)
        )
    statistic = np.where(n00 + n01 + n10 + n11 > 0, np.maximum(statistic, 0.0), np.nan)
    return StatTestResult(statistic, stats.chi2.sf(statistic, 1))


def christoffersen_conditional_coverage(hit_matrix: ArrayLike, level: ArrayLike) -> StatTestResult:
    """Christoffersen's joint test of the right miss rate and no clustering.

    LR_cc = LR_pof + LR_ind ~ chi2(2) (Christoffersen, 1998), with LR_pof from ``kupiec_pof``
    on all observations of the row and LR_ind from ``christoffersen_independence``. ``level``
    broadcasts against the rows (one level per series, or one for all).

    >>> result = christoffersen_conditional_coverage([1, 1, 0, 0, 1, 1, 1, 0, 0, 1], 0.8)
    >>> round(float(result.statistic), 4)
    2.183
    """
    rows, shape = as_rows(hit_matrix, "hit_matrix")
    n = (~np.isnan(rows)).sum(axis=1).reshape(shape)
    misses = (rows == 0).sum(axis=1).reshape(shape)
    pof = kupiec_pof(misses, n, level).statistic
    statistic = pof + christoffersen_independence(hit_matrix).statistic
    return StatTestResult(statistic, stats.chi2.sf(statistic, 2))


class TrafficLight(NamedTuple):
    """Basel zone per key ("green", "yellow", "red"; "none" without data) and P(X <= misses)."""

    zone: NDArray[np.str_]
    cumulative_probability: FloatArray


def traffic_light_zone(
    misses: ArrayLike,
    n: ArrayLike,
    level: ArrayLike,
    *,
    yellow_from: float = 0.95,
    red_from: float = 0.9999,
) -> TrafficLight:
    """Basel traffic-light zone of a miss count, by its cumulative binomial probability.

    With X ~ Binomial(n, 1 - level), the zone is green while P(X <= misses) < 95%, red once it
    reaches 99.99%, yellow in between (Basel Committee on Banking Supervision, 1996,
    Supervisory framework for the use of backtesting..., Table 1: for 250 days at 99%, green
    0-4 misses, yellow 5-9, red 10 or more). Arguments broadcast.

    >>> traffic_light_zone([4, 5, 10], 250, 0.99).zone.tolist()
    ['green', 'yellow', 'red']
    """
    x, trials = check_counts(misses, n, ("misses", "n"))
    x, trials, p_miss = np.broadcast_arrays(x, trials, 1.0 - check_level(level))
    cumulative = np.where(trials > 0, stats.binom.cdf(x, trials, p_miss), np.nan)
    zone = np.select(
        [np.isnan(cumulative), cumulative < yellow_from, cumulative < red_from],
        ["none", "green", "yellow"],
        default="red",
    )
    return TrafficLight(zone, cumulative)


def _scaled_miss_distance(abs_error_from_centre: ArrayLike, half_width: ArrayLike) -> FloatArray:
    """r = |y - centre| / half_width, the half-width factor each single outcome needs."""
    error = as_float(abs_error_from_centre, "abs_error_from_centre")
    width = as_float(half_width, "half_width")
    with np.errstate(invalid="ignore", divide="ignore"):
        # A zero-width interval around an exact outcome needs no widening, not 0/0 = NaN.
        return np.where((width == 0) & (error == 0), 0.0, error / width)


def _quantile_of_sorted_runs(
    ordered: FloatArray, start: IntArray, count: IntArray, level: ArrayLike
) -> FloatArray:
    """Type-7 quantile of each run ordered[start:start + count] (already sorted); NaN if empty."""
    quantile = np.broadcast_to(check_level(level), count.shape)
    factor = np.full(count.shape, np.nan)
    has = count > 0
    position = quantile[has] * (count[has] - 1)
    lo = ordered[start[has] + np.floor(position).astype(np.int64)]
    hi = ordered[start[has] + np.ceil(position).astype(np.int64)]
    with np.errstate(invalid="ignore"):
        # lo == hi guards inf - inf when the quantile sits among infinite ratios.
        factor[has] = np.where(lo == hi, lo, lo + (hi - lo) * (position % 1.0))
    return factor


def widening_factor_by_group(
    abs_error_from_centre: ArrayLike,
    half_width: ArrayLike,
    level: ArrayLike,
    groups: ArrayLike,
    n_groups: int | None = None,
) -> FloatArray:
    """Per group, the factor by which interval half-widths must grow to cover ``level``.

    The interval centre +/- f * half_width contains the share ``level`` of a group's recent
    outcomes when f is the empirical ``level`` quantile of r = |y - centre| / half_width
    (linear interpolation, Hyndman and Fan 1996 type 7, numpy's default). f > 1 means widen,
    f < 1 means the intervals could be narrower. Long format: one entry per pair, ``groups``
    holds integer codes 0..n_groups-1 (e.g. from ``pandas.factorize``); ``level`` is a scalar
    or one per group. Pairs with NaN are ignored; a group without pairs gives NaN. For an
    asymmetric interval pass centre = (lower + upper) / 2, half_width = (upper - lower) / 2.

    >>> widening_factor_by_group([1.0, 2.0, 3.0, 1.0], [2.0, 2.0, 2.0, 1.0], 0.5, [0, 0, 0, 1])
    array([1., 1.])
    """
    ratio = _scaled_miss_distance(abs_error_from_centre, half_width)
    codes = np.broadcast_to(np.asarray(groups, dtype=np.int64), ratio.shape).ravel()
    if (codes < 0).any():
        raise ValueError("groups must be non-negative integer codes")
    size = int(codes.max(initial=-1)) + 1 if n_groups is None else n_groups
    known = ~np.isnan(ratio.ravel())
    ratio, codes = ratio.ravel()[known], codes[known]
    # Sort by ratio, then stably by group: faster than np.lexsort on millions of pairs.
    by_ratio = np.argsort(ratio)
    order = by_ratio[np.argsort(codes[by_ratio], kind="stable")]
    count = np.bincount(codes, minlength=size)
    return _quantile_of_sorted_runs(ratio[order], np.cumsum(count) - count, count, level)


def widening_factor(
    abs_error_from_centre: ArrayLike, half_width: ArrayLike, level: ArrayLike
) -> FloatArray:
    """Per row of a series x time array, the half-width factor that reaches ``level``.

    Same quantity as ``widening_factor_by_group`` (empirical ``level`` quantile of
    |y - centre| / half_width on the recent window), with rows as groups and NaN as padding.
    ``level`` is a scalar or one per row.

    >>> widening_factor([[1.0, 2.0, 3.0], [1.0, 1.0, np.nan]], [[2.0, 2.0, 2.0], [1.0, 1.0, 1.0]],
    ...                 0.5)
    array([1., 1.])
    """
    error, shape = as_rows(abs_error_from_centre, "abs_error_from_centre")
    width = np.broadcast_to(as_float(half_width, "half_width"), (*shape, error.shape[1]))
    ratio = _scaled_miss_distance(error, width.reshape(error.shape))
    ordered = np.sort(ratio, axis=1)  # NaN sorts last, so each row's run starts at its origin
    count = (~np.isnan(ratio)).sum(axis=1)
    start = np.arange(ratio.shape[0], dtype=np.int64) * ratio.shape[1]
    levels = np.broadcast_to(check_level(level), shape).ravel()
    return _quantile_of_sorted_runs(ordered.ravel(), start, count, levels).reshape(shape)
