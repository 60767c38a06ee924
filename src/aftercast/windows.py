"""Rolling windows: additive sums of pair measures per key, and the window measures from them.

Pure: frames in, frames out, all series in one groupby pass. Every window measure is a ratio
of sums that add up over pairs (counts, sums of errors, of interval hits, of pinball losses),
so the sums of a (series, model, horizon) window are the unit the store keeps and the cycle
refreshes, and the rows for horizon buckets and for "all" horizons are sums of those. A
`days` window holds the pairs with now - D days < target_at <= now; a `points` window holds,
per (series, model), the pairs of the N latest target periods at or before now. Undefined
measures are NaN here and null in JSON.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from aftercast.config import WindowConfig
from aftercast.measures import squared_scaled_error

DAY = 86_400
KEY = ["series_id", "model_id"]
HORIZON_KEY = [*KEY, "horizon"]
# Sums per (series, model, horizon); each is a plain sum or count over the window's pairs.
POINT_SUMS = [
    "n",
    "sum_error",
    "sum_abs_error",
    "sum_sq_error",
    "n_ape",
    "sum_ape",
    "n_sape",
    "sum_sape",
    "sum_abs_actual",
    "n_scaled",
    "sum_abs_scaled",
    "n_sq_scaled",
    "sum_sq_scaled",
]
# Per (series, model, horizon, level): interval hits, widths and interval scores.
LEVEL_SUMS = ["n", "hits", "sum_width", "sum_interval_score"]
# Per (series, model, horizon, prob): pinball losses and how often y <= the quantile.
QUANTILE_SUMS = ["n", "sum_pinball", "below"]
# Extremes kept beside the sums (they combine by min / max, not by addition).
EXTREMES = {"first_target": "min", "last_target": "max", "first_period": "min"}
ALL = "all"


@dataclass(frozen=True)
class WindowSums:
    """The sufficient statistics of a set of windows, in three long frames."""

    points: pd.DataFrame  # HORIZON_KEY + POINT_SUMS + EXTREMES
    levels: pd.DataFrame  # HORIZON_KEY + level + LEVEL_SUMS
    quantiles: pd.DataFrame  # HORIZON_KEY + prob + QUANTILE_SUMS

    @classmethod
    def empty(cls) -> WindowSums:
        return cls(
            pd.DataFrame(columns=[*HORIZON_KEY, *POINT_SUMS, *EXTREMES]),
            pd.DataFrame(columns=[*HORIZON_KEY, "level", *LEVEL_SUMS]),
            pd.DataFrame(columns=[*HORIZON_KEY, "prob", *QUANTILE_SUMS]),
        )


def level_name(level: float) -> str:
    """'80' for 80.0, '97.5' for 97.5: the key used in coverage objects."""
    return f"{float(level):g}"


def level_names(values: pd.Series) -> pd.Series:
    """`level_name` of every value, computed once per distinct value (a grid has a few)."""
    names = {value: level_name(value) for value in values.unique()}
    return values.map(names)


def select_window(pairs: pd.DataFrame, window: WindowConfig, now: int) -> pd.DataFrame:
    """The pairs inside `window` at `now` (start exclusive, end inclusive)."""
    upto = pairs[pairs["target_at"] <= now]
    if window.days is not None:
        return upto[upto["target_at"] > now - int(window.days * DAY)]
    periods = upto[[*KEY, "target_period"]].drop_duplicates()
    rank = periods.groupby(KEY)["target_period"].rank(method="first", ascending=False)
    latest = periods[rank <= int(window.points or 0)]
    return upto.merge(latest, on=[*KEY, "target_period"])


def pair_sums(pairs: pd.DataFrame, intervals: pd.DataFrame, quantiles: pd.DataFrame) -> WindowSums:
    """Window sums straight from pair rows (the store computes the same sums in SQL).

    `pairs` has the columns of the pairs table; `intervals` and `quantiles` those of
    pair_intervals and pair_quantiles (only rows of these pairs are used).
    """
    sq_scaled = squared_scaled_error(pairs["error"], pairs["scale_sq"])
    frame = pairs.assign(
        abs_actual=pairs["actual"].abs(),
        abs_scaled=pairs["scaled_error"].abs(),
        sq_scaled=sq_scaled,
    )
    points = frame.groupby(HORIZON_KEY).agg(
        n=("error", "size"),
        sum_error=("error", "sum"),
        sum_abs_error=("abs_error", "sum"),
        sum_sq_error=("sq_error", "sum"),
        n_ape=("ape", "count"),
        sum_ape=("ape", "sum"),
        n_sape=("sape", "count"),
        sum_sape=("sape", "sum"),
        sum_abs_actual=("abs_actual", "sum"),
        n_scaled=("abs_scaled", "count"),
        sum_abs_scaled=("abs_scaled", "sum"),
        n_sq_scaled=("sq_scaled", "count"),
        sum_sq_scaled=("sq_scaled", "sum"),
        first_target=("target_at", "min"),
        last_target=("target_at", "max"),
        first_period=("target_period", "min"),
    )
    keyed = frame[["forecast_id", *HORIZON_KEY, "actual"]]
    hits = intervals.merge(keyed, on="forecast_id")
    levels = hits.groupby([*HORIZON_KEY, "level"]).agg(
        n=("hit", "size"),
        hits=("hit", "sum"),
        sum_width=("width", "sum"),
        sum_interval_score=("interval_score", "sum"),
    )
    losses = quantiles.merge(keyed, on="forecast_id")
    losses = losses.assign(is_below=(losses["actual"] <= losses["value"]).astype(np.int64))
    probs = losses.groupby([*HORIZON_KEY, "prob"]).agg(
        n=("pinball", "size"), sum_pinball=("pinball", "sum"), below=("is_below", "sum")
    )
    return WindowSums(points.reset_index(), levels.reset_index(), probs.reset_index())


def parse_bucket(text: str) -> tuple[int, int]:
    """'2-7' -> (2, 7); '1' -> (1, 1): an inclusive range of horizons."""
    low, _, high = text.strip().partition("-")
    return int(low), int(high or low)


def _relabel(frame: pd.DataFrame, buckets: list[str], extra: list[str]) -> pd.DataFrame:
    """Rows summed per bucket of horizons and over all horizons, horizon as its label."""
    by = [*KEY, *extra]
    how = {c: EXTREMES.get(c, "sum") for c in frame.columns if c not in [*by, "horizon"]}
    parts = []
    horizon = frame["horizon"].astype(np.int64)
    for bucket in buckets:
        low, high = parse_bucket(bucket)
        inside = frame[(horizon >= low) & (horizon <= high)]
        if len(inside):
            parts.append(inside.groupby(by, as_index=False).agg(how).assign(horizon=bucket))
    if len(frame):
        parts.append(frame.groupby(by, as_index=False).agg(how).assign(horizon=ALL))
    return pd.concat([frame.astype({"horizon": object}), *parts], ignore_index=True)


def group_horizons(sums: WindowSums, buckets: list[str] | None = None) -> WindowSums:
    """Add rows for each horizon bucket ('2-7') and for all horizons ('all') to the sums."""
    names = list(buckets or [])
    return WindowSums(
        _relabel(sums.points, names, []),
        _relabel(sums.levels, names, ["level"]),
        _relabel(sums.quantiles, names, ["prob"]),
    )


def horizon_rank(horizon: pd.Series) -> pd.Series:
    """Sort order of horizon labels: single horizons, then buckets, then 'all'."""

    def rank(label: object) -> int:
        if label == ALL:
            return 10**9
        if isinstance(label, str):
            low, high = parse_bucket(label)
            return 10**6 + low * 1_000 + high
        return int(label)  # type: ignore[call-overload]

    # A fleet has a handful of distinct labels: rank those, then map every row.
    ranks = {label: rank(label) for label in horizon.unique()}
    return horizon.map(ranks).astype(np.int64)


def _ratio(numerator: pd.Series, denominator: pd.Series, factor: float = 1.0) -> np.ndarray:
    num = numerator.to_numpy(np.float64)
    den = denominator.to_numpy(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, factor * num / den, np.nan)


def _point_measures(points: pd.DataFrame) -> pd.DataFrame:
    n = points["n"]
    out = points[[*HORIZON_KEY, *EXTREMES]].copy()
    out["n"] = n.astype(np.int64)
    out["me"] = _ratio(points["sum_error"], n)
    out["mae"] = _ratio(points["sum_abs_error"], n)
    out["mse"] = _ratio(points["sum_sq_error"], n)
    out["rmse"] = np.sqrt(out["mse"])
    out["mape"] = _ratio(points["sum_ape"], points["n_ape"])
    out["mape_excluded"] = (n - points["n_ape"]).astype(np.int64)
    out["smape"] = _ratio(points["sum_sape"], points["n_sape"])
    out["wape"] = _ratio(points["sum_abs_error"], points["sum_abs_actual"], 100.0)
    out["mase"] = _ratio(points["sum_abs_scaled"], points["n_scaled"])
    out["rmsse"] = np.sqrt(_ratio(points["sum_sq_scaled"], points["n_sq_scaled"]))
    # Cumulative error over mean absolute error: n * sum(e) / sum|e|.
    out["tracking_signal"] = _ratio(points["sum_error"] * n, points["sum_abs_error"])
    return out


def _wide(long: pd.DataFrame, column: str, values: dict[str, np.ndarray]) -> pd.DataFrame:
    """One column '<measure>_<name>' per value of `column` (a level or a probability)."""
    if long.empty:
        return pd.DataFrame(index=pd.MultiIndex.from_arrays([[]] * 3, names=HORIZON_KEY))
    frame = long[HORIZON_KEY].assign(_name=level_names(long[column]), **values)
    wide = frame.pivot(index=HORIZON_KEY, columns="_name", values=list(values))
    wide.columns = [f"{measure}_{name}" for measure, name in wide.columns]
    return wide


def _level_measures(levels: pd.DataFrame) -> pd.DataFrame:
    return _wide(
        levels,
        "level",
        {
            "coverage": _ratio(levels["hits"], levels["n"]),
            "width": _ratio(levels["sum_width"], levels["n"]),
            "interval_score": _ratio(levels["sum_interval_score"], levels["n"]),
            "interval_n": levels["n"].to_numpy(np.int64),
            "hits": levels["hits"].to_numpy(np.int64),
        },
    )


def _pit_bins(quantiles: pd.DataFrame) -> pd.DataFrame:
    """PIT histogram: share of actuals between successive quantiles of the forecast.

    With F_k the share of pairs with y <= q_(p_k), the bins hold F_1, F_2 - F_1, ..., 1 - F_K
    (expected p_1, p_2 - p_1, ..., 1 - p_K when calibrated). Only defined where every
    quantile of the grid was scored on the same pairs; NaN otherwise.
    """
    ordered = quantiles.sort_values([*HORIZON_KEY, "prob"], kind="stable")
    share = pd.Series(_ratio(ordered["below"], ordered["n"]), index=ordered.index)
    grouped = share.groupby([ordered[c] for c in HORIZON_KEY], sort=False)
    previous_prob = ordered.groupby(HORIZON_KEY, sort=False)["prob"].shift(fill_value=0.0)
    bins = ordered[HORIZON_KEY].assign(
        _name=level_names(previous_prob) + "-" + level_names(ordered["prob"]),
        pit=(share - grouped.shift(fill_value=0.0)).to_numpy(),
    )
    last = ordered.groupby(HORIZON_KEY, sort=False).tail(1)
    top = last[HORIZON_KEY].assign(
        _name=level_names(last["prob"]) + "-100", pit=1.0 - share.loc[last.index].to_numpy()
    )
    bins = pd.concat([bins, top], ignore_index=True)
    wide = bins.pivot(index=HORIZON_KEY, columns="_name", values="pit").add_prefix("pit_")
    same_pairs = ordered.groupby(HORIZON_KEY)["n"].nunique() == 1
    return wide.where(same_pairs.reindex(wide.index), np.nan)


def _quantile_measures(quantiles: pd.DataFrame) -> pd.DataFrame:
    if quantiles.empty:
        return _wide(quantiles, "prob", {})
    pinball = _ratio(quantiles["sum_pinball"], quantiles["n"])
    wide = _wide(quantiles, "prob", {"pinball": pinball})
    # CRPS = 2 * integral over p of the pinball loss, estimated on the forecast's grid.
    crps = 2.0 * pd.Series(pinball).groupby([quantiles[c].to_numpy() for c in HORIZON_KEY]).mean()
    crps.index.names = HORIZON_KEY
    return wide.join(crps.rename("crps")).join(_pit_bins(quantiles))


def window_rows(sums: WindowSums) -> pd.DataFrame:
    """One row of window measures per key of `sums.points` (NaN where undefined).

    Point measures as in the CONTRACT (me, mae, mse, rmse, mape with mape_excluded, smape,
    wape, mase), plus rmsse = sqrt(mean(e^2 / s2)) with s2 the mean squared seasonal
    difference known at issue (M5 Competitor's Guide), tracking_signal = sum(e) / mean|e|, and
    per level L coverage_L, width_L, interval_score_L (with counts interval_n_L and hits_L), per
    quantile P pinball_P, crps and pit_<from>-<to> bins.
    """
    rows = _point_measures(sums.points).set_index(HORIZON_KEY)
    rows = rows.join(_level_measures(sums.levels)).join(_quantile_measures(sums.quantiles))
    rows = rows.reset_index()
    order = horizon_rank(rows["horizon"])
    return rows.assign(_rank=order).sort_values([*KEY, "_rank"]).drop(columns="_rank")


def measure_columns(rows: pd.DataFrame, measure: str) -> dict[str, str]:
    """Level or probability name -> column, for 'coverage', 'width', 'pinball', 'pit', ..."""
    prefix = f"{measure}_"
    names = {c.removeprefix(prefix): c for c in rows.columns if c.startswith(prefix)}
    return {k: v for k, v in names.items() if k[:1].isdigit()}
