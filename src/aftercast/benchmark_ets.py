"""Optional ETS benchmark: statsmodels' exponential smoothing state space model per series.

ETS(A,N,A) (additive error, no trend, additive season of the series' lag m) when the history
holds at least two full seasons plus a few points, else ETS(A,N,N) (simple exponential
smoothing); Hyndman, Koehler, Snyder and Grose (2002), IJF 18(3), as implemented by
`statsmodels.tsa.exponential_smoothing.ets.ETSModel`. Intervals are the model's own analytic
prediction intervals. Fitting is one model per (series, issue period), so unlike the naive
methods this loops over series; it is off by default (`benchmarks.ets`) for that reason.
Gaps in the history are filled by linear interpolation before fitting.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

MIN_POINTS = 10


def _regular(history: pd.DataFrame, issue_period: int, max_history: int) -> pd.Series:
    """The known actuals before `issue_period`, on consecutive periods, gaps interpolated."""
    known = history.loc[history["period"] < issue_period].sort_values("period").tail(max_history)
    if known.empty:
        return pd.Series(dtype=np.float64)
    periods = np.arange(int(known["period"].iloc[0]), issue_period)
    values = known.set_index("period")["value"].reindex(periods).interpolate(limit_direction="both")
    return pd.Series(values.to_numpy(np.float64))


def _fit(values: pd.Series, season: int):  # noqa: ANN202 - statsmodels results object
    from statsmodels.tsa.exponential_smoothing.ets import ETSModel

    seasonal = season > 1 and len(values) >= 2 * season + 4
    model = ETSModel(
        values,
        error="add",
        trend=None,
        seasonal="add" if seasonal else None,
        seasonal_periods=season if seasonal else None,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence chatter on short or flat series
        return model.fit(disp=False)


def ets_forecasts(
    history: pd.DataFrame, requests: pd.DataFrame, levels: list[float], max_history: int
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Forecasts and intervals (row, level, lower, upper) in `benchmark_forecasts`' shape."""
    made: list[dict[str, object]] = []
    bounds: list[pd.DataFrame] = []
    by_series = dict(tuple(history.groupby("series_id")))
    for (series_id, issue_period), group in requests.groupby(["series_id", "issue_period"]):
        values = _regular(
            by_series.get(series_id, history.iloc[:0]), int(issue_period), max_history
        )
        if len(values) < MIN_POINTS:
            continue
        fit = _fit(values, int(group["season"].iloc[0]))
        steps = (group["target_period"] - (int(issue_period) - 1)).to_numpy(np.int64)
        prediction = fit.get_prediction(start=len(values), end=len(values) + int(steps.max()) - 1)
        rows = np.arange(len(made), len(made) + len(group))
        frame = group.assign(method="ets", row=0)
        for level in levels:
            summary = prediction.summary_frame(alpha=1 - level / 100).to_numpy()
            point = summary[steps - 1, 0]
            bounds.append(
                pd.DataFrame(
                    {
                        "row": rows,
                        "level": float(level),
                        "lower": np.minimum(summary[steps - 1, 1], point),
                        "upper": np.maximum(summary[steps - 1, 2], point),
                    }
                )
            )
        point = prediction.predicted_mean.to_numpy()[steps - 1]
        made.extend(frame.assign(point=point, row=rows).to_dict("records"))
    forecasts = pd.DataFrame(made) if made else requests.iloc[:0].assign(point=[], row=[])
    intervals = (
        pd.concat(bounds, ignore_index=True)
        if bounds
        else pd.DataFrame(columns=["row", "level", "lower", "upper"])
    )
    return forecasts, intervals
