"""Fleet-wide multiplicity control: which of thousands of p-values are real alarms?

Testing every series, model, horizon and level each cycle at 5% would raise a false alarm for
one key in twenty even when all is well. ``benjamini_hochberg`` controls the false-discovery rate
(the expected share of false alarms among the alarms raised) across the whole fleet in one call;
``bonferroni`` controls the chance of any false alarm at all and is given for comparison. Both
take p-values of any shape and ignore NaN (a test that could not be run is never an alarm and
does not count towards the number of tests).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

from aftercast.detect import FloatArray, as_float, check_level


class MultipleTestResult(NamedTuple):
    """Per p-value: whether it is rejected, and its adjusted p-value (NaN stays NaN)."""

    rejected: NDArray[np.bool_]
    adjusted: FloatArray


def _known_pvalues(pvalues: ArrayLike, rate: float) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Flattened p-values and the mask of those that are not NaN, validated."""
    flat = as_float(pvalues, "pvalues").ravel()
    check_level(rate, "rate")
    known = ~np.isnan(flat)
    if ((flat[known] < 0) | (flat[known] > 1)).any():
        raise ValueError("p-values must lie in [0, 1] (or be NaN)")
    return flat, known


def _scatter(
    shape: tuple[int, ...],
    known: NDArray[np.bool_],
    rejected: NDArray[np.bool_],
    adjusted: (FloatArray),
) -> MultipleTestResult:
    """Put results for the known p-values back in place; NaN inputs are never rejected."""
    all_rejected = np.zeros(known.shape, dtype=bool)
    all_adjusted = np.full(known.shape, np.nan)
    all_rejected[known] = rejected
    all_adjusted[known] = adjusted
    return MultipleTestResult(all_rejected.reshape(shape), all_adjusted.reshape(shape))


def benjamini_hochberg(pvalues: ArrayLike, rate: float = 0.05) -> MultipleTestResult:
    """Benjamini-Hochberg step-up procedure at false-discovery rate ``rate``.

    Sort the m known p-values p_(1) <= ... <= p_(m); reject p_(1)..p_(j) for the largest j
    with p_(j) <= j rate / m. Adjusted p-values are min over i >= j of min(1, m p_(i) / i)
    (Benjamini and Hochberg, 1995, JRSS B 57(1); as statsmodels' ``multipletests`` with
    ``method="fdr_bh"``). The result keeps the input's shape.

    >>> result = benjamini_hochberg([0.01, 0.02, 0.03, np.nan, 0.5])
    >>> result.rejected.tolist(), result.adjusted.round(3).tolist()
    ([True, True, True, False, False], [0.04, 0.04, 0.04, nan, 0.5])
    """
    flat, known = _known_pvalues(pvalues, rate)
    values = flat[known]
    m = values.size
    order = np.argsort(values)
    ordered = values[order]
    rank = np.arange(1, m + 1)
    passing = np.flatnonzero(ordered <= rank * rate / m)
    rejected_sorted = rank <= (passing[-1] + 1 if passing.size else 0)
    adjusted_sorted = np.minimum(np.minimum.accumulate((ordered * m / rank)[::-1])[::-1], 1.0)
    rejected = np.empty(m, dtype=bool)
    adjusted = np.empty(m)
    rejected[order] = rejected_sorted
    adjusted[order] = adjusted_sorted
    return _scatter(np.shape(pvalues), known, rejected, adjusted)


def bonferroni(pvalues: ArrayLike, rate: float = 0.05) -> MultipleTestResult:
    """Bonferroni correction: reject p <= rate / m; adjusted p = min(1, m p).

    Controls the family-wise error rate (Bonferroni inequality; Dunn, 1961, JASA 56), far
    stricter than ``benjamini_hochberg`` at fleet scale.

    >>> bonferroni([0.01, 0.04, np.nan]).adjusted.tolist()
    [0.02, 0.08, nan]
    """
    flat, known = _known_pvalues(pvalues, rate)
    values = flat[known]
    m = max(values.size, 1)  # an empty fleet has nothing to reject, not a division by zero
    rejected = values <= rate / m
    return _scatter(np.shape(pvalues), known, rejected, np.minimum(values * m, 1.0))
