"""Status rows: window measures shaped as the CONTRACT rows, filtered, sorted, paged.

A row carries `series_id` (the series key), `model`, `horizon` (an integer, or "all"), `n, me,
mae, mse, rmse, mape, smape, wape, mase`, the objects `coverage`, `width` and `interval_score`
keyed by level ("80"), `window_start, window_end`, and extras: `window, mape_excluded, rmsse,
tracking_signal, crps`, `pinball` keyed by quantile ("10") and `pit` keyed by bin ("10-50").
Undefined values are null, never NaN. Rows of a horizon bucket are only made when asked for
(`StatusQuery.buckets`); they carry the label in `horizon_bucket` ("2-7") and no `horizon`, so
a reader of the CONTRACT rows can never take a bucket for a horizon. `open_status` goes
through the series a page at a time (keyset on the key), parks each page's rows in a
temporary table and streams them back in the chosen order, so a fleet of 100,000 series is
never in memory at once.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from fnmatch import translate
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import BigInteger, Column, Connection, Engine, Float, MetaData, Table, Text, text

from aftercast.benchmark_methods import BENCHMARK_PREFIX
from aftercast.config import WindowConfig
from aftercast.periods import to_iso
from aftercast.store.bulk import insert_frame
from aftercast.window_store import is_current, rows_for_page, series_pages
from aftercast.windows import ALL, horizon_rank, measure_columns

MEASURES = ["n", "me", "mae", "mse", "rmse", "mape", "smape", "wape", "mase"]
EXTRAS = ["mape_excluded", "rmsse", "tracking_signal", "crps"]
NESTED = ["coverage", "width", "interval_score", "pinball", "pit"]
# Sort keys, worst first: larger is worse, for ME and the tracking signal in absolute value,
# for coverage the largest gap between a level's coverage and its nominal share.
SORTS = (
    "key",
    "mae",
    "mse",
    "rmse",
    "mape",
    "smape",
    "wape",
    "mase",
    "rmsse",
    "crps",
    "me",
    "tracking_signal",
    "coverage",
)
PAGE_SERIES = 2_000
_STATUS_TABLE = Table(
    "tmp_status_rows",
    MetaData(),
    Column("sort_value", Float),
    Column("series_key", Text),
    Column("model", Text),
    Column("horizon_rank", BigInteger),
    Column("bucket_row", BigInteger),
    Column("body", Text),
)


def _clean(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return None
    if isinstance(value, np.generic):
        return _clean(value.item())
    return value


def _iso(value: Any) -> Any:
    return value if value is None or isinstance(value, str) else to_iso(int(value))


def is_bucket(horizon: pd.Series) -> np.ndarray:
    """True where a horizon label names a bucket ("2-7"), not a horizon (3) nor "all"."""
    # Labels are a handful of distinct values (1 and "1" stay apart): test those, map the rows.
    kinds = {label: isinstance(label, str) and label != ALL for label in horizon.unique()}
    return horizon.map(kinds).to_numpy(bool)


def status_json(rows: pd.DataFrame) -> list[dict[str, Any]]:
    """CONTRACT rows from window rows whose `series_id` is the series key, nulls for NaN.

    Accepts the frames of `window_status` (and of `contract_frame`); extra columns are left
    out, missing extras are skipped.
    """
    if rows.empty:
        return []
    fields = ["series_id", "model", "horizon", *MEASURES, "window_start", "window_end"]
    fields += [c for c in ["window", *EXTRAS] if c in rows.columns]
    nested = {m: measure_columns(rows, m) for m in NESTED}
    plain = rows[fields].astype(object).where(rows[fields].notna(), None)
    out = []
    for record, index in zip(plain.to_dict("records"), rows.index, strict=True):
        row = {k: _clean(v) for k, v in record.items()}
        horizon = row["horizon"]
        if isinstance(horizon, str) and horizon != ALL:  # a bucket label is not a horizon
            row = {("horizon_bucket" if k == "horizon" else k): v for k, v in row.items()}
        elif horizon != ALL:
            row["horizon"] = int(horizon)
        row["n"] = int(row["n"])
        if row.get("mape_excluded") is not None:
            row["mape_excluded"] = int(row["mape_excluded"])
        row["window_start"], row["window_end"] = _iso(row["window_start"]), _iso(row["window_end"])
        for measure, columns in nested.items():
            values = {name: _clean(rows.at[index, c]) for name, c in columns.items()}
            if measure in ("coverage", "width", "interval_score") or values:
                row[measure] = {k: v for k, v in values.items() if v is not None}
        out.append(row)
    return out


def contract_frame(rows: pd.DataFrame) -> pd.DataFrame:
    """Window rows of `window_store` with the series key as `series_id` (integer ids dropped)."""
    if rows.empty:
        return rows
    named = rows.drop(columns=["series_id", "model_id"]).rename(columns={"series": "series_id"})
    for column in ("window_start", "window_end"):
        named[column] = named[column].map(_iso)
    return named


def window_status(
    engine: Engine, window: WindowConfig, now: int, buckets: Sequence[str] = ()
) -> pd.DataFrame:
    """Window rows of every series at `now`, series key in `series_id` (for pages and the demo)."""
    frames = []
    with engine.connect() as connection:
        stored = is_current(connection, window, now)
        for page in _series_pages(connection, StatusQuery(window, now), PAGE_SERIES):
            rows = rows_for_page(connection, list(buckets), window, now, page, stored)
            if len(rows):
                frames.append(contract_frame(rows))
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()


@dataclass(frozen=True)
class StatusQuery:
    """Which rows `status` shows and in what order (see SORTS); None means no filter."""

    window: WindowConfig
    now: int
    buckets: tuple[str, ...] = ()  # labels of the bucket rows to add; none by default
    buckets_last: bool = False  # all CONTRACT rows first, then the bucket rows
    sort: str = "key"
    series: str | None = None  # shell pattern on the series key: 'shop-01*/rye'
    model: str | None = None
    horizon: str | None = None  # '3', '2-7' or 'all'
    labels: tuple[tuple[str, str], ...] = ()
    limit: int | None = None
    benchmarks: bool = True  # the rows of aftercast's own benchmark models too


@dataclass
class StatusResult:
    """How many rows matched, the level, quantile and bin names seen, and the rows in order."""

    total: int
    names: dict[str, list[str]] = field(default_factory=dict)
    rows: Iterator[dict[str, Any]] = field(default_factory=lambda: iter(()))


def _series_pages(connection: Connection, query: StatusQuery, size: int) -> Iterator[pd.DataFrame]:
    """Pages of (id, key) of the series matching the pattern and labels, in key order."""
    pattern = re.compile(translate(query.series)) if query.series else None
    for page in series_pages(connection, size, by="key"):
        keep = np.ones(len(page), dtype=bool)
        if pattern is not None:
            keep &= page["key"].str.match(pattern).to_numpy(bool)
        if query.labels:
            labels = pd.DataFrame([json.loads(t) for t in page["labels"]], index=page.index)
            for name, value in query.labels:
                column = labels[name] if name in labels else pd.Series(None, index=page.index)
                keep &= (column == value).to_numpy(bool)
        if keep.any():
            yield page.loc[keep, ["id", "key"]]


def _keep(rows: pd.DataFrame, query: StatusQuery) -> pd.DataFrame:
    keep = np.ones(len(rows), dtype=bool)
    if query.model is not None:
        keep &= (rows["model"] == query.model).to_numpy(bool)
    if not query.benchmarks:
        keep &= ~rows["model"].astype(str).str.startswith(BENCHMARK_PREFIX).to_numpy(bool)
    if query.horizon is not None:
        keep &= (rows["horizon"].astype(str) == query.horizon).to_numpy(bool)
    return rows[keep]


def sort_values(rows: pd.DataFrame, sort: str) -> np.ndarray:
    """The value rows are ordered by, descending (worst first); NaN sorts last."""
    if sort == "key":
        return np.full(len(rows), np.nan)
    if sort == "coverage":
        gaps = [
            (rows[column] - float(level) / 100.0).abs()
            for level, column in measure_columns(rows, "coverage").items()
        ]
        if not gaps:
            return np.full(len(rows), np.nan)
        return pd.concat(gaps, axis=1).max(axis=1, skipna=True).to_numpy(np.float64)
    if sort not in rows.columns:
        return np.full(len(rows), np.nan)
    values = rows[sort].to_numpy(np.float64)
    return np.abs(values) if sort in ("me", "tracking_signal") else values


def _park(connection: Connection, rows: pd.DataFrame, query: StatusQuery) -> dict[str, set[str]]:
    """Insert a page's rows into the temporary table; returns the nested names it used."""
    named = contract_frame(rows)
    records = status_json(named)
    frame = pd.DataFrame(
        {
            "sort_value": sort_values(rows, query.sort),
            "series_key": named["series_id"].to_numpy(),
            "model": named["model"].to_numpy(),
            "horizon_rank": horizon_rank(named["horizon"]).to_numpy(),
            "bucket_row": is_bucket(named["horizon"]).astype(np.int64),
            "body": [json.dumps(r, separators=(",", ":")) for r in records],
        }
    )
    insert_frame(connection, _STATUS_TABLE, frame)
    return {m: {name for r in records for name in r.get(m, {})} for m in NESTED}


def _create_parking(connection: Connection) -> None:
    columns = (
        "sort_value DOUBLE PRECISION, series_key TEXT, model TEXT, horizon_rank BIGINT, "
        "bucket_row BIGINT, body TEXT"
    )
    connection.execute(text(f"CREATE TEMP TABLE IF NOT EXISTS {_STATUS_TABLE.name} ({columns})"))
    connection.execute(text(f"DELETE FROM {_STATUS_TABLE.name}"))


def _stream(connection: Connection, query: StatusQuery) -> Iterator[dict[str, Any]]:
    first = "bucket_row, " if query.buckets_last else ""
    sql = (
        f"SELECT body FROM {_STATUS_TABLE.name} ORDER BY {first}(sort_value IS NULL), "
        "sort_value DESC, series_key, model, horizon_rank"
    )
    if query.limit is not None:
        sql += f" LIMIT {int(query.limit)}"
    result = connection.execution_options(stream_results=True).execute(text(sql))
    for batch in result.partitions(1_000):
        for (body,) in batch:
            yield json.loads(body)


def _name_order(name: str) -> tuple[float, str]:
    head = name.split("-", 1)[0]
    return (float(head) if head.replace(".", "", 1).isdigit() else math.inf, name)


@contextmanager
def open_status(
    engine: Engine, query: StatusQuery, page_series: int = PAGE_SERIES
) -> Iterator[StatusResult]:
    """Status rows for `query`, streamed in order while the context is open."""
    if query.sort not in SORTS:
        raise ValueError(f"sort must be one of {', '.join(SORTS)}")
    with engine.connect() as connection:
        _create_parking(connection)
        stored = is_current(connection, query.window, query.now)
        total = 0
        names: dict[str, set[str]] = {m: set() for m in NESTED}
        for page in _series_pages(connection, query, page_series):
            rows = rows_for_page(
                connection, list(query.buckets), query.window, query.now, page, stored
            )
            rows = _keep(rows, query) if len(rows) else rows
            if len(rows):
                total += len(rows)
                for measure, seen in _park(connection, rows, query).items():
                    names[measure] |= seen
        ordered = {m: sorted(v, key=_name_order) for m, v in names.items()}
        yield StatusResult(total, ordered, _stream(connection, query))
