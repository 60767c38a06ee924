"""Per-target profiles: window pairs reduced to one observation per target and horizon bucket.

Pure pandas/numpy over every key at once. Forecasts of different horizons for the same target
share its actual, so the tests never count them as separate outcomes: for accuracy and bias a
bucket contributes one observation per target period (the mean over the bucket's horizons),
and coverage is tested horizon by horizon (one hit per target each) and combined within the
bucket (see `checks`). Where one model issued several forecasts of the same horizon for one
target (several issues per period), the latest issued is kept. `padded` turns long frames into
the keys x time arrays the `detect` tests take.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

KEY = ["series_id", "model_id", "bucket"]
NO_UPPER = 10**9


def bucket_bounds(labels: list[str]) -> list[tuple[int, int]]:
    """(low, high) horizons of each bucket label: "1", "2-7", "15+".

    >>> bucket_bounds(["1", "2-7", "15+"])
    [(1, 1), (2, 7), (15, 1000000000)]
    """
    bounds = []
    for label in labels:
        match = re.fullmatch(r"\s*(\d+)\s*(?:-\s*(\d+)|(\+))?\s*", label)
        if match is None:
            raise ValueError(f"horizon bucket {label!r} must look like '1', '2-7' or '15+'")
        low = int(match.group(1))
        high = int(match.group(2)) if match.group(2) else (NO_UPPER if match.group(3) else low)
        bounds.append((low, high))
    return bounds


def bucket_of(horizon: np.ndarray, labels: list[str]) -> np.ndarray:
    """The label of the first bucket containing each horizon ('' where none does).

    >>> bucket_of(np.array([1, 3, 9, 20]), ["1", "2-7", "8-14", "15+"]).tolist()
    ['1', '2-7', '8-14', '15+']
    """
    horizon = np.asarray(horizon)
    out = np.full(horizon.shape, "", dtype=object)
    for label, (low, high) in reversed(list(zip(labels, bucket_bounds(labels), strict=True))):
        out[(horizon >= low) & (horizon <= high)] = label
    return out


def latest_per_target(pairs: pd.DataFrame) -> pd.DataFrame:
    """One pair per (series, model, horizon, target period): the latest issued."""
    ordered = pairs.sort_values("issued_at", kind="stable")
    return ordered.drop_duplicates(
        ["series_id", "model_id", "horizon", "target_period"], keep="last"
    )


def with_buckets(pairs: pd.DataFrame, labels: list[str]) -> pd.DataFrame:
    """`pairs` (one per target and horizon) with a `bucket` column; out-of-bucket rows dropped."""
    bucketed = latest_per_target(pairs)
    bucketed = bucketed.assign(bucket=bucket_of(bucketed["horizon"].to_numpy(), labels))
    return bucketed.loc[bucketed["bucket"] != ""]


def target_profiles(pairs: pd.DataFrame) -> pd.DataFrame:
    """Per (series, model, bucket, target period): mean abs_error and error over horizons.

    `pairs` carries a `bucket` column (see `with_buckets`). Also the number of pairs, the
    largest horizon and the target's time.

    >>> p = pd.DataFrame({"series_id": 1, "model_id": 2, "bucket": "2-7", "target_period": [5, 5],
    ...                   "target_at": 0, "horizon": [2, 3], "error": [1.0, -3.0],
    ...                   "abs_error": [1.0, 3.0]})
    >>> target_profiles(p)[["abs_error", "error", "pairs", "horizon"]].values.tolist()
    [[2.0, -1.0, 2.0, 3.0]]
    """
    return pairs.groupby([*KEY, "target_period"], as_index=False, sort=True).agg(
        abs_error=("abs_error", "mean"),
        error=("error", "mean"),
        pairs=("error", "size"),
        horizon=("horizon", "max"),
        target_at=("target_at", "max"),
    )


def padded(
    frame: pd.DataFrame, keys: pd.DataFrame, value: str, key: list[str] | None = None
) -> np.ndarray:
    """A keys x time array of `value` (time = `target_period` order), NaN-padded at the end.

    Row i belongs to row i of `keys`; keys without rows in `frame` are all NaN.

    >>> f = pd.DataFrame({"k": [1, 1, 2], "target_period": [3, 1, 1], "v": [3.0, 1.0, 5.0]})
    >>> padded(f, pd.DataFrame({"k": [2, 1, 9]}), "v", ["k"]).tolist()
    [[5.0, nan], [1.0, 3.0], [nan, nan]]
    """
    key = KEY if key is None else key
    index = keys[key].reset_index(drop=True).reset_index(names="_row")
    located = frame.merge(index, on=key, how="inner").sort_values(["_row", "target_period"])
    position = located.groupby("_row").cumcount().to_numpy()
    width = int(position.max()) + 1 if len(position) else 1
    out = np.full((len(keys), width), np.nan)
    out[located["_row"].to_numpy(), position] = located[value].to_numpy(np.float64)
    return out


def baseline_summaries(
    pairs: pd.DataFrame, intervals: pd.DataFrame
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Summary per (series, model, bucket) of a reference window, and its per-target losses.

    `pairs` carries `bucket` (see `with_buckets`); `intervals` has forecast_id, level, hit,
    interval_score. Summary columns: targets, pairs, mae, rmse, me, error_sd (sample sd of the
    per-target mean errors, the bias charts' scale), coverage and interval_score (JSON text of
    level -> mean), window_first and window_last (target times).
    """
    profiles = target_profiles(pairs)
    grouped = pairs.groupby(KEY)
    summary = grouped.agg(
        pairs=("error", "size"),
        mae=("abs_error", "mean"),
        mse=("sq_error", "mean"),
        me=("error", "mean"),
        window_first=("target_at", "min"),
        window_last=("target_at", "max"),
    )
    summary["rmse"] = np.sqrt(summary.pop("mse"))
    per_target = profiles.groupby(KEY)
    summary["targets"] = per_target.size()
    summary["error_sd"] = per_target["error"].std(ddof=1)
    for measure, column in (("coverage", "hit"), ("interval_score", "interval_score")):
        summary[measure] = _level_json(pairs, intervals, column).reindex(summary.index).fillna("{}")
    losses = profiles[[*KEY, "target_period", "abs_error", "error"]]
    return summary.reset_index(), losses


def _level_json(pairs: pd.DataFrame, intervals: pd.DataFrame, column: str) -> pd.Series:
    """Per key, the JSON text {"<level>": mean of `column`} over the key's pairs.

    Built with column-wise string operations, one pass per level (a handful), not per key.
    """
    if intervals.empty:
        return pd.Series(dtype=object)
    joined = intervals.merge(pairs[["forecast_id", *KEY]], on="forecast_id")
    wide = joined.groupby([*KEY, "level"])[column].mean().unstack("level")
    text = pd.Series("", index=wide.index)
    for level in wide.columns:
        value = wide[level]
        part = ('"' + f"{level:g}" + '": ' + value.astype(str)).where(value.notna(), "")
        text = text + np.where((text != "") & (part != ""), ", ", "") + part
    return "{" + text + "}"
