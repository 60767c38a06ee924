"""Baselines: the reference window of each (series, model, horizon bucket), kept in the store.

By default a key's baseline is the first `baseline.days` days of targets after the model's
first forecast for the series (or after the latest reset); with `baseline.start` and
`baseline.end`, those dates for every key. It is computed once, at the first detection stage
after the window has passed (plus `settle_days` for late actuals), and kept: a bucket with fewer
than `min_points` targets waits and takes the latest `days` days once it has them. `freeze`
stores a chosen window as a key's baseline, `reset` discards baselines (logged, with the
statistics thrown away) so new ones collect from the reset on, and `seed_from_backtest` uses a
backtest's pairs. Summaries are computed by the pure `detect.profiles.baseline_summaries`.
"""

from __future__ import annotations

import json
from collections.abc import Sequence

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine

from aftercast.config import Config
from aftercast.detect.profiles import KEY, baseline_summaries, with_buckets
from aftercast.errors import AftercastError
from aftercast.settings.detection import bucket_labels
from aftercast.store.bulk import allocate_ids, insert_frame, read_frame, stage_keys
from aftercast.store.db import write
from aftercast.store.queries import intervals_for
from aftercast.store.schema_detect import baseline_losses, baseline_resets, baselines

DAY = 86_400
SUMMARY_COLUMNS = [
    "series_id",
    "model_id",
    "bucket",
    "source",
    "window_start",
    "window_end",
    "targets",
    "pairs",
    "mae",
    "rmse",
    "me",
    "error_sd",
    "coverage",
    "interval_score",
]
_PAIRS = (
    "SELECT p.forecast_id, p.series_id, p.model_id, p.horizon, p.issued_at, p.target_at, "
    "p.target_period, p.error, p.abs_error, p.sq_error FROM pairs p "
)


def _epoch(value: object) -> int:
    stamp = pd.Timestamp(value)  # type: ignore[arg-type]
    return int((stamp if stamp.tzinfo else stamp.tz_localize("UTC")).timestamp())


def _windows(connection: Connection, config: Config, keys: pd.DataFrame, now: int) -> pd.DataFrame:
    """Per (series, model): the baseline window (begin, end] and whether it has passed."""
    staged = stage_keys(connection, "bl_keys", keys[["series_id", "model_id"]].drop_duplicates())
    found = read_frame(
        connection,
        "SELECT k.series_id, k.model_id, a.first_issued_at, "
        "(SELECT MAX(r.reset_at) FROM baseline_resets r WHERE r.series_id = k.series_id "
        "AND r.model_id = k.model_id) AS reset_at "
        f"FROM {staged} k JOIN forecast_activity a "
        "ON a.series_id = k.series_id AND a.model_id = k.model_id",
    )
    settings = config.baseline
    span = int(settings.days * DAY)
    settle = int(settings.settle_days * DAY)
    reset = pd.to_numeric(found["reset_at"]).fillna(-np.inf)
    start = np.maximum(found["first_issued_at"].to_numpy(np.float64), reset.to_numpy())
    found["source"] = "first-days"
    if settings.start is not None and settings.end is not None:
        dated = reset.isna() | (reset.to_numpy() == -np.inf)
        fixed = (_epoch(settings.start), _epoch(settings.end))
        found.loc[dated, "source"] = "dates"
        start = np.where(dated, fixed[0], start)
        span_by_key = np.where(dated, fixed[1] - fixed[0], span)
    else:
        span_by_key = np.full(len(found), span)
    found["window_start"] = start.astype(np.int64)
    found["window_end"] = (start + span_by_key).astype(np.int64)
    # For buckets that had too few targets then: the latest span that has settled by now.
    late_end = np.maximum(start + span_by_key, now - settle)
    found["late_start"] = np.maximum(start, late_end - span_by_key).astype(np.int64)
    found["late_end"] = late_end.astype(np.int64)
    found["ready"] = start + span_by_key + settle <= now
    return found


def _window_pairs(connection: Connection, windows: pd.DataFrame) -> pd.DataFrame:
    staged = stage_keys(
        connection, "bl_windows", windows[["series_id", "model_id", "window_start", "window_end"]]
    )
    return read_frame(
        connection,
        _PAIRS + f"JOIN {staged} w ON w.series_id = p.series_id AND w.model_id = p.model_id "
        "AND p.target_at > w.window_start AND p.target_at <= w.window_end",
    )


def summarise(
    config: Config, pairs: pd.DataFrame, intervals: pd.DataFrame, wanted: pd.DataFrame | None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Baseline summaries and losses of `pairs` (keys in `wanted` only, when given).

    Buckets with fewer than `baseline.min_points` targets get none.
    """
    bucketed = with_buckets(pairs, bucket_labels(config.horizon_buckets))
    if wanted is not None:
        bucketed = bucketed.merge(wanted[KEY].drop_duplicates(), on=KEY)
    if bucketed.empty:
        return pd.DataFrame(columns=SUMMARY_COLUMNS), pd.DataFrame()
    summary, losses = baseline_summaries(bucketed, intervals)
    summary = summary.loc[summary["targets"] >= config.baseline.min_points]
    return summary, losses.merge(summary[KEY], on=KEY)


def _window_summaries(
    connection: Connection, config: Config, windows: pd.DataFrame, wanted: pd.DataFrame | None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    pairs = _window_pairs(connection, windows)
    intervals = intervals_for(connection, pairs["forecast_id"]) if len(pairs) else pd.DataFrame()
    summary, losses = summarise(config, pairs, intervals, wanted)
    columns = ["series_id", "model_id", "source", "window_start", "window_end"]
    summary = summary.merge(windows[columns], on=["series_id", "model_id"])
    return summary[SUMMARY_COLUMNS], losses


def pending_baselines(
    connection: Connection, config: Config, wanted: pd.DataFrame, now: int
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Baselines that are ready for the `wanted` keys (series_id, model_id, bucket); not stored."""
    if wanted.empty:
        return pd.DataFrame(columns=SUMMARY_COLUMNS), pd.DataFrame()
    windows = _windows(connection, config, wanted, now)
    windows = windows.loc[windows["ready"]]
    if windows.empty:
        return pd.DataFrame(columns=SUMMARY_COLUMNS), pd.DataFrame()
    summary, losses = _window_summaries(connection, config, windows, wanted)
    short = wanted[KEY].merge(summary[KEY], on=KEY, how="left", indicator=True)
    short = short.loc[short["_merge"] == "left_only", KEY]
    later = windows.loc[windows["late_end"] > windows["window_end"]].merge(
        short[["series_id", "model_id"]].drop_duplicates(), on=["series_id", "model_id"]
    )
    if later.empty:
        return summary, losses
    later = later.assign(window_start=later["late_start"], window_end=later["late_end"])
    more, more_losses = _window_summaries(connection, config, later, short)
    return pd.concat([summary, more], ignore_index=True), pd.concat([losses, more_losses])


def store_baselines(
    connection: Connection, summary: pd.DataFrame, losses: pd.DataFrame, now: int
) -> int:
    """Replace the baselines of the summarised keys with these (one bulk insert each table)."""
    if summary.empty:
        return 0
    _delete(connection, summary[KEY])
    rows = summary[SUMMARY_COLUMNS].assign(created_at=now)
    rows["id"] = allocate_ids(connection, baselines, len(rows))
    rows = rows.astype({"targets": "int64", "pairs": "int64"})
    insert_frame(connection, baselines, rows)
    child = losses.merge(rows[[*KEY, "id"]], on=KEY).rename(columns={"id": "baseline_id"})
    insert_frame(
        connection, baseline_losses, child[["baseline_id", "target_period", "abs_error", "error"]]
    )
    return len(rows)


def _delete(connection: Connection, keys: pd.DataFrame) -> None:
    """Delete the stored baselines (and losses) of these (series, model[, bucket]) keys."""
    ids = _stored(connection, keys)["id"].to_numpy(np.int64)
    if len(ids):
        id_table = stage_keys(connection, "bl_ids", pd.DataFrame({"id": ids}))
        connection.exec_driver_sql(
            f"DELETE FROM baseline_losses WHERE baseline_id IN (SELECT id FROM {id_table})"
        )
        connection.exec_driver_sql(f"DELETE FROM baselines WHERE id IN (SELECT id FROM {id_table})")


def _stored(connection: Connection, keys: pd.DataFrame) -> pd.DataFrame:
    """(id, series_id, model_id, bucket) of stored baselines for these keys.

    Buckets are text, so the staged join is on (series, model) and the bucket is matched here.
    """
    pairs = keys[["series_id", "model_id"]].drop_duplicates()
    staged = stage_keys(connection, "bl_pairs", pairs)
    found = read_frame(
        connection,
        f"SELECT b.id, b.series_id, b.model_id, b.bucket FROM baselines b JOIN {staged} k "
        "ON k.series_id = b.series_id AND k.model_id = b.model_id",
    )
    if "bucket" in keys.columns:
        found = found.merge(keys[KEY].drop_duplicates(), on=KEY)
    return found


def load_baselines(connection: Connection, keys: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Stored baselines (with losses keyed like them) of the (series, model) pairs in `keys`."""
    staged = stage_keys(connection, "bl_load", keys[["series_id", "model_id"]].drop_duplicates())
    found = read_frame(
        connection,
        f"SELECT b.* FROM baselines b JOIN {staged} k "
        "ON k.series_id = b.series_id AND k.model_id = b.model_id",
    )
    if found.empty:
        return found, pd.DataFrame(columns=[*KEY, "target_period", "abs_error", "error"])
    ids = stage_keys(connection, "bl_load_ids", found[["id"]])
    losses = read_frame(
        connection,
        f"SELECT l.* FROM baseline_losses l JOIN {ids} k ON k.id = l.baseline_id",
    )
    losses = losses.merge(
        found[["id", *KEY]].rename(columns={"id": "baseline_id"}), on="baseline_id"
    )
    return found, losses


def refresh_baselines(engine: Engine, config: Config, wanted: pd.DataFrame, now: int) -> int:
    """Compute and store the baselines that have become ready for keys that have none."""
    if wanted.empty:
        return 0
    with write(engine) as connection:
        have = _stored(connection, wanted)[KEY]
        missing = wanted[KEY].drop_duplicates().merge(have, on=KEY, how="left", indicator=True)
        missing = missing.loc[missing["_merge"] == "left_only", KEY]
        summary, losses = pending_baselines(connection, config, missing, now)
        return store_baselines(connection, summary, losses, now)


def freeze_baselines(
    engine: Engine, config: Config, keys: pd.DataFrame, start: int, end: int, now: int
) -> int:
    """Store the targets in (start, end] as the baselines of `keys` (series_id, model_id)."""
    windows = keys[["series_id", "model_id"]].drop_duplicates()
    windows = windows.assign(source="manual", window_start=start, window_end=end)
    with write(engine) as connection:
        summary, losses = _window_summaries(connection, config, windows, None)
        return store_baselines(connection, summary, losses, now)


def seed_from_backtest(
    engine: Engine,
    config: Config,
    run_id: int,
    now: int,
    model_id: int | None = None,
    method_model_id: int | None = None,
) -> int:
    """Baselines from a backtest run's pairs: for each benchmark method backtested, or, with
    `model_id`, for that model from the pairs of `method_model_id` (the same series)."""
    with write(engine) as connection:
        pairs = read_frame(
            connection,
            "SELECT id AS forecast_id, series_id, model_id, horizon, issue_period AS issued_at, "
            "target_at, target_period, error, abs_error FROM backtest_pairs WHERE run_id = :r",
            {"r": run_id},
        )
        if pairs.empty:
            raise AftercastError(f"--run {run_id}: no backtest run with that id has pairs")
        if model_id is not None:
            pairs = pairs.loc[pairs["model_id"] == method_model_id].assign(model_id=model_id)
        staged = stage_keys(
            connection, "bl_bt", pairs[["forecast_id"]].rename(columns={"forecast_id": "id"})
        )
        intervals = read_frame(
            connection,
            "SELECT i.pair_id AS forecast_id, i.level, i.hit, i.interval_score FROM "
            f"backtest_intervals i JOIN {staged} k ON k.id = i.pair_id",
        )
        summary, losses = summarise(
            config, pairs.assign(sq_error=pairs["error"] ** 2), intervals, None
        )
        first = pairs.groupby(["series_id", "model_id"])["target_at"].agg(["min", "max"])
        summary = summary.join(first, on=["series_id", "model_id"])
        summary = summary.assign(
            source=f"backtest:{run_id}", window_start=summary["min"] - 1, window_end=summary["max"]
        )
        return store_baselines(connection, summary[SUMMARY_COLUMNS], losses, now)


def resolve_keys(
    connection: Connection, series: Sequence[str], models: Sequence[str]
) -> pd.DataFrame:
    """(series_id, model_id, series key, model name) of active keys matching the selection.

    Empty `series` or `models` means all; a name that matches nothing is an error.
    """
    known = read_frame(
        connection,
        "SELECT a.series_id, a.model_id, s.key AS series, m.name AS model "
        "FROM forecast_activity a JOIN series s ON s.id = a.series_id "
        "JOIN models m ON m.id = a.model_id",
    )
    for flag, wanted, column in (("--series", series, "series"), ("--model", models, "model")):
        unknown = sorted(set(wanted) - set(known[column]))
        if unknown:
            raise AftercastError(f"{flag} {unknown[0]!r}: no forecasts stored for it")
        if wanted:
            known = known.loc[known[column].isin(list(wanted))]
    return known.reset_index(drop=True)


def reset_baselines(
    engine: Engine, keys: pd.DataFrame, reason: str, now: int, actor: str = "cli"
) -> int:
    """Discard the baselines of `keys` (series_id, model_id), logging what was discarded."""
    with write(engine) as connection:
        found, _ = load_baselines(connection, keys)
        previous = (
            found.groupby(["series_id", "model_id"])
            .apply(lambda g: g.to_json(orient="records"), include_groups=False)
            .rename("previous")
            if len(found)
            else pd.Series(dtype=object, name="previous")
        )
        log = (
            keys[["series_id", "model_id"]]
            .drop_duplicates()
            .merge(previous.reset_index(), on=["series_id", "model_id"], how="left")
        )
        log = log.assign(
            previous=log["previous"].fillna("[]"), reset_at=now, reason=reason, actor=actor
        )
        log["id"] = allocate_ids(connection, baseline_resets, len(log))
        insert_frame(connection, baseline_resets, log)
        _delete(connection, keys)
        return len(found)


def baseline_rows(connection: Connection, keys: pd.DataFrame) -> list[dict[str, object]]:
    """Stored baselines of `keys` as plain records (for `baselines show`)."""
    found, _ = load_baselines(connection, keys)
    if found.empty:
        return []
    named = found.merge(
        keys[["series_id", "model_id", "series", "model"]], on=["series_id", "model_id"]
    )
    named = named.sort_values(["series", "model", "window_start"])
    records = json.loads(named.drop(columns=["id"]).to_json(orient="records"))
    for record in records:
        record["coverage"] = json.loads(record["coverage"])
        record["interval_score"] = json.loads(record["interval_score"])
    return records
