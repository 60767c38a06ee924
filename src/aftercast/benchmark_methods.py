"""Benchmark forecasting methods: naive and seasonal naive, with empirical-quantile intervals.

Pure and vectorised over all series and requests at once (pandas merge_asof and grouped rolling
windows; no loop per series). A request asks for a forecast of one series' `target_period`
made at `issue_period`, knowing only the actuals of periods strictly before the issue period
(the same information rule as the MASE scale). The lead j = target - (issue - 1) counts steps
from the last period that could be known, so a horizon-1 forecast issued during a day, before
that day's actual exists, is a two-step forecast of the data.

- naive: y_hat = the latest known actual (Hyndman and Athanasopoulos, Forecasting: Principles
  and Practice, 3rd ed., section 5.2, "naive method");
- seasonal naive: y_hat(T) = the latest known actual of the same season phase,
  y_(T - m k) with k = ceil(j / m) (same section, "seasonal naive method");
- intervals: y_hat + the (1 - L)/2 and (1 + L)/2 empirical quantiles (linear interpolation,
  Hyndman and Fan 1996 type 7) of the method's own past errors at the same lag, over its latest
  `window` errors known at issue. The bounds are widened to contain the point when the past
  errors all have one sign, so lower <= point <= upper holds as for any ingested forecast.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

METHODS = ("naive", "seasonal-naive")
# Benchmark forecasts are stored under the model names `benchmark:<method>`.
BENCHMARK_PREFIX = "benchmark:"


def model_name(method: str) -> str:
    """The reserved model name a benchmark method is stored under.

    >>> model_name("seasonal-naive")
    'benchmark:seasonal-naive'
    """
    return f"{BENCHMARK_PREFIX}{method}"


def _typed_history(history: pd.DataFrame) -> pd.DataFrame:
    return history[["series_id", "period", "value"]].astype(
        {"series_id": "int64", "period": "int64", "value": "float64"}
    )


def method_lags(method: str, lead: np.ndarray, season: np.ndarray) -> np.ndarray:
    """How far back each forecast reaches: j for naive, m ceil(j / m) for seasonal naive.

    >>> method_lags("seasonal-naive", np.array([1, 7, 8]), np.array([7, 7, 7])).tolist()
    [7, 7, 14]
    """
    lead = np.asarray(lead, dtype=np.int64)
    if method == "naive":
        return lead
    if method == "seasonal-naive":
        m = np.asarray(season, dtype=np.int64)
        return m * (-(-lead // m))
    raise ValueError(f"unknown benchmark method {method!r}; known: {', '.join(METHODS)}")


def _latest_at_or_before(
    history: pd.DataFrame,
    series_id: np.ndarray,
    period: np.ndarray,
    by_phase: tuple[np.ndarray, np.ndarray] | None,
) -> np.ndarray:
    """The value of each series' latest actual at or before `period` (within a phase if given)."""
    probe = pd.DataFrame({"series_id": series_id, "period_wanted": period})
    table = history.copy()
    by = ["series_id"]
    if by_phase is not None:
        probe["phase"] = by_phase[0]
        table["phase"] = by_phase[1]
        by.append("phase")
    probe["_row"] = np.arange(len(probe))
    found = pd.merge_asof(
        probe.sort_values("period_wanted", kind="stable"),
        table.sort_values("period", kind="stable"),
        left_on="period_wanted",
        right_on="period",
        by=by,
        direction="backward",
    )
    return found.sort_values("_row")["value"].to_numpy(np.float64)


def point_forecasts(method: str, history: pd.DataFrame, requests: pd.DataFrame) -> np.ndarray:
    """Point forecasts of `method` for each request (NaN where nothing was known yet).

    `history`: series_id, period, value. `requests`: series_id, issue_period, target_period,
    season.

    >>> h = pd.DataFrame({"series_id": 1, "period": range(10), "value": np.arange(10.0)})
    >>> r = pd.DataFrame({"series_id": [1, 1], "issue_period": [8, 8],
    ...                   "target_period": [8, 11], "season": 4})
    >>> point_forecasts("naive", h, r).tolist(), point_forecasts("seasonal-naive", h, r).tolist()
    ([7.0, 7.0], [4.0, 7.0])
    """
    history = _typed_history(history)
    series_id = requests["series_id"].to_numpy(np.int64)
    last = requests["issue_period"].to_numpy(np.int64) - 1
    if method == "naive":
        return _latest_at_or_before(history, series_id, last, None)
    target = requests["target_period"].to_numpy(np.int64)
    season = requests["season"].to_numpy(np.int64)
    lags = method_lags(method, target - last, season)
    per_series = requests.drop_duplicates("series_id").set_index("series_id")["season"]
    # Series without a request have no season here (the backtest passes every series' actuals).
    history = history.loc[history["series_id"].isin(per_series.index)]
    history_season = per_series.reindex(history["series_id"]).to_numpy(np.int64)
    phases = (target % season, history["period"].to_numpy(np.int64) % history_season)
    return _latest_at_or_before(history, series_id, target - lags, phases)


def _past_errors(history: pd.DataFrame, needed: pd.DataFrame) -> pd.DataFrame:
    """e_t = y_t - y_(t - lag) for every (series, lag) in `needed`, ordered by series, lag and
    period (columns series_id, lag, period, error).

    Array lookups, not joins: history sorted by (series, period) holds each series' actuals as
    one run, so every (series, lag) takes its series' run, and y_(t - lag) is found by a binary
    search on a combined (series, period) key.
    """
    ordered = history.sort_values(["series_id", "period"], kind="stable")
    series = ordered["series_id"].to_numpy(np.int64)
    period = ordered["period"].to_numpy(np.int64)
    value = ordered["value"].to_numpy(np.float64)
    wanted = needed.sort_values(["series_id", "lag"], kind="stable")
    wanted_series = wanted["series_id"].to_numpy(np.int64)
    first = np.searchsorted(series, wanted_series, side="left")
    count = np.searchsorted(series, wanted_series, side="right") - first
    # The history rows of each wanted (series, lag), run after run.
    rows = np.repeat(first - np.cumsum(count) + count, count) + np.arange(count.sum())
    lag = np.repeat(wanted["lag"].to_numpy(np.int64), count)
    low = period.min() if len(period) else 0
    key = series * (np.int64(period.max() - low + 1) if len(period) else 1) + (period - low)
    wanted_key = key[rows] - lag
    source = np.minimum(np.searchsorted(key, wanted_key), max(len(key) - 1, 0))
    # A key below the series' first period would land in the series before it.
    found = (period[rows] - lag >= low) & (key[source] == wanted_key)
    rows, lag, source = rows[found], lag[found], source[found]
    return pd.DataFrame(
        {
            "series_id": series[rows],
            "lag": lag,
            "period": period[rows],
            "error": value[rows] - value[source],
        }
    )


def _latest_windows(
    errors: pd.DataFrame, queries: pd.DataFrame, window: int
) -> tuple[np.ndarray, np.ndarray]:
    """Per query, its group's latest `window` errors at or before `last` (queries x window).

    Errors are sorted by (series, lag, period), so each group is a contiguous run; one
    searchsorted on a combined (group, period) key finds every query's last usable error, and
    fancy indexing gathers the windows of all queries at once. Returns the values (NaN where
    the window reaches before the group's first error) and the count of real values.
    """
    # One int64 per (series, lag): lags are small, so series * (max lag + 1) + lag is unique.
    width = int(max(errors["lag"].max(), queries["lag"].max())) + 1
    group_key = errors["series_id"].to_numpy(np.int64) * width + errors["lag"].to_numpy(np.int64)
    codes, uniques = pd.factorize(group_key)
    start = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
    periods = errors["period"].to_numpy(np.int64)
    shift = np.int64(periods.max() - periods.min() + 2)
    combined = codes.astype(np.int64) * shift + (periods - periods.min())
    query_key = queries["series_id"].to_numpy(np.int64) * width + queries["lag"].to_numpy(np.int64)
    wanted = pd.Index(uniques).get_indexer(query_key)
    last = queries["last"].to_numpy(np.int64) - periods.min()
    known = (wanted >= 0) & (last >= 0)
    code = np.where(known, wanted, 0)
    probe = code.astype(np.int64) * shift + np.clip(last, -1, shift - 2)
    position = np.searchsorted(combined, probe, side="right") - 1
    index = position[:, None] - np.arange(window)[::-1][None, :]
    inside = known[:, None] & (index >= start[code][:, None]) & (index >= 0)
    values = np.where(inside, errors["error"].to_numpy(np.float64)[np.clip(index, 0, None)], np.nan)
    return values, inside.sum(axis=1)


def error_quantiles(
    history: pd.DataFrame,
    requests: pd.DataFrame,
    lags: np.ndarray,
    probs: list[float],
    window: int,
    min_errors: int,
) -> pd.DataFrame:
    """Per request, empirical quantiles of the latest `window` errors at its lag known at issue.

    Returns one column per probability (named by the probability), NaN where fewer than
    `min_errors` such errors exist.

    >>> h = pd.DataFrame({"series_id": 1, "period": range(6), "value": [0., 1, 3, 6, 10, 15]})
    >>> r = pd.DataFrame({"series_id": [1], "issue_period": [6], "target_period": [6]})
    >>> error_quantiles(h, r, np.array([1]), [0.5], window=3, min_errors=2)[0.5].tolist()
    [4.0]
    """
    history = _typed_history(history)
    queries = pd.DataFrame(
        {
            "series_id": requests["series_id"].to_numpy(np.int64),
            "lag": np.asarray(lags, dtype=np.int64),
            "last": requests["issue_period"].to_numpy(np.int64) - 1,
        }
    )
    out = pd.DataFrame(np.nan, index=range(len(requests)), columns=list(probs))
    errors = _past_errors(history, queries[["series_id", "lag"]].drop_duplicates())
    if errors.empty or queries.empty:
        return out
    values, count = _latest_windows(errors, queries, window)
    enough = count >= min_errors
    if enough.any():
        out.loc[enough, list(probs)] = row_quantiles(values[enough], count[enough], probs)
    return out


def row_quantiles(values: np.ndarray, count: np.ndarray, probs: list[float]) -> np.ndarray:
    """Per row, quantiles of its `count` non-NaN values: linear interpolation (type 7).

    numpy's `nanquantile` loops over rows in Python; sorting every row at once (NaN last) and
    interpolating between order statistics gives the same numbers in one pass.

    >>> row_quantiles(np.array([[3.0, 1.0, np.nan], [4.0, 2.0, 6.0]]), np.array([2, 3]), [0.5])
    array([[2.],
           [4.]])
    """
    ordered = np.sort(values, axis=1)
    position = (count[:, None] - 1) * np.asarray(probs)[None, :]
    low = np.floor(position).astype(np.int64)
    high = np.minimum(low + 1, count[:, None] - 1)
    below = np.take_along_axis(ordered, low, axis=1)
    above = np.take_along_axis(ordered, high, axis=1)
    return below + (above - below) * (position - low)


def benchmark_forecasts(
    history: pd.DataFrame,
    requests: pd.DataFrame,
    methods: list[str],
    levels: list[float],
    window: int,
    min_errors: int,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Forecasts of every method for every request, and their central intervals.

    Returns (forecasts, intervals): forecasts are `requests` with `method`, `point` and a
    `row` number; intervals are row, level (percent), lower, upper. Requests without any known
    actual get no forecast; those with too few past errors get no interval.
    """
    frames, bounds = [], []
    lead = (requests["target_period"] - requests["issue_period"] + 1).to_numpy(np.int64)
    probs = sorted({p for L in levels for p in ((1 - L / 100) / 2, (1 + L / 100) / 2)})
    offset = 0
    for method in methods:
        point = point_forecasts(method, history, requests)
        lags = method_lags(method, lead, requests["season"].to_numpy(np.int64))
        quantiles = error_quantiles(history, requests, lags, probs, window, min_errors)
        known = ~np.isnan(point)
        forecasts = requests.loc[known].assign(method=method, point=point[known])
        forecasts["row"] = np.arange(offset, offset + len(forecasts))
        offset += len(forecasts)
        frames.append(forecasts)
        for level in levels:
            low = point[known] + quantiles[(1 - level / 100) / 2].to_numpy()[known]
            high = point[known] + quantiles[(1 + level / 100) / 2].to_numpy()[known]
            ok = ~np.isnan(low) & ~np.isnan(high)
            bounds.append(
                pd.DataFrame(
                    {
                        "row": forecasts["row"].to_numpy()[ok],
                        "level": float(level),
                        "lower": np.minimum(low[ok], point[known][ok]),
                        "upper": np.maximum(high[ok], point[known][ok]),
                    }
                )
            )
    forecasts = pd.concat(frames, ignore_index=True) if frames else requests.iloc[:0]
    intervals = (
        pd.concat(bounds, ignore_index=True)
        if bounds
        else pd.DataFrame(columns=["row", "level", "lower", "upper"])
    )
    return forecasts, intervals
