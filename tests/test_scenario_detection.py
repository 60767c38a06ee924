"""The issue's scenario: 200 healthy series and 20 degraded after day 90, cycled day by day.

Half the degraded series get a coverage collapse (their 80% intervals cover 55%), half a level
shift of three noise standard deviations: both defined by the invented scenario generator.
Every day that day's actuals and forecasts are ingested and the detection cycle runs (its
stages that detection depends on: benchmarks, matching, detection). Acceptance, from the issue:
at least 90% of the degraded series flagged within 14 days of day 90, at most 2% of the
healthy ones ever flagged. Days count from the first actual; forecasts start on day 50, the
baseline is their first 28 days, and cycles run daily from day 79 (bulk-loaded before that).
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import Engine

from aftercast.benchmarks import make_benchmarks
from aftercast.config import Config
from aftercast.detect.run import detect
from aftercast.matching import match
from aftercast.scenario import Scenario, ScenarioSpec, generate, series_ids
from aftercast.store import schema
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate, write
from tests.conftest import make_config
from tests.test_detect_run_feed import cycle_time, feed_day, load_through

HISTORY = 50  # days of actuals before the first forecast
ONSET = 90 - HISTORY  # day 90, in the generator's days (counted from the first forecast)
LAST = ONSET + 13  # the 14th day from the onset
BULK = 28 + 1  # baseline days plus one: loaded at once, then one cycle


def _scenario() -> Scenario:
    ids = series_ids(220)
    chosen = np.random.default_rng(90).choice(220, 20, replace=False)
    kinds = ["coverage_collapse"] * 10 + ["level_shift"] * 10
    degraded = {ids[i]: (kind, ONSET) for i, kind in zip(chosen, kinds, strict=True)}
    spec = ScenarioSpec(
        n_series=220, days=LAST + 1, horizons=14, history_days=HISTORY, degraded=degraded, seed=90
    )
    return generate(spec)


def _cycle(engine: Engine, config: Config, scenario: Scenario, day: int) -> None:
    now = cycle_time(scenario, day)
    with write(engine) as connection:
        inserted = connection.execute(
            schema.cycles.insert().values(now=now, started_at=int(time.time()), stats="{}")
        ).inserted_primary_key
        assert inserted is not None
        cycle_id = inserted[0]
    make_benchmarks(engine, config, now)
    match(engine, now)
    detect(engine, config, now, int(cycle_id))


@pytest.mark.slow
def test_degraded_series_are_caught_within_two_weeks_and_healthy_ones_are_left_alone(
    tmp_path: object,
) -> None:
    scenario = _scenario()
    url = f"sqlite:///{tmp_path}/scenario.db"
    config = make_config(url, window={"days": 14})
    engine = make_engine(url)
    migrate(engine)
    load_through(engine, config, scenario, BULK - 1)
    _cycle(engine, config, scenario, BULK - 1)
    for day in range(BULK, LAST + 1):
        feed_day(engine, config, scenario, day)
        _cycle(engine, config, scenario, day)
    with engine.connect() as connection:
        flagged = read_frame(
            connection,
            "SELECT s.key, MIN(f.now) AS first FROM findings f JOIN series s "
            "ON s.id = f.series_id WHERE f.flagged = 1 GROUP BY s.key",
        )
    engine.dispose()
    first = flagged.set_index("key")["first"]
    degraded = pd.Series({k: kind for k, (kind, _) in scenario.spec.degraded.items()})
    caught = first.reindex(degraded.index) <= cycle_time(scenario, LAST)
    early = first.reindex(degraded.index) < cycle_time(scenario, ONSET)
    healthy = first.index.difference(degraded.index)
    assert caught.sum() >= 18, caught.groupby(degraded).sum().to_dict()  # >= 90% of 20
    assert not early.any()  # nothing flagged before the degradation began
    assert len(healthy) <= 4, list(healthy)  # <= 2% of 200
