"""Each part of a window (point, level and quantile sums) refreshed on its own, with its mark.

A crash may land between the parts' transactions: then the parts stand at different clocks.
Readers must not take the stored sums as current until every part is, and the next refresh
must bring each part forward from its own clock. The reference, as in test_windows_store, is a
full recomputation from every stored pair in pandas. Also revision `0012_window_part_marks`:
an older store's marks table gains the part, on both stores.
"""

from __future__ import annotations

from collections.abc import Callable

import pandas as pd
from alembic import command
from sqlalchemy import inspect

from aftercast.ingest import ingest_records
from aftercast.matching import match
from aftercast.store.bulk import read_frame
from aftercast.store.db import _alembic_config, write
from aftercast.window_store import (
    _refresh_part,
    current_windows,
    find_window,
    is_current,
    refresh_windows,
)
from tests.test_windows_store import (
    DAY,
    SERIES,
    START,
    WINDOWS,
    actual_rows,
    assert_same_rows,
    assert_stored_windows_exact,
    forecast_rows,
    full_recomputation,
    new_store,
    one_series_refreshed,
    open_store,
)

__all__ = ["new_store"]  # the fixture, imported for the tests below


def _marks(engine: object) -> pd.DataFrame:
    with engine.connect() as connection:  # type: ignore[attr-defined]
        frame = read_frame(connection, "SELECT window_name, part, now FROM window_marks")
    return frame.sort_values(["window_name", "part"]).reset_index(drop=True)


def test_parts_behind_their_window_catch_up_from_their_own_marks(
    new_store: Callable[[], str],
) -> None:
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        for series in SERIES:
            ingest_records(engine, config, "actuals", actual_rows(series, 0, list(range(9))), "t")
            for issue_day in (1, 2, 3):
                rows = forecast_rows(series, "m1", issue_day, 5)
                ingest_records(engine, config, "forecasts", rows, "t")
        now = int((START + pd.Timedelta(days=5)).timestamp())
        refresh_windows(engine, config, now, match(engine, now).touched)
        marks = _marks(engine)
        assert marks["part"].tolist() == ["levels", "points", "quantiles"] * 2
        assert set(marks["now"]) == {now}
        # A day later only the point sums of "short" are brought forward (a crash took the
        # other parts' transactions): readers must not use the stored sums at either clock.
        later = now + DAY
        window = find_window(config, "short")
        with write(engine) as connection:
            _refresh_part(connection, window, "points", later, match(engine, later).touched)
        with engine.connect() as connection:
            assert not is_current(connection, window, later)
            assert not is_current(connection, window, now)
        assert_same_rows(
            current_windows(engine, config, later, "short"),
            full_recomputation(engine, config, later, "short"),
        )
        # The next refresh moves the level and quantile sums from their own clock (by deltas:
        # they are less than a window behind) and leaves the point sums as they are.
        refreshed = refresh_windows(engine, config, later, None)
        assert not any(r.full for r in refreshed)
        with engine.connect() as connection:
            assert is_current(connection, window, later)
        assert_stored_windows_exact(engine, config, later)
    finally:
        engine.dispose()


def test_the_revision_gives_the_marks_a_part_and_the_next_cycle_recomputes(
    new_store: Callable[[], str],
) -> None:
    engine, config = open_store(new_store(), **WINDOWS)
    try:
        now = one_series_refreshed(engine, config, actual_days=6, issue_day=1, level=5, day=4)
        with engine.begin() as connection:
            command.downgrade(_alembic_config(connection), "0012_window_part_marks@-1")
            columns = {c["name"] for c in inspect(connection).get_columns("window_marks")}
            assert "part" not in columns
            connection.exec_driver_sql(
                "INSERT INTO window_marks (window_name, spec, now, cycle_id, refreshed_at) "
                f"VALUES ('short', 'days=3', {now}, 0, 0)"
            )
            command.upgrade(_alembic_config(connection), "heads")
            columns = {c["name"] for c in inspect(connection).get_columns("window_marks")}
            assert "part" in columns
        assert _marks(engine).empty
        assert all(r.full for r in refresh_windows(engine, config, now, None))
        assert_same_rows(
            current_windows(engine, config, now, "short"),
            full_recomputation(engine, config, now, "short"),
        )
    finally:
        engine.dispose()
