"""Writing validated rows to the store, idempotently.

Each chunk is compared with what is stored (via a staged key table and one join): new rows are
inserted, identical rows counted unchanged, changed rows replaced. A changed actual is a
revision: the new value wins, its previous values stay in `actual_history`, and the match queue
gets the period so the next cycle rescores every pair that used it. Every write of a chunk is one
transaction, so a crash loses at most the chunk in flight and re-ingesting finishes the job.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from sqlalchemy import Connection, text

from aftercast.ingest.validate import Checked, bound_signature
from aftercast.store import schema
from aftercast.store.bounds import pack_bounds, unpack_bounds
from aftercast.store.bulk import (
    allocate_ids,
    id_condition,
    insert_frame,
    is_postgres,
    read_frame,
    stage_keys,
)


@dataclass
class Written:
    accepted: int = 0
    unchanged: int = 0
    revised: int = 0

    def add(self, other: Written) -> None:
        self.accepted += other.accepted
        self.unchanged += other.unchanged
        self.revised += other.revised


def enqueue(connection: Connection, series_id: np.ndarray, period: np.ndarray, kind: int) -> None:
    """Add (series, period) to the match queue for the next cycle, once each."""
    keys = pd.DataFrame({"series_id": series_id, "period": period}).drop_duplicates()
    if keys.empty:
        return
    keys["kind"] = kind
    staged = stage_keys(connection, "queue", keys)
    # ON CONFLICT rather than NOT EXISTS: with a fresh, unanalysed staging table PostgreSQL
    # planned the anti-join as a scan of the queue per staged row.
    connection.execute(
        text(
            "INSERT INTO match_queue (series_id, period, kind) "
            f"SELECT t.series_id, t.period, t.kind FROM {staged} t WHERE true "
            "ON CONFLICT (series_id, period, kind) DO NOTHING"
        )
    )


_KEY = ["series_id", "model_id", "issued_at", "target_at"]
_STORED = (
    "f.id, f.series_id, f.model_id, f.issued_at, f.target_at, f.point, f.bound_layout, f.bounds"
)


def _stored_forecasts(connection: Connection, rows: pd.DataFrame) -> pd.DataFrame:
    """Stored forecasts with the keys of `rows`.

    PostgreSQL: the forecasts of the rows' series issued in the rows' span of issue periods,
    by index (series_id, issue_period), matched to the keys here; joined to a staging table of
    keys, its planner hashed the whole forecasts table for every chunk. SQLite: that join.
    """
    keys = rows[_KEY]
    if is_postgres(connection):
        series, params = id_condition(connection, "f.series_id", keys["series_id"].unique(), "s")
        found = read_frame(
            connection,
            f"SELECT {_STORED} FROM forecasts f WHERE {series} "
            "AND f.issue_period >= :low AND f.issue_period <= :high",
            {
                **params,
                "low": int(rows["issue_period"].min()),
                "high": int(rows["issue_period"].max()),
            },
        )
        if found.empty:
            return found
        return found.merge(keys.drop_duplicates(), on=_KEY)
    staged = stage_keys(connection, "forecast_keys", keys)
    return read_frame(
        connection,
        f"SELECT {_STORED} FROM forecasts f "
        f"JOIN {staged} k ON f.series_id = k.series_id AND f.model_id = k.model_id "
        "AND f.issued_at = k.issued_at AND f.target_at = k.target_at",
    )


def _existing_forecasts(connection: Connection, rows: pd.DataFrame) -> pd.DataFrame:
    found = _stored_forecasts(connection, rows)
    if found.empty:
        return found.assign(_bounds=pd.Series(dtype=np.uint64))
    intervals, quantiles = unpack_bounds(
        found["id"].to_numpy(), found["bound_layout"], found["bounds"], key="row"
    )
    found["_bounds"] = bound_signature(intervals, quantiles, pd.Index(found["id"])).to_numpy()
    return found.drop(columns=["bound_layout", "bounds"])


def write_forecasts(
    connection: Connection,
    checked: Checked,
    series_ids: pd.Series,
    model_ids: dict[str, int],
    now: int,
    benchmarks: bool = False,
) -> Written:
    """Insert new forecasts, replace changed ones, count identical ones; queue their targets.

    The issue periods of production forecasts (not `benchmarks`, aftercast's own) are queued
    too, so that the benchmark stage finds every new issue time, however late it arrives.
    """
    rows = checked.good.copy()
    if rows.empty:
        return Written(unchanged=checked.duplicates)
    rows["series_id"] = series_ids.reindex(rows["series_key"]).to_numpy(dtype="int64")
    rows["model_id"] = rows["model"].map(model_ids).astype("int64")
    rows["_bounds"] = bound_signature(checked.intervals, checked.quantiles, rows.index).to_numpy()
    rows["bound_layout"], rows["bounds"] = pack_bounds(
        rows.index, checked.intervals, checked.quantiles
    )
    existing = _existing_forecasts(connection, rows)
    merged = rows.reset_index(names="row").merge(
        existing,
        how="left",
        on=["series_id", "model_id", "issued_at", "target_at"],
        suffixes=("", "_stored"),
    )
    is_new = merged["id"].isna()
    same = (
        ~is_new
        & (merged["point"] == merged["point_stored"])
        & (merged["_bounds"] == merged["_bounds_stored"])
    )
    changed = merged[~is_new & ~same]
    fresh = merged[is_new].copy()
    fresh["id"] = allocate_ids(connection, schema.forecasts, len(fresh))
    if len(changed):
        condition, params = id_condition(connection, "id", changed["id"], "changed")
        connection.execute(text(f"DELETE FROM forecasts WHERE {condition}"), params)
    written = pd.concat([fresh, changed])
    written["id"] = written["id"].astype("int64")
    written["ingested_at"] = now
    columns = [
        "id",
        "series_id",
        "model_id",
        "issued_at",
        "target_at",
        "issue_period",
        "target_period",
        "horizon",
        "point",
        "ingested_at",
        "bound_layout",
        "bounds",
    ]
    insert_frame(
        connection,
        schema.forecasts,
        written[columns].astype({"issued_at": "int64", "target_at": "int64"}),
    )
    series = written["series_id"].to_numpy()
    enqueue(connection, series, written["target_period"].to_numpy(), kind=schema.QUEUE_TARGET)
    if not benchmarks:
        enqueue(connection, series, written["issue_period"].to_numpy(), kind=schema.QUEUE_ISSUE)
    return Written(
        accepted=len(fresh), unchanged=int(same.sum()) + checked.duplicates, revised=len(changed)
    )


def write_actuals(
    connection: Connection, checked: Checked, series_ids: pd.Series, batch_id: int, now: int
) -> Written:
    """Insert new actuals, record revisions with their history, count identical ones."""
    rows = checked.good.copy()
    if rows.empty:
        return Written(unchanged=checked.duplicates)
    rows["series_id"] = series_ids.reindex(rows["series_key"]).to_numpy(dtype="int64")
    rows["observed_at"] = rows["observed_at"].astype("int64")
    staged = stage_keys(connection, "actual_keys", rows[["series_id", "period"]])
    stored = read_frame(
        connection,
        f"SELECT a.series_id, a.period, a.value AS value_stored, a.observed_at AS observed_stored, "
        f"a.revision FROM actuals a JOIN {staged} k "
        "ON a.series_id = k.series_id AND a.period = k.period",
    )
    merged = rows.merge(stored, how="left", on=["series_id", "period"])
    is_new = merged["revision"].isna()
    same = (
        ~is_new
        & (merged["value"] == merged["value_stored"])
        & (merged["observed_at"] == merged["observed_stored"])
    )
    revised = merged[~is_new & ~same].copy()
    fresh = merged[is_new].copy()
    fresh["revision"] = 0
    revised["revision"] = revised["revision"].astype("int64") + 1
    if len(revised):
        staged_rev = stage_keys(connection, "revised", revised[["series_id", "period"]])
        connection.execute(
            text(
                "DELETE FROM actuals WHERE (series_id, period) IN "
                f"(SELECT series_id, period FROM {staged_rev})"
            )
        )
    written = pd.concat([fresh, revised])
    written["revision"] = written["revision"].astype("int64")
    written["updated_at"] = now
    insert_frame(
        connection,
        schema.actuals,
        written[["series_id", "period", "observed_at", "value", "revision", "updated_at"]],
    )
    history = written[["series_id", "period", "revision", "observed_at", "value"]].assign(
        recorded_at=now, batch_id=batch_id
    )
    insert_frame(connection, schema.actual_history, history)
    enqueue(
        connection,
        written["series_id"].to_numpy(),
        written["period"].to_numpy(),
        kind=schema.QUEUE_ACTUAL,
    )
    return Written(
        accepted=len(fresh), unchanged=int(same.sum()) + checked.duplicates, revised=len(revised)
    )
