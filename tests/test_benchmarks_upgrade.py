"""A store upgraded between an ingest and the next cycle still benchmarks what it ingested.

Before the issue periods were queued, the benchmark stage found new forecasts from each
series' latest issue period; forecasts waiting in the queue at the upgrade queued only their
target periods. Expected counts: series x issue times x horizons x methods, by hand. Both stores.
"""

from __future__ import annotations

from dataclasses import replace

from sqlalchemy import Engine, text

from aftercast.config import Config
from aftercast.scenario import ScenarioSpec, generate
from aftercast.store.db import migrate, write
from tests.test_detect_run_feed import cycle_on, day_start, load_through


def test_forecasts_queued_before_the_upgrade_get_their_benchmarks(
    engine: Engine, config: Config
) -> None:
    small = generate(ScenarioSpec(n_series=3, days=6, horizons=4, history_days=21, seed=5))
    one_model = small.forecasts.loc[small.forecasts["model"] == "shop-planner"]
    load_through(engine, config, replace(small, forecasts=one_model.iloc[:0]), 4)
    cycle_on(engine, config, small, 4)  # the actuals are matched: no changed actual waits
    load_through(engine, config, replace(small, forecasts=one_model), 4)
    with write(engine) as connection:  # as the store was: targets queued, no issue periods
        connection.execute(text("DELETE FROM match_queue WHERE kind = 2"))
        connection.execute(
            text("DELETE FROM alembic_version WHERE version_num = '0010_issue_queue'")
        )
    migrate(engine)
    issues = one_model.loc[one_model["issued_at"] < day_start(small, 5)]
    assert issues["issued_at"].nunique() == 5
    assert cycle_on(engine, config, small, 4).benchmarks == 3 * 5 * 4 * 2
