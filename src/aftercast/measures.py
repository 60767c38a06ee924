"""Per-pair measures: pure, vectorised functions over numpy arrays.

Named by what they return: `*_error` and `*_loss` are lower-is-better. The error convention is
e = y - f (actual minus point forecast; positive means the forecast was too low). Undefined values
(an APE against a zero actual, a scaled error without a scale) are NaN here and become null at the
edges. Nothing in this module touches the store, the web or the notifiers.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
import pandas as pd

FloatArray = npt.NDArray[np.float64]


def _arrays(*values: npt.ArrayLike) -> list[FloatArray]:
    """Shared validation: float arrays of one shape."""
    arrays = [np.asarray(v, dtype=np.float64) for v in values]
    shape = arrays[0].shape
    for array in arrays[1:]:
        if array.shape != shape:
            raise ValueError(f"shapes differ: {shape} and {array.shape}")
    return arrays


def forecast_error(actual: npt.ArrayLike, point: npt.ArrayLike) -> FloatArray:
    """e = y - f.

    >>> forecast_error([3, -0.5, 2, 7], [2.5, 0.0, 2, 8]).tolist()
    [0.5, -0.5, 0.0, -1.0]
    """
    y, f = _arrays(actual, point)
    return y - f


def absolute_percentage_error(actual: npt.ArrayLike, point: npt.ArrayLike) -> FloatArray:
    """APE = 100 |e| / |y|; NaN where y == 0 (left out of MAPE and counted separately).

    >>> absolute_percentage_error([100, 150, 0], [150, 100, 1]).round(2).tolist()
    [50.0, 33.33, nan]
    """
    y, f = _arrays(actual, point)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(y != 0, 100.0 * np.abs(y - f) / np.abs(y), np.nan)


def symmetric_absolute_percentage_error(actual: npt.ArrayLike, point: npt.ArrayLike) -> FloatArray:
    """sAPE = 200 |e| / (|y| + |f|) (M4 Competitor's Guide, 2018); NaN where |y| + |f| == 0.

    >>> symmetric_absolute_percentage_error([100, 0], [150, 0]).tolist()
    [40.0, nan]
    """
    y, f = _arrays(actual, point)
    denominator = np.abs(y) + np.abs(f)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(denominator > 0, 200.0 * np.abs(y - f) / denominator, np.nan)


def scaled_error(error: npt.ArrayLike, scale: npt.ArrayLike) -> FloatArray:
    """q = e / s with s the in-sample seasonal naive MAE (Hyndman and Koehler, 2006).

    NaN where the scale is undefined (NaN) or zero.

    >>> scaled_error([2.0, 1.0, 1.0], [4.0, 0.0, np.nan]).tolist()
    [0.5, nan, nan]
    """
    e, s = _arrays(error, scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(s > 0, e / s, np.nan)


def interval_hit(actual: npt.ArrayLike, lower: npt.ArrayLike, upper: npt.ArrayLike) -> FloatArray:
    """1.0 where lower <= y <= upper, else 0.0 (coverage is the mean of hits).

    >>> interval_hit([1, 5, 9], [2, 2, 2], [8, 8, 9]).tolist()
    [0.0, 1.0, 1.0]
    """
    y, lo, hi = _arrays(actual, lower, upper)
    return ((lo <= y) & (y <= hi)).astype(np.float64)


def interval_score(
    actual: npt.ArrayLike, lower: npt.ArrayLike, upper: npt.ArrayLike, level: npt.ArrayLike
) -> FloatArray:
    """Interval score of a central (level %) interval (Gneiting and Raftery, 2007, eq. 43).

    (u - l) + (2/alpha)(l - y)[y < l] + (2/alpha)(y - u)[y > u], alpha = 1 - level/100.

    >>> interval_score([5, 0, 12], [2, 2, 2], [8, 8, 8], [80, 80, 80]).round(9).tolist()
    [6.0, 26.0, 46.0]
    """
    y, lo, hi, lv = _arrays(actual, lower, upper, np.broadcast_to(level, np.shape(actual)))
    alpha = 1.0 - lv / 100.0
    below = np.where(y < lo, lo - y, 0.0)
    above = np.where(y > hi, y - hi, 0.0)
    return (hi - lo) + (2.0 / alpha) * below + (2.0 / alpha) * above


def pinball_loss(actual: npt.ArrayLike, quantile: npt.ArrayLike, prob: npt.ArrayLike) -> FloatArray:
    """Pinball (quantile) loss max(p(y - q), (p - 1)(y - q)), p as a fraction (Koenker, 2005).

    >>> pinball_loss([10, 10], [8, 12], [0.9, 0.9]).round(9).tolist()
    [1.8, 0.2]
    """
    y, q, p = _arrays(actual, quantile, np.broadcast_to(prob, np.shape(actual)))
    diff = y - q
    return np.maximum(p * diff, (p - 1.0) * diff)


def seasonal_scales(actuals: pd.DataFrame, queries: pd.DataFrame) -> pd.DataFrame:
    """In-sample seasonal naive scales known at each issue period, for many series at once.

    `actuals`: columns series_id, period, value, season. `queries`: series_id, issue_period.
    For each query, over the series' actuals y_t with t < issue_period whose seasonal
    predecessor y_(t-m) exists: scale_abs = mean |y_t - y_(t-m)| (the MASE scale, Hyndman and
    Koehler, 2006) and scale_sq = mean (y_t - y_(t-m))^2 (the RMSSE scale of the M5 competition).
    NaN where no such difference exists. Returns `queries` with the two columns added.

    >>> a = pd.DataFrame({"series_id": 1, "period": [0, 1, 2, 3], "value": [1.0, 3.0, 2.0, 6.0],
    ...                   "season": 1})
    >>> q = pd.DataFrame({"series_id": [1, 1], "issue_period": [2, 4]})
    >>> seasonal_scales(a, q)["scale_abs"].tolist()
    [2.0, 2.3333333333333335]
    """
    actuals = actuals.astype(
        {"series_id": "int64", "period": "int64", "value": "float64", "season": "int64"}
    )
    queries = queries.astype({"series_id": "int64", "issue_period": "int64"})
    ordered = actuals.sort_values(["series_id", "period"], kind="stable")
    lagged = ordered[["series_id", "period", "value"]].copy()
    lagged["period"] = lagged["period"] + ordered["season"].to_numpy()
    diffs = ordered.merge(lagged, on=["series_id", "period"], how="inner", suffixes=("", "_lag"))
    diffs["abs"] = (diffs["value"] - diffs["value_lag"]).abs()
    diffs["sq"] = diffs["abs"] ** 2
    diffs = diffs.sort_values(["series_id", "period"], kind="stable")
    grouped = diffs.groupby("series_id", sort=False)
    diffs["n"] = grouped.cumcount() + 1
    diffs["cum_abs"] = grouped["abs"].cumsum()
    diffs["cum_sq"] = grouped["sq"].cumsum()
    # For issue period P, the last difference strictly before P: merge_asof on period < P.
    probe = queries[["series_id", "issue_period"]].copy()
    probe["_order"] = np.arange(len(probe))
    probe["lookup"] = probe["issue_period"] - 1
    probe = probe.sort_values("lookup", kind="stable")
    table = diffs[["series_id", "period", "n", "cum_abs", "cum_sq"]].sort_values("period")
    found = pd.merge_asof(
        probe, table, left_on="lookup", right_on="period", by="series_id", direction="backward"
    ).sort_values("_order")
    result = queries.copy()
    result["scale_abs"] = (found["cum_abs"] / found["n"]).to_numpy()
    result["scale_sq"] = (found["cum_sq"] / found["n"]).to_numpy()
    return result


def squared_scaled_error(error: npt.ArrayLike, scale_sq: npt.ArrayLike) -> FloatArray:
    """e^2 / s2 with s2 the in-sample mean squared seasonal difference; RMSSE = sqrt(mean).

    The root mean squared scaled error of the M5 competition (Makridakis, Spiliotis and
    Assimakopoulos, 2022, M5 accuracy competition). NaN where s2 is undefined or zero.

    >>> squared_scaled_error([2.0, 1.0], [4.0, 0.0]).tolist()
    [1.0, nan]
    """
    e, s = _arrays(error, scale_sq)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(s > 0, e**2 / s, np.nan)


def _grid(
    actual: npt.ArrayLike, quantiles: npt.ArrayLike, probs: npt.ArrayLike
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """y as a column (n, 1), quantiles (n, K) and probabilities (K,) as fractions in (0, 1)."""
    y = np.asarray(actual, dtype=np.float64).reshape(-1, 1)
    q = np.atleast_2d(np.asarray(quantiles, dtype=np.float64))
    p = np.asarray(probs, dtype=np.float64).ravel()
    if q.shape != (y.shape[0], p.shape[0]):
        raise ValueError(f"quantiles must be (n, K) = {(y.shape[0], p.shape[0])}, got {q.shape}")
    if np.any((p <= 0) | (p >= 1)):
        raise ValueError("probabilities must lie strictly between 0 and 1")
    return y, q, p


def crps_from_quantiles(
    actual: npt.ArrayLike, quantiles: npt.ArrayLike, probs: npt.ArrayLike
) -> FloatArray:
    """CRPS estimated from K quantiles: twice the mean pinball loss over the grid.

    CRPS(F, y) = 2 * integral over p in (0, 1) of the pinball loss of F^-1(p) (Gneiting and
    Raftery, 2007, section 4.2; Laio and Tamea, 2007); on an evenly spread grid the mean is
    the midpoint rule for that integral. `quantiles` is (n, K), `probs` (K,) as fractions.

    >>> crps_from_quantiles([1.0], [[0.0, 1.0, 2.0]], [0.25, 0.5, 0.75]).tolist()
    [0.3333333333333333]
    """
    y, q, p = _grid(actual, quantiles, probs)
    diff = y - q
    losses = np.maximum(p * diff, (p - 1.0) * diff)
    return 2.0 * losses.mean(axis=1)


def pit_histogram(
    actual: npt.ArrayLike, quantiles: npt.ArrayLike, probs: npt.ArrayLike
) -> FloatArray:
    """Share of actuals in each bin of the probability integral transform, from quantiles.

    Bin 0 holds y <= q_1, bin k holds q_k < y <= q_(k+1), bin K holds y > q_K; for a
    calibrated forecast the shares approach p_1, p_2 - p_1, ..., 1 - p_K (Gneiting, Balabdaoui
    and Raftery, 2007, probabilistic calibration). Returns K + 1 shares.

    >>> pit_histogram([0.5, 1.5, 2.5, 3.5], np.tile([1.0, 2.0, 3.0], (4, 1)), [0.25, 0.5, 0.75])
    array([0.25, 0.25, 0.25, 0.25])
    """
    y, q, p = _grid(actual, quantiles, probs)
    order = np.argsort(p)
    below = (y <= q[:, order]).mean(axis=0)
    return np.diff(np.concatenate([[0.0], below, [1.0]]))
