"""A forecast's interval bounds and quantiles move into its own row (`store/bounds.py`).

Adds `forecasts.bound_layout` and `forecasts.bounds`, packs the rows of `forecast_intervals`
and `forecast_quantiles` into them a block of forecast ids at a time, and drops the two child
tables, which held five to seven rows per forecast and were most of the write work of a load.
The downgrade unpacks them again.

Revision ID: 0007_packed_bounds
Revises: 0001
"""

from __future__ import annotations

import importlib

import numpy as np
import pandas as pd
import sqlalchemy as sa
from alembic import op

from aftercast.store.bounds import pack_bounds, unpack_bounds
from aftercast.store.bulk import insert_frame, read_frame

revision = "0007_packed_bounds"
down_revision = "0001"
branch_labels = None
depends_on = None

BLOCK = 100_000  # forecast ids per step: memory stays flat whatever the store's size
CHILDREN = ("forecast_intervals", "forecast_quantiles")


def _frozen() -> sa.MetaData:
    return importlib.import_module("aftercast.store.migrations.versions.0001_initial").frozen


def _id_span(bind: sa.Connection, table: str) -> tuple[int, int]:
    low, high = bind.execute(sa.text(f"SELECT MIN(id), MAX(id) FROM {table}")).one()
    return (int(low), int(high)) if low is not None else (1, 0)


def upgrade() -> None:
    op.add_column("forecasts", sa.Column("bound_layout", sa.Text()))
    op.add_column("forecasts", sa.Column("bounds", sa.LargeBinary()))
    bind = op.get_bind()
    low, high = _id_span(bind, "forecasts")
    for start in range(low, high + 1, BLOCK):
        span = {"low": start, "high": start + BLOCK - 1}
        where = "WHERE forecast_id BETWEEN :low AND :high"
        intervals = read_frame(
            bind,
            f"SELECT forecast_id AS row, level, lower, upper FROM forecast_intervals {where}",
            span,
        )
        quantiles = read_frame(
            bind, f"SELECT forecast_id AS row, prob, value FROM forecast_quantiles {where}", span
        )
        ids = pd.Index(np.union1d(intervals["row"], quantiles["row"]).astype(np.int64))
        if ids.empty:
            continue
        layouts, blobs = pack_bounds(ids, intervals, quantiles)
        bind.execute(
            sa.text("UPDATE forecasts SET bound_layout = :layout, bounds = :blob WHERE id = :id"),
            [
                {"id": i, "layout": layout, "blob": blob}
                for i, layout, blob in zip(ids.tolist(), layouts, blobs, strict=True)
            ],
        )
    for table in CHILDREN:
        op.drop_table(table)


def downgrade() -> None:
    bind = op.get_bind()
    frozen = _frozen()
    frozen.create_all(bind=bind, tables=[frozen.tables[name] for name in CHILDREN])
    low, high = _id_span(bind, "forecasts")
    for start in range(low, high + 1, BLOCK):
        stored = read_frame(
            bind,
            "SELECT id, bound_layout, bounds FROM forecasts "
            "WHERE id BETWEEN :low AND :high AND bounds IS NOT NULL",
            {"low": start, "high": start + BLOCK - 1},
        )
        if stored.empty:
            continue
        intervals, quantiles = unpack_bounds(
            stored["id"].to_numpy(), stored["bound_layout"], stored["bounds"]
        )
        insert_frame(bind, frozen.tables["forecast_intervals"], intervals)
        insert_frame(bind, frozen.tables["forecast_quantiles"], quantiles)
    with op.batch_alter_table("forecasts") as batch:
        batch.drop_column("bounds")
        batch.drop_column("bound_layout")
