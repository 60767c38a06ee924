"""Helpers (no tests here): feed the invented bakery scenario into a store day by day.

Day d's actuals (observed at midnight) and the forecasts issued at 06:00 that day are ingested
as in-memory chunks, and a cycle runs at 23:00, the way the demo replays its daily feed.
"""

from __future__ import annotations

import pandas as pd
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.cycle import CycleReport, run_cycle
from aftercast.ingest import ingest_chunks
from aftercast.ingest.files import Chunk
from aftercast.scenario import Scenario


def day_start(scenario: Scenario, day: int) -> pd.Timestamp:
    return pd.Timestamp(scenario.spec.start, tz="UTC") + pd.Timedelta(days=day)


def cycle_time(scenario: Scenario, day: int) -> int:
    return int((day_start(scenario, day) + pd.Timedelta(hours=23)).timestamp())


def _ingest(engine: Engine, config: Config, kind: str, frame: pd.DataFrame) -> None:
    if len(frame):
        ingest_chunks(engine, config, kind, f"scenario {kind}", iter([Chunk(frame, 1)]))


def load_through(engine: Engine, config: Config, scenario: Scenario, day: int) -> None:
    """Series, every actual observed up to `day` and every forecast issued up to `day`."""
    _ingest(engine, config, "series", scenario.series)
    actuals, forecasts = scenario.actuals, scenario.forecasts
    end = day_start(scenario, day + 1)
    _ingest(engine, config, "actuals", actuals.loc[actuals["observed_at"] < end])
    _ingest(engine, config, "forecasts", forecasts.loc[forecasts["issued_at"] < end])


def feed_day(engine: Engine, config: Config, scenario: Scenario, day: int) -> None:
    """That day's actuals and forecasts."""
    start, end = day_start(scenario, day), day_start(scenario, day + 1)
    actuals, forecasts = scenario.actuals, scenario.forecasts
    observed = actuals["observed_at"]
    _ingest(engine, config, "actuals", actuals.loc[(observed >= start) & (observed < end)])
    issued = forecasts["issued_at"]
    _ingest(engine, config, "forecasts", forecasts.loc[(issued >= start) & (issued < end)])


def cycle_on(engine: Engine, config: Config, scenario: Scenario, day: int) -> CycleReport:
    return run_cycle(engine, config, cycle_time(scenario, day))
