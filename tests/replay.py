"""The invented daily feed replayed step by step, and stores compared after it.

The replica and crash tests replay the bakery scenario as a feed would deliver it: series, a
history of actuals, then per day that day's forecasts, its actuals and a cycle. `Step` is one
command of that replay; `run_step` runs it in this process.

Two runs of the same inputs must end with the same data even when one of them crashed, was
retried or was split between replicas. Surrogate keys and wall-clock stamps legitimately differ
(PostgreSQL sequences do not roll back; a retried cycle gets a new cycle id; notification ids are
random), so each table is read with its integer references replaced by natural keys (series key,
model name, the forecast's (series, model, issued_at, target_at), an alert's fingerprint, a
notification's channel, route, kind and cycle clock), volatile columns dropped, and rows
sorted. Tables a given version of the store lacks are skipped.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
from sqlalchemy import Engine, inspect

from aftercast.config import Config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_path
from aftercast.periods import parse_instant
from aftercast.scenario import ScenarioSpec, generate, write
from aftercast.store.bulk import read_frame
from aftercast.store.schema import INITIAL_TABLES

# Small enough for many trials, long enough that seasonal scales, windows and (for degraded
# series) detections all have data: 10 days of history, then 6 days of forecasts and actuals.
SPEC = ScenarioSpec(
    n_series=12,
    days=6,
    horizons=3,
    models=("shop-planner",),
    history_days=10,
    degraded={"shop-001/rye": ("coverage_collapse", 2), "shop-002/rye": ("stall", 2)},
    seed=11,
)
CYCLE_HOUR = "T12:00:00Z"  # after the 06:00 forecasts and the midnight actuals of the day


@dataclass(frozen=True)
class Step:
    """One command of the replay: ingest a file of some kind, or run a cycle at `now`."""

    kind: str  # "series" | "forecasts" | "actuals" | "cycle"
    path: Path | None = None
    now: int | None = None

    def __str__(self) -> str:
        return f"cycle at {self.now}" if self.kind == "cycle" else f"ingest {self.kind} {self.path}"


def daily_steps(folder: Path, spec: ScenarioSpec = SPEC) -> list[Step]:
    """Write the scenario's files under `folder`; the steps that feed them day by day."""
    files = write(generate(spec), folder, "csv", split_by_day=True)
    by_day = {p.stem: p for p in files.actuals}
    forecast_days = {p.stem: p for p in files.forecasts}
    steps = [Step("series", files.series)]
    steps += [Step("actuals", by_day[d]) for d in sorted(by_day) if d < min(forecast_days)]
    for day in sorted(forecast_days):
        steps.append(Step("forecasts", forecast_days[day]))
        if day in by_day:
            steps.append(Step("actuals", by_day[day]))
        steps.append(Step("cycle", now=parse_instant(day + CYCLE_HOUR)))
    return steps


def run_step(engine: Engine, config: Config, step: Step) -> None:
    if step.kind == "cycle":
        run_cycle(engine, config, step.now)
    else:
        assert step.path is not None
        ingest_path(engine, config, step.kind, step.path)


# Logs of what ran are not compared; series and models are, through the references to them.
_LOGS = {"series", "models", "quarantine", "ingest_log", "cycles"}
# Tables of later stages, compared when the store has them.
_DERIVED: tuple[str, ...] = (
    "window_marks",
    "window_point_sums",
    "window_level_sums",
    "window_quantile_sums",
)
_DERIVED += ("forecast_activity", "alerts", "alert_transitions")
_DERIVED += ("notification_outbox", "outbox_alerts")
COMPARED = tuple(t for t in INITIAL_TABLES if t not in _LOGS) + _DERIVED
# Surrogate ids, cycle ids and wall-clock times: not part of what a run computed.
VOLATILE = {
    "id",
    "cycle_id",
    "ingested_at",
    "updated_at",
    "recorded_at",
    "refreshed_at",
    "created_at",
    "started_at",
    "finished_at",
    "batch_id",
    "claimed_by",
    "claimed_until",
    "last_attempt_at",
    "delivered_at",
    # Delivery progress: a crashed send is retried, so its attempts and schedule differ.
    "attempts",
    "due_at",
    "detail",
    "notification_id",  # a random id per message; compared through what the message is
}


def _names(engine: Engine) -> dict[str, pd.Series]:
    """Integer reference -> natural key, for every kind of reference the tables use."""
    with engine.connect() as connection:
        present = set(inspect(connection).get_table_names())
        series = read_frame(connection, "SELECT id, key FROM series")
        models = read_frame(connection, "SELECT id, name FROM models")
        forecasts = read_frame(
            connection, "SELECT id, series_id, model_id, issued_at, target_at FROM forecasts"
        )
        alerts = (
            read_frame(connection, "SELECT id, fingerprint FROM alerts")
            if "alerts" in present
            else pd.DataFrame({"id": [], "fingerprint": []})
        )
        outbox = (
            read_frame(
                connection,
                "SELECT o.id, o.channel || '|' || o.route || '|' || o.kind || '|' || "
                "CAST(c.now AS VARCHAR(20)) AS label FROM notification_outbox o "
                "LEFT JOIN cycles c ON c.id = o.cycle_id",
            )
            if "notification_outbox" in present
            else pd.DataFrame({"id": [], "label": []})
        )
    series_key = pd.Series(series["key"].to_numpy(), index=series["id"].to_numpy())
    model_name = pd.Series(models["name"].to_numpy(), index=models["id"].to_numpy())
    forecast_key = (
        forecasts["series_id"].map(series_key).astype(str)
        + "|"
        + forecasts["model_id"].map(model_name).astype(str)
        + "|"
        + forecasts["issued_at"].astype(str)
        + "|"
        + forecasts["target_at"].astype(str)
    )
    return {
        "series_id": series_key,
        "model_id": model_name,
        "forecast_id": pd.Series(forecast_key.to_numpy(), index=forecasts["id"].to_numpy()),
        "alert_id": pd.Series(alerts["fingerprint"].to_numpy(), index=alerts["id"].to_numpy()),
        "outbox_id": pd.Series(outbox["label"].to_numpy(), index=outbox["id"].to_numpy()),
    }


def _canonical_json(text: object) -> object:
    """A JSON payload with its volatile fields removed, re-serialised with sorted keys."""
    if not isinstance(text, str):
        return text
    try:
        value = json.loads(text)
    except ValueError:
        return text
    if isinstance(value, dict):
        value = {k: v for k, v in value.items() if k not in VOLATILE}
    return json.dumps(value, sort_keys=True)


def table_snapshot(engine: Engine, table: str, names: dict[str, pd.Series]) -> pd.DataFrame:
    with engine.connect() as connection:
        frame = read_frame(connection, f"SELECT * FROM {table}")
    for column, mapping in names.items():
        if column in frame.columns:
            frame[column] = frame[column].map(mapping)
    frame = frame.drop(columns=[c for c in frame.columns if c in VOLATILE])
    for column in ("payload", "evidence"):
        if column in frame.columns:
            frame[column] = frame[column].map(_canonical_json)
    for column in ("bounds",):  # packed floats: compared as their bytes, shown as hex
        if column in frame.columns:
            frame[column] = frame[column].map(
                lambda b: bytes(b).hex() if isinstance(b, bytes | memoryview) else None
            )
    order = sorted(frame.columns)
    frame = frame[order]
    # Sort on a rounded copy, so float noise in the last digits cannot reorder rows.
    keys = pd.DataFrame(
        {
            c: frame[c].round(6) if frame[c].dtype.kind == "f" else frame[c].astype(str)
            for c in order
        }
    )
    ranked = keys.sort_values(order, kind="mergesort").index
    return frame.loc[ranked].reset_index(drop=True)


def store_snapshot(engine: Engine) -> dict[str, pd.DataFrame]:
    """Every compared table the store has, canonical: natural keys, no volatile columns, sorted."""
    with engine.connect() as connection:
        present = set(inspect(connection).get_table_names())
    names = _names(engine)
    return {t: table_snapshot(engine, t, names) for t in COMPARED if t in present}


def assert_same_store(got: dict[str, pd.DataFrame], want: dict[str, pd.DataFrame]) -> None:
    """The two snapshots hold the same rows; floats may differ in the last few bits only."""
    assert sorted(got) == sorted(want)
    for table in want:
        assert len(got[table]) == len(want[table]), (
            f"{table}: {len(got[table])} rows, expected {len(want[table])}"
        )
        pd.testing.assert_frame_equal(
            got[table], want[table], check_dtype=False, rtol=1e-9, obj=table
        )
