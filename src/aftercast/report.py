"""Status rows: windows computed from the store, shaped as the CONTRACT rows, JSON or a table.

JSON rows carry `series_id, model, horizon, n, me, mae, mse, rmse, mape, smape, wape, mase,
coverage, width, interval_score, window_start, window_end` (plus a few extra fields); every
undefined value is null, never NaN.
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd
from sqlalchemy import Engine

from aftercast.config import WindowConfig
from aftercast.periods import to_iso
from aftercast.store.queries import intervals_for, pairs_upto
from aftercast.windows import DAY, aggregate, level_columns, select_window

MEASURES = ["n", "me", "mae", "mse", "rmse", "mape", "smape", "wape", "mase"]


def _clean(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return None
    if hasattr(value, "item"):
        return _clean(value.item())
    return value


def window_status(engine: Engine, window: WindowConfig, now: int) -> pd.DataFrame:
    """Window rows for every (series, model, horizon) and (series, model, 'all') at `now`."""
    since = now - int(window.days * DAY) if window.days is not None else None
    with engine.connect() as connection:
        pairs = select_window(pairs_upto(connection, now, since), window, now)
        intervals = (
            intervals_for(connection, pairs["forecast_id"])
            if len(pairs)
            else pd.DataFrame(columns=["forecast_id", "level", "hit", "width", "interval_score"])
        )
    if pairs.empty:
        return pd.DataFrame()
    rows = aggregate(pairs, intervals)
    if window.days is not None:
        rows["window_start"] = to_iso(since)
        rows["window_end"] = to_iso(now)
    else:
        rows["window_start"] = rows["target_first"].map(to_iso)
        rows["window_end"] = rows["target_last"].map(to_iso)
    rows["window"] = window.name
    order = rows["horizon"].map(lambda h: 10**9 if h == "all" else int(h))
    return rows.assign(_o=order).sort_values(["series_id", "model", "_o"]).drop(columns="_o")


def status_json(rows: pd.DataFrame) -> list[dict[str, Any]]:
    """CONTRACT rows with nulls for undefined values."""
    fields = [
        "series_id",
        "model",
        "horizon",
        *MEASURES,
        "mape_excluded",
        "window_start",
        "window_end",
        "window",
    ]
    nested = {m: level_columns(rows, m) for m in ("coverage", "width", "interval_score")}
    out = []
    for record in rows.to_dict("records"):
        row = {k: _clean(record[k]) for k in fields}
        row["horizon"] = record["horizon"] if record["horizon"] == "all" else int(record["horizon"])
        row["n"] = int(record["n"])
        for measure, columns in nested.items():
            row[measure] = {
                lv: _clean(record[c]) for lv, c in columns.items() if _clean(record[c]) is not None
            }
        out.append(row)
    return out
