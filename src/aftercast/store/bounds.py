"""A forecast's interval bounds and quantiles packed into two columns of its own row.

A forecast with 80% and 95% intervals and three quantiles used to be seven rows of two child
tables; written and read back for every forecast, those rows were most of the first load's and
the daily cycle's work in both databases. They are now stored beside the point forecast:

- `bound_layout`, text naming the levels and probabilities in percent, e.g. ``80,95|10,50,90``;
- `bounds`, a blob of little-endian float64 values in that order: lower and upper bound of each
  level, then each quantile. NaN marks a bound or quantile the forecast does not have, which
  validation never lets through as a value (every number must be finite).

Rows written together share one layout (the levels and quantiles of their file), so a read
groups by the few distinct layouts and decodes each group with one `numpy.frombuffer`. The
frames in and out are the long ones the rest of the code works with: (row or forecast_id,
level, lower, upper) and (row or forecast_id, prob, value).
"""

from __future__ import annotations

from typing import cast

import numpy as np
import pandas as pd

_FLOAT = np.dtype("<f8")


def _names(values: np.ndarray) -> str:
    return ",".join(format(float(v), "g") for v in values)


def _parse(names: str) -> np.ndarray:
    return np.array([float(v) for v in names.split(",") if v], dtype=np.float64)


def pack_bounds(
    index: pd.Index, intervals: pd.DataFrame, quantiles: pd.DataFrame, key: str = "row"
) -> tuple[list[str | None], list[bytes | None]]:
    """The layout and blob of each row of `index` (None for a row with no bound at all).

    >>> iv = pd.DataFrame({"row": [7], "level": [80.0], "lower": [8.0], "upper": [12.0]})
    >>> q = pd.DataFrame({"row": [7, 8], "prob": [50.0, 50.0], "value": [10.0, 3.0]})
    >>> layouts, blobs = pack_bounds(pd.Index([7, 8, 9]), iv, q)
    >>> layouts
    ['80|50', '80|50', None]
    >>> np.frombuffer(blobs[0], "<f8").tolist()
    [8.0, 12.0, 10.0]
    """
    levels = np.unique(intervals["level"].to_numpy(np.float64)) if len(intervals) else np.empty(0)
    probs = np.unique(quantiles["prob"].to_numpy(np.float64)) if len(quantiles) else np.empty(0)
    width = 2 * len(levels) + len(probs)
    if width == 0:
        return [None] * len(index), [None] * len(index)
    matrix = np.full((len(index), width), np.nan, dtype=_FLOAT)
    if len(intervals):
        rows = index.get_indexer(intervals[key])
        slot = 2 * np.searchsorted(levels, intervals["level"].to_numpy(np.float64))
        matrix[rows, slot] = intervals["lower"].to_numpy(np.float64)
        matrix[rows, slot + 1] = intervals["upper"].to_numpy(np.float64)
    if len(quantiles):
        rows = index.get_indexer(quantiles[key])
        slot = 2 * len(levels) + np.searchsorted(probs, quantiles["prob"].to_numpy(np.float64))
        matrix[rows, slot] = quantiles["value"].to_numpy(np.float64)
    # Viewing each row as one opaque value lets numpy hand out the bytes objects in C.
    records = matrix.view(np.dtype((np.void, width * _FLOAT.itemsize))).ravel()
    blobs: list[bytes | None] = cast(list[bytes | None], records.tolist())
    layout = f"{_names(levels)}|{_names(probs)}"
    empty = np.asarray(np.isnan(matrix).all(axis=1))
    layouts: list[str | None] = [None if e else layout for e in empty.tolist()]
    for position in np.flatnonzero(empty).tolist():
        blobs[position] = None
    return layouts, blobs


def unpack_bounds(
    ids: np.ndarray, layouts: pd.Series, blobs: pd.Series, key: str = "forecast_id"
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Long frames of interval bounds and quantiles from stored layouts and blobs.

    >>> layouts, blobs = pack_bounds(
    ...     pd.Index([1]), pd.DataFrame({"row": [1], "level": [80.0], "lower": [8.0],
    ...     "upper": [12.0]}), pd.DataFrame({"row": [], "prob": [], "value": []}))
    >>> iv, q = unpack_bounds(np.array([1]), pd.Series(layouts), pd.Series(blobs))
    >>> iv.to_dict("records")
    [{'forecast_id': 1, 'level': 80.0, 'lower': 8.0, 'upper': 12.0}]
    """
    ids = np.asarray(ids, dtype=np.int64)
    layout_values = pd.Series(layouts.to_numpy(), dtype=object)
    present = layout_values.notna().to_numpy()
    interval_parts, quantile_parts = [], []
    for layout, positions in pd.Series(np.flatnonzero(present)).groupby(
        layout_values[present].to_numpy()
    ):
        level_names, prob_names = str(layout).split("|")
        levels, probs = _parse(level_names), _parse(prob_names)
        chosen = positions.to_numpy()
        joined = b"".join(blobs.to_numpy()[chosen].tolist())
        matrix = np.frombuffer(joined, dtype=_FLOAT).reshape(len(chosen), -1)
        owners = ids[chosen]
        for i, level in enumerate(levels.tolist()):
            lower, upper = matrix[:, 2 * i], matrix[:, 2 * i + 1]
            keep = ~np.isnan(lower)
            interval_parts.append(
                pd.DataFrame(
                    {key: owners[keep], "level": level, "lower": lower[keep], "upper": upper[keep]}
                )
            )
        for i, prob in enumerate(probs.tolist()):
            value = matrix[:, 2 * len(levels) + i]
            keep = ~np.isnan(value)
            quantile_parts.append(
                pd.DataFrame({key: owners[keep], "prob": prob, "value": value[keep]})
            )
    return _long(interval_parts, [key, "level", "lower", "upper"]), _long(
        quantile_parts, [key, "prob", "value"]
    )


def _long(parts: list[pd.DataFrame], columns: list[str]) -> pd.DataFrame:
    if not parts:
        return pd.DataFrame(
            {c: pd.Series(dtype=np.int64 if i == 0 else np.float64) for i, c in enumerate(columns)}
        )
    return pd.concat(parts, ignore_index=True)
