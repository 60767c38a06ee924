"""Statistical detection: pure, vectorised tests over arrays of monitoring data.

The submodules turn the numbers the windows stage keeps into evidence: ``coverage`` tests
interval hit counts and sequences against their nominal level, ``accuracy`` compares losses
against a baseline window or a benchmark, ``bias`` runs CUSUM and tracking-signal charts on
errors, and ``fleet`` controls the false-discovery rate across all of them. Every function takes
arrays and returns arrays, many series at once (either arrays of counts, or a 2-D array of
series x time padded with NaN), and does no I/O. This file holds what they share: the result
type and one set of validation helpers, in the manner of scikit-learn's ``_check_reg_targets``.
Import the functions from their modules, e.g. ``from aftercast.detect.coverage import
binomial_coverage_pvalue``.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


class StatTestResult(NamedTuple):
    """A test statistic and its p-value, arrays of the same shape (one entry per key)."""

    statistic: FloatArray
    pvalue: FloatArray


def as_float(values: ArrayLike, name: str, *, allow_inf: bool = False) -> FloatArray:
    """Convert to a float array; NaN means "no observation" and is allowed, +/-inf is not."""
    array = np.asarray(values, dtype=np.float64)
    if not allow_inf and np.isinf(array).any():
        raise ValueError(f"{name} contains infinite values; use NaN for a missing observation")
    return array


def check_level(level: ArrayLike, name: str = "level") -> FloatArray:
    """Validate a nominal interval level given as a fraction strictly between 0 and 1."""
    array = as_float(level, name)
    bad = ~((array > 0.0) & (array < 1.0))
    if bad.any():
        example = float(array[bad].flat[0])
        hint = f" (a percent? pass {example / 100:g})" if 1.0 < example < 100.0 else ""
        raise ValueError(f"{name} must be a fraction in (0, 1); got {example:g}{hint}")
    return array


def check_counts(
    successes: ArrayLike, trials: ArrayLike, names: tuple[str, str]
) -> tuple[FloatArray, FloatArray]:
    """Validate whole-number counts with 0 <= successes <= trials; broadcast them together.

    Counts are returned as floats so NaN can mark a key with no data; ``trials == 0`` is
    allowed and yields NaN results downstream.
    """
    k = as_float(successes, names[0])
    n = as_float(trials, names[1])
    k, n = np.broadcast_arrays(k, n)
    known = ~(np.isnan(k) | np.isnan(n))
    if (k[known] != np.round(k[known])).any() or (n[known] != np.round(n[known])).any():
        raise ValueError(f"{names[0]} and {names[1]} must be whole numbers")
    if ((k[known] < 0) | (k[known] > n[known])).any():
        raise ValueError(f"need 0 <= {names[0]} <= {names[1]}")
    return k, n


def as_rows(values: ArrayLike, name: str) -> tuple[FloatArray, tuple[int, ...]]:
    """Reshape to 2-D (keys x time): the last axis is time, all others are keys.

    Returns the 2-D view and the shape the per-key results take (``values.shape[:-1]``), so a
    1-D input (one series) gives 0-d results and a (k, T) input gives (k,) results.
    """
    array = as_float(values, name)
    if array.ndim == 0:
        raise ValueError(f"{name} must have a time axis (at least 1-D)")
    keys = int(np.prod(array.shape[:-1]))  # not -1: reshape cannot infer it when T == 0
    return array.reshape(keys, array.shape[-1]), array.shape[:-1]


def compact_rows(rows: FloatArray) -> tuple[FloatArray, IntArray]:
    """Move each row's NaNs to its end, keeping the order of the observed values.

    Missing observations are skipped rather than treated as breaks, so tests that look at
    neighbours (autocovariances, transitions) see the observed values as consecutive. Returns
    the compacted rows and the number of observed values per row.
    """
    missing = np.isnan(rows)
    count = (~missing).sum(axis=1).astype(np.int64)
    if not missing.any():
        return rows, count
    order = np.argsort(missing, axis=1, kind="stable")
    return np.take_along_axis(rows, order, axis=1), count
