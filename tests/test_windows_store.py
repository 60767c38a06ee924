"""Windows kept by the cycle, on SQLite and PostgreSQL, through the real ingest and cycle.

The reference for every comparison is a full recomputation: all stored pairs read back and
aggregated in pandas (`windows.select_window` + `pair_sums`), which the SQL sums and the
incrementally refreshed sums must equal after any sequence of ingests, revisions and cycles.
Measures are checked against direct computations named beside them.
"""

from __future__ import annotations

import itertools
import os
import uuid
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from sqlalchemy import Engine, create_engine, text

from aftercast.config import Config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_records
from aftercast.matching import match
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate
from aftercast.window_store import (
    REBASE_DAYS,
    current_windows,
    find_window,
    refresh_windows,
    rows_for_page,
)
from aftercast.windows import EXTREMES, group_horizons, pair_sums, select_window, window_rows
from tests.conftest import POSTGRES_ENV, make_config

DAY = 86_400
START = pd.Timestamp("2026-03-02T00:00:00Z")
NAMES = ["series", "model", "window", "window_start", "window_end"]


@pytest.fixture(params=["sqlite", "postgresql"])
def new_store(request: pytest.FixtureRequest, tmp_path: Any) -> Iterator[Callable[[], str]]:
    """A factory of fresh, empty stores (one per hypothesis example), dropped afterwards."""
    if request.param == "sqlite":
        counter = itertools.count()
        yield lambda: f"sqlite:///{tmp_path / f'store{next(counter)}.db'}"
        return
    base = os.environ.get(POSTGRES_ENV)
    if not base:
        pytest.skip(f"{POSTGRES_ENV} is not set: PostgreSQL tests need a server URL")
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    made: list[str] = []

    def make() -> str:
        name = f"aftercast_w_{uuid.uuid4().hex[:12]}"
        with admin.connect() as connection:
            connection.execute(text(f'CREATE DATABASE "{name}"'))
        made.append(name)
        return base.rsplit("/", 1)[0] + f"/{name}"

    yield make
    with admin.connect() as connection:
        for name in made:
            connection.execute(
                text("SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = :n"),
                {"n": name},
            )
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
    admin.dispose()


def open_store(url: str, **sections: Any) -> tuple[Engine, Config]:
    config = make_config(url, **sections)
    engine = make_engine(url)
    migrate(engine)
    return engine, config


def full_recomputation(engine: Engine, config: Config, now: int, name: str) -> pd.DataFrame:
    """Window rows from every stored pair, aggregated in pandas."""
    with engine.connect() as connection:
        pairs = read_frame(connection, "SELECT * FROM pairs")
        intervals = read_frame(connection, "SELECT * FROM pair_intervals")
        quantiles = read_frame(connection, "SELECT * FROM pair_quantiles")
    chosen = select_window(pairs, find_window(config, name), now)
    if chosen.empty:
        return pd.DataFrame()
    sums = pair_sums(chosen, intervals, quantiles)
    return window_rows(group_horizons(sums, list(config.horizon_buckets)))


def assert_same_rows(got: pd.DataFrame, want: pd.DataFrame) -> None:
    if want.empty:
        assert got.empty
        return
    measures = [c for c in want.columns if c not in EXTREMES]
    assert set(got.columns) - set(NAMES) == set(measures)

    def ordered(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
        frame = frame.assign(_h=frame["horizon"].astype(str))
        frame = frame.sort_values(["series_id", "model_id", "_h"]).reset_index(drop=True)
        return frame[columns].astype({"horizon": str} if "horizon" in columns else {})

    pd.testing.assert_frame_equal(
        ordered(got, measures), ordered(want, measures), check_dtype=False, rtol=1e-9
    )
    if got["window"].iloc[0] == "latest":  # a points window spans its first to last target
        spans = ordered(got, ["window_start", "window_end"]).to_numpy()
        np.testing.assert_array_equal(spans, ordered(want, ["first_target", "last_target"]))


def assert_stored_windows_exact(engine: Engine, config: Config, now: int) -> None:
    """Both windows' rows at `now`, as readers get them, equal a full recomputation."""
    for name in ("short", "latest"):
        assert_same_rows(
            current_windows(engine, config, now, name),
            full_recomputation(engine, config, now, name),
        )


def sql_rows(engine: Engine, config: Config, now: int, name: str) -> pd.DataFrame:
    """Window rows computed by the SQL sums straight from the pairs (never the stored sums)."""
    window = find_window(config, name)
    with engine.connect() as connection:
        page = read_frame(connection, "SELECT id, key FROM series ORDER BY id")
        return rows_for_page(connection, list(config.horizon_buckets), window, now, page, False)


# -- the incremental property --------------------------------------------------------------

SERIES = ["s1", "s2"]
MODELS = ["m1", "m2"]
WINDOWS = {
    "window": {"name": "short", "days": 3},
    "windows": [{"name": "latest", "points": 4}],
    "horizon_buckets": ["2-3"],
    "series_defaults": {"frequency": "D", "season": 2, "timezone": "UTC"},
}


def _stamp(day: int, hour: int = 0) -> str:
    return (START + pd.Timedelta(days=day, hours=hour)).strftime("%Y-%m-%dT%H:%M:%SZ")


def actual_rows(series: str, first: int, values: list[int]) -> list[dict[str, Any]]:
    """Actuals of `series` on consecutive days from `first` (a revision where one exists)."""
    return [
        {"series_id": series, "observed_at": _stamp(first + i), "value": float(v)}
        for i, v in enumerate(values)
    ]


def forecast_rows(series: str, model: str, issue_day: int, level: int) -> list[dict[str, Any]]:
    rows = []
    for h in (1, 2, 3):
        point = float(level + h)
        rows.append(
            {
                "series_id": series,
                "model": model,
                "issued_at": _stamp(issue_day, 6),
                "target_at": _stamp(issue_day + h),
                "point": point,
                "lower_80": point - 2 - h,
                "upper_80": point + 2 + h,
                "q_10": point - 2,
                "q_50": point,
                "q_90": point + 2,
            }
        )
    return rows


day = st.integers(0, 9)
steps = st.lists(
    st.one_of(
        st.tuples(
            st.just("actuals"),
            st.sampled_from(SERIES),
            st.integers(0, 6),
            st.lists(st.integers(0, 40), min_size=1, max_size=7),
        ),
        st.tuples(
            st.just("forecasts"),
            st.sampled_from(SERIES),
            st.sampled_from(MODELS),
            day,
            st.integers(0, 40),
        ),
        st.tuples(st.just("cycle"), st.integers(0, 12), st.sampled_from([0, 7, 23])),
    ),
    min_size=3,
    max_size=9,
)


# Few, small examples keep it fast; no shrinking, which would replay whole stores for minutes.
@settings(
    max_examples=8,
    deadline=None,
    phases=[Phase.explicit, Phase.reuse, Phase.generate],
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)
@given(plan=steps)
def test_incremental_windows_equal_full_recomputation(
    new_store: Callable[[], str], plan: list[tuple[Any, ...]]
) -> None:
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        # The clock then moves on and back with nothing new: only the window edges move.
        trailing = [("cycle", 10, 12), ("cycle", 11, 23), ("cycle", 13, 0), ("cycle", 9, 7)]
        for step in [*plan, *trailing]:
            if step[0] == "actuals":
                ingest_records(engine, config, "actuals", actual_rows(*step[1:]), "test")
            elif step[0] == "forecasts":
                ingest_records(engine, config, "forecasts", forecast_rows(*step[1:]), "test")
            else:
                now = int((START + pd.Timedelta(days=step[1], hours=step[2])).timestamp())
                run_cycle(engine, config, now)
                for name in ("short", "latest"):
                    want = full_recomputation(engine, config, now, name)
                    assert_same_rows(current_windows(engine, config, now, name), want)
                    assert_same_rows(sql_rows(engine, config, now, name), want)
    finally:
        engine.dispose()


def test_a_refresh_recomputes_only_touched_and_swept_keys(new_store: Callable[[], str]) -> None:
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        for series in SERIES:
            ingest_records(
                engine, config, "actuals", actual_rows(series, 0, [5, 6, 7, 8, 9, 10, 11, 12]), "t"
            )
            for model in MODELS:
                ingest_records(engine, config, "forecasts", forecast_rows(series, model, 3, 9), "t")
        now = int((START + pd.Timedelta(days=5)).timestamp())
        matched = match(engine, now)
        assert all(r.full for r in refresh_windows(engine, config, now, matched.touched))
        ingest_records(engine, config, "actuals", actual_rows("s1", 5, [30]), "revision")
        matched = match(engine, now)
        assert matched.touched is not None and set(matched.touched["series_id"]) == {1}
        refreshed = refresh_windows(engine, config, now, matched.touched)
        assert [(r.full, r.keys) for r in refreshed] == [(False, 2), (False, 2)]
        # A day later nothing was scored. The days window moves by deltas, recomputing only
        # the series on today's turn of the rotation; the points window recomputes the keys
        # with pairs its edge passed.
        later = now + DAY
        refreshed = refresh_windows(engine, config, later, None)
        on_turn = [s for s in (1, 2) if s % REBASE_DAYS == (later // DAY) % REBASE_DAYS]
        assert [(r.full, r.keys) for r in refreshed] == [(False, 2 * len(on_turn)), (False, 4)]
        assert_stored_windows_exact(engine, config, later)
        assert_same_rows(
            sql_rows(engine, config, now, "short"), full_recomputation(engine, config, now, "short")
        )
    finally:
        engine.dispose()


def test_a_revision_inside_a_moving_window_is_recomputed(
    new_store: Callable[[], str],
) -> None:
    # Deltas only add and remove edge strips: a rescored pair inside the old window must be
    # recomputed, whichever series is on the rotation's turn.
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        for series in SERIES:
            ingest_records(engine, config, "actuals", actual_rows(series, 0, list(range(9))), "t")
            ingest_records(engine, config, "forecasts", forecast_rows(series, "m1", 3, 5), "t")
        now = int((START + pd.Timedelta(days=6)).timestamp())
        refresh_windows(engine, config, now, match(engine, now).touched)
        for series in SERIES:  # revised: the actual of day 5, inside the window
            ingest_records(engine, config, "actuals", actual_rows(series, 5, [50]), "revision")
        later = now + 6 * 3600
        refresh_windows(engine, config, later, match(engine, later).touched)
        assert_stored_windows_exact(engine, config, later)
    finally:
        engine.dispose()


def one_series_refreshed(
    engine: Engine, config: Config, actual_days: int, issue_day: int, level: int, day: int
) -> int:
    """s1's actuals of its first `actual_days` days and m1's forecasts issued on `issue_day`
    ingested, then the windows refreshed on `day`; returns that clock."""
    days = list(range(actual_days))
    ingest_records(engine, config, "actuals", actual_rows("s1", 0, days), "t")
    ingest_records(engine, config, "forecasts", forecast_rows("s1", "m1", issue_day, level), "t")
    now = int((START + pd.Timedelta(days=day)).timestamp())
    refresh_windows(engine, config, now, match(engine, now).touched)
    return now


def test_a_late_forecast_enters_a_points_window_not_yet_full(
    new_store: Callable[[], str],
) -> None:
    # The latest 4 periods hold only 2 until a forecast made earlier arrives late.
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        now = one_series_refreshed(engine, config, actual_days=8, issue_day=5, level=3, day=8)
        ingest_records(engine, config, "forecasts", forecast_rows("s1", "m1", 1, 3), "late")
        refresh_windows(engine, config, now + 3600, match(engine, now + 3600).touched)
        got = current_windows(engine, config, now + 3600, "latest")
        assert_same_rows(got, full_recomputation(engine, config, now + 3600, "latest"))
        assert got.loc[got["horizon"] == "all", "n"].tolist() == [4]  # periods 3, 4, 6, 7
    finally:
        engine.dispose()


def test_a_cycle_that_stopped_early_forces_a_full_refresh(new_store: Callable[[], str]) -> None:
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        ingest_records(engine, config, "actuals", actual_rows("s1", 0, [1, 2, 3, 4, 5, 6]), "t")
        ingest_records(engine, config, "forecasts", forecast_rows("s1", "m1", 1, 2), "t")
        now = int((START + pd.Timedelta(days=5)).timestamp())
        run_cycle(engine, config, now)
        with engine.begin() as connection:  # one cycle crashed after matching, one is running
            for _ in range(2):
                connection.execute(
                    text("INSERT INTO cycles (now, started_at, stats) VALUES (:n, 0, '{}')"),
                    {"n": now},
                )
        assert all(r.full for r in refresh_windows(engine, config, now, None))
        assert not any(r.full for r in refresh_windows(engine, config, now, None))
    finally:
        engine.dispose()
