"""Rolling windows: pairs aggregated per (series, model, horizon) and per (series, model).

Pure: frames of pairs and interval hits in, one row per key out, computed for all series in one
groupby pass. A `days` window holds the pairs with now - D days < target_at <= now; a `points`
window holds, per (series, model), the pairs of the N latest target periods at or before now.
The rows follow the status CONTRACT: undefined values are NaN here and null in JSON.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from aftercast.config import WindowConfig

DAY = 86_400
KEY = ["series_id", "model"]


def select_window(pairs: pd.DataFrame, window: WindowConfig, now: int) -> pd.DataFrame:
    """The pairs inside `window` at `now` (start exclusive, end inclusive)."""
    upto = pairs[pairs["target_at"] <= now]
    if window.days is not None:
        return upto[upto["target_at"] > now - window.days * DAY]
    periods = upto[[*KEY, "target_period"]].drop_duplicates()
    periods["rank"] = periods.groupby(KEY)["target_period"].rank(method="first", ascending=False)
    latest = periods[periods["rank"] <= int(window.points or 0)]
    return upto.merge(latest[[*KEY, "target_period"]], on=[*KEY, "target_period"])


def level_name(level: float) -> str:
    """'80' for 80.0, '97.5' for 97.5: the key used in coverage objects."""
    return f"{level:g}"


def _point_measures(grouped: pd.core.groupby.DataFrameGroupBy) -> pd.DataFrame:
    out = grouped.agg(
        n=("error", "size"),
        me=("error", "mean"),
        mae=("abs_error", "mean"),
        mse=("sq_error", "mean"),
        mape=("ape", "mean"),
        mape_n=("ape", "count"),
        smape=("sape", "mean"),
        sum_abs_error=("abs_error", "sum"),
        sum_abs_actual=("abs_actual", "sum"),
        mase=("abs_scaled_error", "mean"),
        target_first=("target_at", "min"),
        target_last=("target_at", "max"),
    )
    out["rmse"] = np.sqrt(out["mse"])
    out["wape"] = np.where(
        out["sum_abs_actual"] > 0, 100 * out["sum_abs_error"] / out["sum_abs_actual"], np.nan
    )
    out["mape_excluded"] = out["n"] - out["mape_n"]
    return out.drop(columns=["sum_abs_error", "sum_abs_actual", "mape_n"])


def _interval_measures(intervals: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Per key, wide columns coverage_<L>, width_<L> and interval_score_<L> for each level L."""
    if intervals.empty:
        return pd.DataFrame(index=pd.MultiIndex.from_arrays([[]] * len(keys), names=keys))
    means = intervals.groupby([*keys, "level"])[["hit", "width", "interval_score"]].mean()
    wide = means.rename(columns={"hit": "coverage"}).unstack("level")
    wide.columns = [f"{measure}_{level_name(level)}" for measure, level in wide.columns]
    return wide


def aggregate(pairs: pd.DataFrame, intervals: pd.DataFrame) -> pd.DataFrame:
    """Window rows per (series, model, horizon) and per (series, model, 'all')."""
    pairs = pairs.assign(
        abs_actual=pairs["actual"].abs(), abs_scaled_error=pairs["scaled_error"].abs()
    )
    hits = intervals.merge(pairs[["forecast_id", *KEY, "horizon"]], on="forecast_id")
    by_horizon = _point_measures(pairs.groupby([*KEY, "horizon"]))
    by_horizon = by_horizon.join(_interval_measures(hits, [*KEY, "horizon"]))
    overall = _point_measures(pairs.groupby(KEY)).join(_interval_measures(hits, KEY))
    overall["horizon"] = "all"
    rows = pd.concat([by_horizon.reset_index(), overall.reset_index()], ignore_index=True)
    return rows


def level_columns(rows: pd.DataFrame, measure: str) -> dict[str, str]:
    """Level name -> column for one interval measure ('coverage', 'width', 'interval_score')."""
    prefix = f"{measure}_"
    return {
        c.removeprefix(prefix): c
        for c in rows.columns
        if c.startswith(prefix) and c.removeprefix(prefix).replace(".", "").isdigit()
    }
