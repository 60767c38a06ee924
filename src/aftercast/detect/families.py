"""False-discovery control over families of tests: grouped Simes, grouped BH, two-level FDR.

A large fleet raises an alarm per test only as fast as plain Benjamini-Hochberg lets it, and BH
lets the number of false alarms grow with the number of true ones: a degraded series fails
many of its tests at once (every model, bucket and level), loosening the threshold for all the
healthy series. Grouping the tests of one series into a family and selecting families first
keeps the false alarms proportional to the series that are really in trouble:

1. each family gets the Simes p-value of its tests, min_i (m p_(i) / i) (Simes, 1986,
   Biometrika 73(3); valid under the positive dependence tests sharing actuals have);
2. Benjamini-Hochberg at rate q over the families selects R of M;
3. within each selected family, BH at rate q R / M flags the tests
   (Benjamini and Bogomolov, 2014, JRSS B 76(1), "Selective inference on multiple families of
   hypotheses").

Pure and vectorised: groups are integer codes, and every step is a sort and a few cumulative
operations over all families at once. NaN p-values (tests that could not run) are ignored.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

from aftercast.detect import FloatArray, as_float, check_level
from aftercast.detect.fleet import benjamini_hochberg


def _grouped_ranks(
    pvalues: FloatArray, groups: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.int64]]:
    """Order sorting by (group, p), each p's rank within its group, and each group's size."""
    order = np.lexsort((pvalues, groups))
    sorted_groups = groups[order]
    size = np.bincount(groups, minlength=int(groups.max(initial=-1)) + 1)
    start = np.cumsum(size) - size
    rank = np.arange(len(order)) - start[sorted_groups] + 1
    return order, rank, size


def _known(
    pvalues: ArrayLike, groups: ArrayLike
) -> tuple[FloatArray, NDArray[np.int64], NDArray[np.bool_]]:
    p = as_float(pvalues, "pvalues").ravel()
    g = np.asarray(groups, dtype=np.int64).ravel()
    if p.shape != g.shape:
        raise ValueError(f"pvalues and groups differ in size: {p.size} and {g.size}")
    if (g < 0).any():
        raise ValueError("groups must be non-negative integer codes")
    known = ~np.isnan(p)
    if ((p[known] < 0) | (p[known] > 1)).any():
        raise ValueError("p-values must lie in [0, 1] (or be NaN)")
    return p, g, known


def simes_by_group(
    pvalues: ArrayLike, groups: ArrayLike, n_groups: int | None = None
) -> FloatArray:
    """Simes p-value of each group: min over its sorted p-values of m p_(i) / i (NaN if none).

    Equal to the smallest Benjamini-Hochberg adjusted p-value within the group.

    >>> simes_by_group([0.01, 0.04, 0.03, 0.5, np.nan], [0, 0, 0, 1, 1]).round(4).tolist()
    [0.03, 0.5]
    """
    p, g, known = _known(pvalues, groups)
    size_out = int(g.max(initial=-1)) + 1 if n_groups is None else n_groups
    best = np.full(size_out, np.inf)
    if known.any():
        pk, gk = p[known], g[known]
        order, rank, size = _grouped_ranks(pk, gk)
        scaled = pk[order] * size[gk[order]] / rank
        np.minimum.at(best, gk[order], np.minimum(scaled, 1.0))
    return np.where(np.isinf(best), np.nan, best)


class GroupedTestResult(NamedTuple):
    """Per p-value: rejected at its group's rate, and its BH-adjusted p-value within the group."""

    rejected: NDArray[np.bool_]
    adjusted: FloatArray


def benjamini_hochberg_by_group(
    pvalues: ArrayLike, groups: ArrayLike, rates: ArrayLike
) -> GroupedTestResult:
    """Benjamini-Hochberg step-up within each group, at that group's rate (broadcast per group).

    Adjusted p-values are min over j >= i of min(1, m p_(j) / j) within the group, as
    statsmodels' ``multipletests(method="fdr_bh")`` gives for each group alone; a p-value is
    rejected when its adjusted value is at most its group's rate.

    >>> benjamini_hochberg_by_group([0.01, 0.02, 0.04, 0.3], [0, 0, 1, 1], 0.05).rejected.tolist()
    [True, True, False, False]
    """
    p, g, known = _known(pvalues, groups)
    adjusted = np.full(p.shape, np.nan)
    if known.any():
        pk, gk = p[known], g[known]
        order, rank, size = _grouped_ranks(pk, gk)
        scaled = np.minimum(pk[order] * size[gk[order]] / rank, 1.0)
        # Running minimum from each group's end: reverse, accumulate per group, reverse back.
        reversed_groups = gk[order][::-1]
        running = _grouped_cummin(scaled[::-1], reversed_groups)[::-1]
        values = np.empty_like(pk)
        values[order] = running
        adjusted[known] = values
    group_rates = np.broadcast_to(as_float(rates, "rates"), (int(g.max(initial=-1)) + 1,))
    rate_per_p = group_rates[g] if len(g) else np.empty(0)
    rejected = known & (np.nan_to_num(adjusted, nan=np.inf) <= rate_per_p)
    return GroupedTestResult(rejected, adjusted)


def _grouped_cummin(values: FloatArray, groups: NDArray[np.int64]) -> FloatArray:
    """Cumulative minimum restarting at each change of group (groups are contiguous)."""
    # Offsetting each group by a large, decreasing constant makes one global accumulate restart
    # at group boundaries: values lie in [0, 1], so a step of 2 separates groups.
    block = np.cumsum(np.r_[0, np.diff(groups) != 0])
    shifted = values - 2.0 * block
    return np.minimum.accumulate(shifted) + 2.0 * block


class TwoLevelResult(NamedTuple):
    """Per test: flagged, adjusted p-value; per family: Simes p-value and selected."""

    flagged: NDArray[np.bool_]
    adjusted: FloatArray
    family_pvalue: FloatArray
    family_selected: NDArray[np.bool_]


def two_level_fdr(pvalues: ArrayLike, families: ArrayLike, rate: float = 0.05) -> TwoLevelResult:
    """Select families by BH over their Simes p-values, then BH within each at rate q R / M.

    A test's adjusted p-value is max(its family's BH-adjusted Simes p-value, its within-family
    BH-adjusted p-value times M / R), so it is flagged exactly when that is <= ``rate``.

    >>> result = two_level_fdr([0.001, 0.01, 0.6, 0.7], [0, 0, 1, 1], 0.05)
    >>> result.flagged.tolist(), result.family_selected.tolist()
    ([True, True, False, False], [True, False])
    """
    check_level(rate, "rate")
    p, g, _ = _known(pvalues, families)
    n_families = int(g.max(initial=-1)) + 1
    family_p = simes_by_group(p, g, n_families)
    selection = benjamini_hochberg(family_p, rate)
    selected_count = int(selection.rejected.sum())
    tested = int((~np.isnan(family_p)).sum())
    inner_rate = rate * selected_count / tested if tested else 0.0
    within = benjamini_hochberg_by_group(p, g, inner_rate if selected_count else 0.0)
    flagged = within.rejected & selection.rejected[g] if len(g) else within.rejected
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = tested / selected_count if selected_count else np.inf
        adjusted = np.fmax(selection.adjusted[g], np.minimum(within.adjusted * scale, 1.0))
    adjusted = np.where(np.isnan(p), np.nan, adjusted)
    return TwoLevelResult(flagged, adjusted, family_p, selection.rejected)
