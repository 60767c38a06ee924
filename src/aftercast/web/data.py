"""What the pages and the read API show, read from the store in a few set-wise queries.

Window rows come from one function, `window_rows`, so their source can be swapped (today
`aftercast.report.window_status`, which recomputes them from the pairs). The fleet's rows are
computed once per change of the store - a finished cycle or a new ingest batch - and kept by
`FleetCache`; sorting, filtering and paging then work on that frame, so a page of 100,000 series
costs a pandas sort, not a query per series. Skill against the benchmark, the tracking signal
and alert states are added only from data that exists: skill where aftercast's own benchmark
forecasts were scored for the same series and horizon, alert states where the alerts table is
present.
"""

from __future__ import annotations

import json
import threading
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine, inspect, text

from aftercast.benchmark_methods import BENCHMARK_PREFIX
from aftercast.config import WindowConfig
from aftercast.report import window_status
from aftercast.store.bulk import read_frame

PREFERRED_BENCHMARK = f"{BENCHMARK_PREFIX}seasonal-naive"
# Worst first: the state a (series, model) row shows when it has several alerts.
ALERT_ORDER = ["raised", "acknowledged", "pending", "cleared"]


def window_rows(engine: Engine, window: WindowConfig, now: int) -> pd.DataFrame:
    """Window rows for every (series, model, horizon) and (series, model, 'all') at `now`."""
    return window_status(engine, window, now)


def store_version(engine: Engine) -> tuple[int, int]:
    """(last cycle id, last ingest batch id): changes whenever what the pages show can."""
    with engine.connect() as connection:
        row = connection.execute(
            text("SELECT (SELECT MAX(id) FROM cycles), (SELECT MAX(id) FROM ingest_log)")
        ).one()
    return int(row[0] or 0), int(row[1] or 0)


def has_table(engine: Engine, name: str) -> bool:
    return inspect(engine).has_table(name)


def series_labels(engine: Engine) -> pd.DataFrame:
    """Every series: key and one `label_<name>` column per label name."""
    with engine.connect() as connection:
        frame = read_frame(connection, "SELECT id, key, labels FROM series")
    labels = pd.DataFrame([json.loads(t) for t in frame["labels"]], index=frame.index)
    return pd.concat([frame[["id", "key"]], labels.add_prefix("label_")], axis=1)


def add_skill(rows: pd.DataFrame) -> pd.DataFrame:
    """Skill = 1 - MAE / MAE of aftercast's benchmark on the same series, horizon and window.

    Left out (no column) when no benchmark was scored; NaN where one row has no benchmark row.
    """
    is_benchmark = rows["model"].str.startswith(BENCHMARK_PREFIX)
    if not is_benchmark.any():
        return rows
    bench = rows[is_benchmark].copy()
    bench["_rank"] = np.where(bench["model"] == PREFERRED_BENCHMARK, 0, 1)
    bench = bench.sort_values("_rank").drop_duplicates(["series_id", "horizon"])
    bench = bench[["series_id", "horizon", "mae", "model"]].rename(
        columns={"mae": "benchmark_mae", "model": "benchmark"}
    )
    bench["horizon"] = bench["horizon"].astype(str)
    merged = rows.assign(_h=rows["horizon"].astype(str)).merge(
        bench.rename(columns={"horizon": "_h"}), on=["series_id", "_h"], how="left"
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        skill = 1 - merged["mae"] / merged["benchmark_mae"].where(merged["benchmark_mae"] > 0)
    merged["skill"] = skill.where(~merged["model"].str.startswith(BENCHMARK_PREFIX))
    return merged.drop(columns=["_h"])


def alert_states(engine: Engine) -> pd.DataFrame | None:
    """Per (series key, model): the worst current alert state and how many alerts are open."""
    if not has_table(engine, "alerts"):
        return None
    with engine.connect() as connection:
        frame = read_frame(
            connection,
            "SELECT s.key AS series_id, m.name AS model, a.state, COUNT(*) AS alerts "
            "FROM alerts a JOIN series s ON s.id = a.series_id JOIN models m ON m.id = a.model_id "
            "GROUP BY s.key, m.name, a.state",
        )
    if frame.empty:
        return frame.assign(alert_state=pd.Series(dtype=str), alerts_open=pd.Series(dtype=int))
    frame["_rank"] = frame["state"].map({s: i for i, s in enumerate(ALERT_ORDER)}).fillna(99)
    frame["open"] = np.where(frame["state"] == "cleared", 0, frame["alerts"])
    open_counts = frame.groupby(["series_id", "model"])["open"].sum().rename("alerts_open")
    worst = frame.sort_values("_rank").drop_duplicates(["series_id", "model"])
    worst = worst.set_index(["series_id", "model"])["state"].rename("alert_state")
    return pd.concat([worst, open_counts], axis=1).reset_index()


def fleet_frame(engine: Engine, window: WindowConfig, now: int) -> pd.DataFrame:
    """Window rows of the whole fleet with labels, tracking signal, skill and alert state."""
    rows = window_rows(engine, window, now)
    if rows.empty:
        return rows
    with np.errstate(divide="ignore", invalid="ignore"):
        # Cumulative error over mean absolute error on the window (common practice: |TS| > 4).
        rows["tracking_signal"] = rows["n"] * rows["me"] / rows["mae"].where(rows["mae"] > 0)
    rows = add_skill(rows)
    labels = series_labels(engine).drop(columns="id").rename(columns={"key": "series_id"})
    rows = rows.merge(labels, on="series_id", how="left")
    states = alert_states(engine)
    if states is not None:
        rows = rows.merge(states, on=["series_id", "model"], how="left")
        rows["alerts_open"] = rows["alerts_open"].fillna(0).astype(int)
        rows["alert_state"] = rows["alert_state"].fillna("ok")
    return rows.reset_index(drop=True)


class FleetCache:
    """The fleet frame, recomputed only when the store changed or the minute turned."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._key: tuple[Any, ...] | None = None
        self._frame = pd.DataFrame()

    def get(self, engine: Engine, window: WindowConfig, now: int) -> pd.DataFrame:
        key = (window.name, now // 60, store_version(engine))
        with self._lock:
            if key != self._key:
                self._frame = fleet_frame(engine, window, now)
                self._key = key
            return self._frame


@dataclass
class FleetQuery:
    """How the overview is cut: filters, the sort column and the page."""

    sort: str = "series_id"
    descending: bool = False
    labels: dict[str, str] = field(default_factory=dict)
    text: str = ""
    model: str = ""
    horizon: str = "all"
    benchmarks: bool = False
    page: int = 1
    per_page: int = 50


def fleet_page(frame: pd.DataFrame, query: FleetQuery) -> tuple[pd.DataFrame, int]:
    """The rows of one overview page and how many rows match the filters in all."""
    if frame.empty:
        return frame, 0
    keep = frame["horizon"].astype(str) == query.horizon
    if not query.benchmarks:
        keep &= ~frame["model"].str.startswith(BENCHMARK_PREFIX)
    for name, value in query.labels.items():
        column = f"label_{name}"
        keep &= frame[column].eq(value) if column in frame else False
    if query.text:
        keep &= frame["series_id"].str.contains(query.text, case=False, regex=False)
    if query.model:
        keep &= frame["model"] == query.model
    selected = frame[keep]
    sort = query.sort if query.sort in selected.columns else "series_id"
    ordered = selected.sort_values(
        [sort, "series_id", "model"],
        ascending=[not query.descending, True, True],
        na_position="last",
        kind="stable",
    )
    start = (query.page - 1) * query.per_page
    return ordered.iloc[start : start + query.per_page], len(ordered)


def label_choices(frame: pd.DataFrame, limit: int = 50) -> dict[str, list[str]]:
    """Label names and their most frequent values, for the filter menus."""
    choices: dict[str, list[str]] = {}
    for column in [c for c in frame.columns if c.startswith("label_")]:
        counts = frame[column].dropna().value_counts()
        choices[column.removeprefix("label_")] = [str(v) for v in counts.index[:limit]]
    return choices
