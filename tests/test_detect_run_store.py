"""The detection stage end to end on a store: findings, `alerts findings --json`, freshness checks.

The invented bakery scenario is fed day by day; a level shift of three noise standard
deviations (the scenario's own definition) must come out as flagged findings with their
evidence, healthy series must not, and `alerts --json` must carry the CONTRACT fields with
`opened_at` at the first cycle of the current run of flags (checked against the stored rows).
Stalled forecasts and missing actuals are facts counted in periods (common practice).
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import Engine

from aftercast.cli import main
from aftercast.config import Config
from aftercast.detect.run import DetectStats, combine, page_checks
from aftercast.periods import to_iso
from aftercast.scenario import Scenario, ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from tests.conftest import make_config
from tests.test_detect_run_feed import cycle_on, cycle_time, feed_day, load_through

SHIFTED = "shop-001/white"
SECTIONS = {"window": {"days": 14}, "baseline": {"days": 14}}


@pytest.fixture
def scenario() -> Scenario:
    spec = ScenarioSpec(
        n_series=24, days=40, horizons=3, history_days=21, seed=5,
        models=("shop-planner",), degraded={SHIFTED: ("level_shift", 30)},
    )  # fmt: skip
    return generate(spec)


@pytest.fixture
def detecting(store_url: str) -> Config:
    return make_config(store_url, **SECTIONS)


def _run(engine: Engine, config: Config, scenario: Scenario, first: int, last: int) -> None:
    load_through(engine, config, scenario, first - 1)
    for day in range(first, last + 1):
        feed_day(engine, config, scenario, day)
        cycle_on(engine, config, scenario, day)


def _flags(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT f.cycle_id, f.now, f.detection, s.key, f.bucket, f.flagged, f.evidence "
            "FROM findings f JOIN series s ON s.id = f.series_id",
        )


def test_a_level_shift_is_flagged_with_evidence_and_listed_by_alerts_json(
    engine: Engine,
    detecting: Config,
    scenario: Scenario,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """Healthy series are never flagged; `alerts findings --json` rows open where runs start."""
    _run(engine, detecting, scenario, 16, 39)
    found = _flags(engine)
    flagged = found.loc[found["flagged"] == 1]
    assert set(flagged["key"]) == {SHIFTED}
    assert {"coverage_low", "bias", "accuracy_vs_baseline"} <= set(flagged["detection"])
    first = pd.to_datetime(flagged["now"].min(), unit="s", utc=True)
    assert first >= pd.Timestamp(scenario.spec.start, tz="UTC") + pd.Timedelta(days=30)
    evidence = json.loads(flagged.loc[flagged["detection"] == "bias", "evidence"].iloc[-1])
    assert evidence["direction"] == "under-forecasting"  # actuals jumped above the forecasts
    assert {"statistic", "p_value", "window", "suggested_fix"} <= set(evidence)
    with engine.connect() as connection:
        summary = read_frame(
            connection, "SELECT cycle_id, COUNT(*) AS n FROM detections GROUP BY 1"
        )
    assert (summary["n"] == 7).all()  # one row per detection and cycle
    _check_alerts_json(engine, detecting, tmp_path, capsys)


def _check_alerts_json(
    engine: Engine, detecting: Config, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "aftercast.yaml"
    path.write_text(json.dumps({"store": {"url": detecting.store.url}, **SECTIONS}))
    capsys.readouterr()
    assert main(["--config", str(path), "alerts", "findings", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows and {r["series_id"] for r in rows} == {SHIFTED}
    fields = {"series_id", "model", "horizon", "rule", "state", "active", "severity",
              "opened_at", "evidence"}  # fmt: skip
    assert all(fields <= set(r) for r in rows)
    assert all(r["state"] == "raised" and r["active"] is True for r in rows)
    found = _flags(engine)
    cycles = sorted(found["cycle_id"].unique())
    for row in rows:
        mine = found.loc[(found["detection"] == row["rule"]) & (found["bucket"] == row["horizon"])
                         & (found["flagged"] == 1)]  # fmt: skip
        run = sorted(mine["cycle_id"])
        start = run[-1]
        # Walk back over consecutive detection cycles while the key stayed flagged.
        while cycles.index(start) > 0 and cycles[cycles.index(start) - 1] in run:
            start = cycles[cycles.index(start) - 1]
        assert row["opened_at"] == to_iso(int(mine.loc[mine["cycle_id"] == start, "now"].iloc[0]))


def test_stalled_forecasts_and_overdue_actuals_are_flagged(
    engine: Engine, config: Config, scenario: Scenario
) -> None:
    quiet = "shop-002/rye"
    spec = replace(scenario.spec, degraded={"shop-003/rye": ("stall", 20)})
    stalled = generate(spec)
    # Actuals of `quiet` stop arriving after day 20.
    actuals = stalled.actuals
    cut = pd.Timestamp(spec.start, tz="UTC") + pd.Timedelta(days=20)
    stalled = replace(stalled, actuals=actuals.loc[(actuals["series_id"] != quiet)
                                                   | (actuals["observed_at"] <= cut)])  # fmt: skip
    load_through(engine, config, stalled, 17)
    for day in range(18, 25):
        feed_day(engine, config, stalled, day)
        cycle_on(engine, config, stalled, day)
    found = _flags(engine)
    last = found.loc[(found["cycle_id"] == found["cycle_id"].max()) & (found["flagged"] == 1)]
    assert set(last.loc[last["detection"] == "forecasts_stalled", "key"]) == {"shop-003/rye"}
    assert set(last.loc[last["detection"] == "actuals_overdue", "key"]) == {quiet}
    overdue = json.loads(last.loc[last["detection"] == "actuals_overdue", "evidence"].iloc[0])
    # Day 24: targets from day 21 on are missing; overdue once 2 periods have passed.
    assert overdue["periods_late"] == 3 and overdue["latest_actual_at"].startswith("2026-06-21")


def test_detection_by_pages_of_series_equals_one_page_of_the_fleet(
    engine: Engine, detecting: Config, scenario: Scenario
) -> None:
    """The stage reads and tests a page of series at a time; paging must not change a
    finding, its p-value or the fleet-wide adjustment (the tests are per series and model)."""
    _run(engine, detecting, scenario, 16, 39)
    now = cycle_time(scenario, 39)
    with engine.connect() as connection:
        ids = read_frame(connection, "SELECT id FROM series ORDER BY id")["id"].to_numpy()
    whole = page_checks(engine, detecting, now, ids, DetectStats())
    paged = [
        part
        for start in range(0, len(ids), 5)
        for part in page_checks(engine, detecting, now, ids[start : start + 5], DetectStats())
    ]
    one, _ = combine(detecting, now, whole, None)
    many, _ = combine(detecting, now, paged, None)
    assert one["flagged"].sum() > 0  # the shifted series is in there
    order = ["detection", "series_id", "model_id", "bucket", "level"]
    pd.testing.assert_frame_equal(
        many.sort_values(order).reset_index(drop=True),
        one.sort_values(order).reset_index(drop=True),
    )


def _cycled_store(
    store_url: str, scenario: Scenario, window: dict[str, int]
) -> tuple[Engine, Config, int]:
    """A store fed 30 days of the scenario and cycled, detecting over `window`."""
    from aftercast.store.db import make_engine, migrate

    config = make_config(store_url, window=window, baseline={"days": 14})
    engine = make_engine(store_url)
    migrate(engine)
    load_through(engine, config, scenario, 30)
    cycle_on(engine, config, scenario, 30)
    return engine, config, cycle_time(scenario, 30)


def test_points_window_reads_the_latest_periods_and_their_intervals(
    store_url: str, scenario: Scenario
) -> None:
    """A `points` detection window: each (series, model) holds exactly its N latest target
    periods at or before the clock, and every interval row read belongs to one of those pairs
    (checked against a plain pandas selection of the stored pairs)."""
    from aftercast.detect.gather import window_data

    engine, config, now = _cycled_store(store_url, scenario, {"points": 5})
    with engine.connect() as connection:
        data = window_data(connection, config, now)
        stored = read_frame(
            connection,
            "SELECT p.forecast_id, p.series_id, p.model_id, p.target_period, p.target_at "
            "FROM pairs p JOIN models m ON m.id = p.model_id "
            "WHERE m.name NOT LIKE 'benchmark:%'",
        )
        levels = read_frame(connection, "SELECT COUNT(DISTINCT level) AS n FROM pair_intervals")
    engine.dispose()
    stored = stored.loc[stored["target_at"] <= now]
    periods = stored[["series_id", "model_id", "target_period"]].drop_duplicates()
    latest = periods.groupby(["series_id", "model_id"])["target_period"].nlargest(5)
    expected = set(zip(latest.index.get_level_values(0), latest.to_numpy(), strict=True))
    got = set(zip(data.pairs["series_id"], data.pairs["target_period"], strict=True))
    assert got == expected and len(expected) == 24 * 5
    assert set(data.hits["forecast_id"]) == set(data.pairs["forecast_id"])
    assert len(data.hits) == len(data.pairs) * int(levels["n"][0]) > 0


@pytest.mark.parametrize("window", [{"days": 14}, {"points": 5}])
def test_levels_read_as_columns_give_the_rows_of_a_read_per_level(
    store_url: str, scenario: Scenario, window: dict[str, int], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Detection reads each pair's interval levels as columns of its row; split back into a
    row per (pair, level) they must hold the same rows and values as the row-per-level read
    (the path taken beyond `MAX_JOINED_LEVELS`), and every stored interval row of the
    window's pairs."""
    from aftercast.detect import gather

    engine, config, now = _cycled_store(store_url, scenario, window)
    with engine.connect() as connection:
        wide = gather.window_data(connection, config, now)
        monkeypatch.setattr(gather, "MAX_JOINED_LEVELS", 0)
        long = gather.window_data(connection, config, now)
        stored = read_frame(connection, "SELECT forecast_id, level, hit FROM pair_intervals")
    engine.dispose()
    assert len(wide.hits) > len(wide.pairs) > 0 and len(wide.benchmark_hits) > 0
    for got, expected in ((wide.hits, long.hits), (wide.benchmark_hits, long.benchmark_hits)):
        order = ["forecast_id", "level"]
        pd.testing.assert_frame_equal(
            got.sort_values(order).reset_index(drop=True),
            expected[got.columns].sort_values(order).reset_index(drop=True),
        )
    pd.testing.assert_frame_equal(wide.pairs, long.pairs)
    mine = stored.loc[stored["forecast_id"].isin(wide.pairs["forecast_id"])]
    assert sorted(map(tuple, mine.values.tolist())) == sorted(
        map(tuple, wide.hits[["forecast_id", "level", "hit"]].values.tolist())
    )


def test_interval_levels_list_every_scored_level_and_the_migration_fills_them(
    store_url: str, scenario: Scenario
) -> None:
    """Matching lists each level it scores in `interval_levels`; revision
    `0008_interval_levels` fills the list from a store's existing pairs."""
    from alembic import command
    from sqlalchemy import text

    from aftercast.store.db import _alembic_config, make_engine, migrate, write

    config = make_config(store_url, **SECTIONS)
    engine = make_engine(store_url)
    migrate(engine)
    load_through(engine, config, scenario, 20)
    cycle_on(engine, config, scenario, 20)
    query = "SELECT level FROM interval_levels ORDER BY level"
    with engine.connect() as connection:
        listed = connection.execute(text(query)).scalars().all()
        scored = connection.execute(text("SELECT DISTINCT level FROM pair_intervals")).all()
    assert listed == sorted(row[0] for row in scored) == [80.0, 95.0]
    with write(engine) as connection:
        command.downgrade(_alembic_config(connection), "0008_interval_levels@-1")
        connection.execute(text("INSERT INTO pair_intervals VALUES (-1, 50.0, 0, 1, 1, 1, 0.5)"))
    migrate(engine)
    with engine.connect() as connection:
        assert connection.execute(text(query)).scalars().all() == [50.0, 80.0, 95.0]
    engine.dispose()


def test_points_window_reaches_back_over_a_gap_in_the_targets(
    engine: Engine, store_url: str
) -> None:
    """CONTRACT: `window.points: N` holds the pairs of the N latest target periods, however far
    back they lie: a daily series forecast for 6 days, silent for 40, then forecast for 4 more,
    gives a 10-point window of all 10 targets (the detection window used to stop 30 periods
    before the latest target, and held only the last 4)."""
    from aftercast.detect.gather import window_data
    from aftercast.ingest import ingest_records
    from aftercast.matching import match

    config = make_config(store_url, window={"points": 10})
    days = pd.date_range("2026-01-01", periods=50, freq="D", tz="UTC")
    targets = [*days[:6], *days[46:]]
    ingest_records(
        engine,
        config,
        "actuals",
        [{"series_id": "s", "observed_at": d.isoformat(), "value": 10.0} for d in targets],
        "test",
    )
    forecasts = [
        {"series_id": "s", "model": "m", "issued_at": (d - pd.Timedelta(hours=18)).isoformat(),
         "target_at": d.isoformat(), "point": 9.0}
        for d in targets
    ]  # fmt: skip
    ingest_records(engine, config, "forecasts", forecasts, "test")
    now = int(days[-1].timestamp())
    match(engine, now)
    with engine.connect() as connection:
        data = window_data(connection, config, now)
    got = sorted(data.pairs["target_at"].tolist())
    assert got == sorted(int(d.timestamp()) for d in targets)
