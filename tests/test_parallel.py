"""Side-by-side write transactions (`store.parallel`) and the stages that use them.

PostgreSQL runs two units at once, SQLite one after the other in the calling thread. The
batched stages (benchmarks, matching) must store the same rows whether their batches ran one
at a time in one transaction each, or two at a time: compared here against one single batch
on the same store, rows sorted, every column.
"""

from __future__ import annotations

import threading

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import Engine

from aftercast.benchmarks import make_benchmarks
from aftercast.config import Config
from aftercast.matching import match
from aftercast.scenario import ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate
from aftercast.store.parallel import alongside, each, writers
from tests.conftest import make_config
from tests.test_detect_run_feed import cycle_time, load_through


def test_units_run_two_at_a_time_on_postgres_and_in_turn_on_sqlite(engine: Engine) -> None:
    concurrent = engine.dialect.name == "postgresql"
    meeting = threading.Barrier(2, timeout=10)
    threads: list[int] = []

    def unit(item: int) -> int:
        threads.append(threading.get_ident())
        if concurrent:
            meeting.wait()  # breaks (and fails the test) unless both units run at once
        return item * 10

    assert each(engine, [3, 1, 2, 5], unit) == [30, 10, 20, 50]  # in the items' order
    if concurrent:
        assert len(set(threads)) == 2
    else:
        assert set(threads) == {threading.get_ident()}


def test_the_first_error_is_raised_and_no_later_unit_starts(engine: Engine) -> None:
    started: list[int] = []

    def unit(item: int) -> int:
        started.append(item)
        if item == 1:
            raise ValueError("unit 1 failed")
        return item

    with pytest.raises(ValueError, match="unit 1 failed"):
        each(engine, list(range(8)), unit)
    # At most the units already running beside the failing one had started.
    assert max(started) <= writers(engine)


def test_alongside_runs_beside_the_block_on_postgres_and_before_it_on_sqlite(
    engine: Engine,
) -> None:
    order: list[str] = []
    meeting = threading.Barrier(2, timeout=10)
    concurrent = engine.dialect.name == "postgresql"

    def background() -> str:
        if concurrent:
            meeting.wait()
        order.append("background")
        return "done"

    with alongside(engine, background) as result:
        if concurrent:
            meeting.wait()
        else:
            assert order == ["background"]
        assert result() == "done"

    def failing() -> str:
        raise RuntimeError("window stage failed")

    failed = pytest.raises(RuntimeError, match="window stage failed")
    with failed, alongside(engine, failing) as wait:
        wait()


def _store(url: str, batch_rows: int) -> dict[str, pd.DataFrame]:
    """A small scenario loaded, its benchmarks made and pairs matched in batches of
    `batch_rows` queue rows; the stored forecasts, pairs and interval rows, sorted."""
    spec = ScenarioSpec(n_series=12, days=10, horizons=4, history_days=20, seed=7)
    scenario = generate(spec)
    config: Config = make_config(url)
    engine = make_engine(url)
    migrate(engine)
    load_through(engine, config, scenario, 9)
    now = cycle_time(scenario, 9)
    make_benchmarks(engine, config, now, batch_rows=batch_rows)
    matched = match(engine, now, batch_rows=batch_rows)
    assert matched.pairs_scored > 0
    tables = {}
    with engine.connect() as connection:
        for table, key, dropped in [
            ("forecasts", ["series_id", "model_id", "issued_at", "target_at"], ["id"]),
            ("pairs", ["series_id", "model_id", "issued_at", "target_at"], ["forecast_id"]),
            ("pair_quantiles", ["series_id", "model_id", "issued_at", "target_at", "prob"], []),
        ]:
            sql = f"SELECT * FROM {table}"
            if table == "pair_quantiles":  # keyed by the forecast: name it by its pair
                sql = (
                    "SELECT p.series_id, p.model_id, p.issued_at, p.target_at, q.prob, q.value, "
                    "q.pinball FROM pair_quantiles q JOIN pairs p ON p.forecast_id = q.forecast_id"
                )
            frame = read_frame(connection, sql).drop(columns=dropped)
            frame = frame.drop(columns=[c for c in ("ingested_at", "scored_at") if c in frame])
            tables[table] = frame.sort_values(key).reset_index(drop=True)
    engine.dispose()
    return tables


def test_batches_side_by_side_store_what_one_batch_stores(store_url: str, tmp_path: object) -> None:
    batched = _store(store_url, batch_rows=5)
    single = _store(f"sqlite:///{tmp_path}/single.db", batch_rows=10**9)
    for table, frame in single.items():
        assert len(frame) > 0, table
        pd.testing.assert_frame_equal(
            batched[table][frame.columns], frame, check_dtype=False, check_exact=False, rtol=1e-12
        )
    # Benchmark forecasts were made for every series, not only for one batch's.
    models = batched["forecasts"].groupby("model_id")["series_id"].nunique()
    assert (models.to_numpy(np.int64) == 12).all()
