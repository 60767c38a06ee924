"""Interval bounds and quantiles packed into the forecast's row, and the migration that packs them.

The checks are round trips: what is packed unpacks to the same long frames (every float bit
kept, rows without a bound left out), and a store written at the revision with child tables
holds the same bounds after `0007_packed_bounds`, and again after its downgrade.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from alembic import command
from hypothesis import given, settings
from hypothesis import strategies as st
from pandas.testing import assert_frame_equal
from sqlalchemy import text

from aftercast.store.bounds import pack_bounds, unpack_bounds
from aftercast.store.bulk import read_frame
from aftercast.store.db import _alembic_config, make_engine, migrate, write

finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
levels = st.sampled_from([50.0, 80.0, 90.0, 95.0, 97.5, 99.0])
probs = st.sampled_from([2.5, 10.0, 25.0, 50.0, 75.0, 90.0, 97.5])


def _sorted(frame: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    return frame.sort_values(by).reset_index(drop=True)


@settings(max_examples=60, deadline=None)
@given(
    intervals=st.lists(st.tuples(st.integers(0, 9), levels, finite, finite), max_size=30),
    quantiles=st.lists(st.tuples(st.integers(0, 9), probs, finite), max_size=30),
)
def test_packed_bounds_unpack_to_the_same_rows(
    intervals: list[tuple[int, float, float, float]], quantiles: list[tuple[int, float, float]]
) -> None:
    iv = (
        pd.DataFrame(intervals, columns=["row", "level", "lower", "upper"])
        .drop_duplicates(["row", "level"])
        .astype({"row": "int64", "level": "float64", "lower": "float64", "upper": "float64"})
    )
    q = (
        pd.DataFrame(quantiles, columns=["row", "prob", "value"])
        .drop_duplicates(["row", "prob"])
        .astype({"row": "int64", "prob": "float64", "value": "float64"})
    )
    index = pd.Index(np.arange(10) + 100)
    iv["row"] += 100
    q["row"] += 100
    layouts, blobs = pack_bounds(index, iv, q)
    has_any = set(iv["row"]) | set(q["row"])
    assert [i for i, blob in zip(index, blobs, strict=True) if blob is not None] == sorted(has_any)
    back_iv, back_q = unpack_bounds(index.to_numpy(), pd.Series(layouts), pd.Series(blobs), "row")
    assert_frame_equal(
        _sorted(back_iv, ["row", "level"]),
        _sorted(iv, ["row", "level"]),
    )
    assert_frame_equal(
        _sorted(back_q, ["row", "prob"]),
        _sorted(q, ["row", "prob"]),
    )


def test_rows_of_several_layouts_decode_each_by_its_own() -> None:
    first = pack_bounds(
        pd.Index([1]),
        pd.DataFrame({"row": [1], "level": [80.0], "lower": [1.0], "upper": [3.0]}),
        pd.DataFrame({"row": [], "prob": [], "value": []}),
    )
    second = pack_bounds(
        pd.Index([2]),
        pd.DataFrame({"row": [2, 2], "level": [95.0, 50.0], "lower": [0.0, 1.0], "upper": [4, 2]}),
        pd.DataFrame({"row": [2], "prob": [50.0], "value": [2.0]}),
    )
    layouts = pd.Series(first[0] + second[0] + [None])
    blobs = pd.Series(first[1] + second[1] + [None])
    assert layouts.tolist() == ["80|", "50,95|50", None]
    iv, q = unpack_bounds(np.array([1, 2, 3]), layouts, blobs)
    assert _sorted(iv, ["forecast_id", "level"]).values.tolist() == [
        [1, 80.0, 1.0, 3.0],
        [2, 50.0, 1.0, 2.0],
        [2, 95.0, 0.0, 4.0],
    ]
    assert q.values.tolist() == [[2, 50.0, 2.0]]


CHILD_INTERVALS = [(1, 80.0, 8.0, 12.0), (1, 95.0, 6.5, 13.25), (2, 80.0, 0.0, 0.1 + 0.2)]
CHILD_QUANTILES = [(1, 50.0, 10.0), (3, 10.0, -1e300)]


def _old_store(url: str) -> None:
    """A store at the revisions before packing, with three forecasts and their child rows."""
    engine = make_engine(url)
    with write(engine) as connection:
        command.upgrade(_alembic_config(connection), "0001")
        for i in (1, 2, 3, 4):
            connection.execute(
                text(
                    "INSERT INTO forecasts (id, series_id, model_id, issued_at, target_at, "
                    "issue_period, target_period, horizon, point, ingested_at) "
                    "VALUES (:i, 1, 1, 0, :i, 0, :i, :i, 10, 0)"
                ),
                {"i": i},
            )
        connection.execute(
            text("INSERT INTO forecast_intervals VALUES (:f, :l, :lo, :up)"),
            [dict(zip(("f", "l", "lo", "up"), r, strict=True)) for r in CHILD_INTERVALS],
        )
        connection.execute(
            text("INSERT INTO forecast_quantiles VALUES (:f, :p, :v)"),
            [dict(zip(("f", "p", "v"), r, strict=True)) for r in CHILD_QUANTILES],
        )
    engine.dispose()


@pytest.mark.parametrize("step", ["upgrade", "downgrade"])
def test_migration_packs_child_rows_and_the_downgrade_restores_them(
    store_url: str, step: str
) -> None:
    _old_store(store_url)
    engine = make_engine(store_url)
    migrate(engine)
    with engine.connect() as connection:
        stored = read_frame(
            connection, "SELECT id, bound_layout, bounds FROM forecasts ORDER BY id"
        )
        names = set(connection.execute(text("SELECT * FROM forecasts LIMIT 0")).keys())
    iv, q = unpack_bounds(stored["id"].to_numpy(), stored["bound_layout"], stored["bounds"])
    if step == "upgrade":
        assert {"bound_layout", "bounds"} <= names
        assert sorted(map(tuple, iv.values.tolist())) == sorted(CHILD_INTERVALS)
        assert sorted(map(tuple, q.values.tolist())) == sorted(CHILD_QUANTILES)
        assert stored.set_index("id")["bound_layout"].isna().tolist() == [False] * 3 + [True]
        return
    with write(engine) as connection:
        # The branch's later revisions first, then packing itself.
        command.downgrade(_alembic_config(connection), "0008_interval_levels@-1")
        command.downgrade(_alembic_config(connection), "0007_packed_bounds@-1")
    with engine.connect() as connection:
        intervals = connection.execute(text("SELECT * FROM forecast_intervals")).all()
        quantiles = connection.execute(text("SELECT * FROM forecast_quantiles")).all()
        names = set(connection.execute(text("SELECT * FROM forecasts LIMIT 0")).keys())
    engine.dispose()
    assert sorted(map(tuple, intervals)) == sorted(CHILD_INTERVALS)
    assert sorted(map(tuple, quantiles)) == sorted(CHILD_QUANTILES)
    assert "bounds" not in names
