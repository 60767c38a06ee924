"""Tables of the windows stage: window sums per key as of the last cycle, and their marks.

For each configured window the cycle keeps the additive sums of the pairs inside it, per
(series, model, horizon) in `window_point_sums`, per interval level in `window_level_sums` and
per quantile in `window_quantile_sums`, as of the clock of the cycle that refreshed them; that
clock, the window's definition and the cycle are in `window_marks`, one row per part. A cycle
recomputes only the keys whose pairs changed or whose window edge moved past pairs, and
readers asking for the same clock read these rows instead of the pairs.
"""

from __future__ import annotations

from sqlalchemy import BigInteger, Column, Float, Integer, String, Table

from aftercast.store.schema import metadata

_WINDOW = 64


def _key_columns(*extra: Column) -> list[Column]:
    return [
        Column("window_name", String(_WINDOW), primary_key=True),
        Column("series_id", BigInteger, primary_key=True),
        Column("model_id", BigInteger, primary_key=True),
        Column("horizon", Integer, primary_key=True),
        *extra,
    ]


# One mark per window and part ("points", "levels", "quantiles": the keys of SUM_TABLES): each
# part's sums are refreshed in a transaction of their own, so each carries its own clock.
window_marks = Table(
    "window_marks",
    metadata,
    Column("window_name", String(_WINDOW), primary_key=True),
    Column("part", String(16), primary_key=True),
    Column("spec", String(255), nullable=False),  # e.g. "days=28" or "points=60"
    Column("now", BigInteger, nullable=False),
    Column("cycle_id", BigInteger, nullable=False),
    Column("refreshed_at", BigInteger, nullable=False),
)

window_point_sums = Table(
    "window_point_sums",
    metadata,
    *_key_columns(),
    Column("n", BigInteger, nullable=False),
    Column("sum_error", Float, nullable=False),
    Column("sum_abs_error", Float, nullable=False),
    Column("sum_sq_error", Float, nullable=False),
    Column("n_ape", BigInteger, nullable=False),
    Column("sum_ape", Float),
    Column("n_sape", BigInteger, nullable=False),
    Column("sum_sape", Float),
    Column("sum_abs_actual", Float, nullable=False),
    Column("n_scaled", BigInteger, nullable=False),
    Column("sum_abs_scaled", Float),
    Column("n_sq_scaled", BigInteger, nullable=False),
    Column("sum_sq_scaled", Float),
    Column("first_target", BigInteger, nullable=False),
    Column("last_target", BigInteger, nullable=False),
    Column("first_period", BigInteger, nullable=False),
)

window_level_sums = Table(
    "window_level_sums",
    metadata,
    *_key_columns(Column("level", Float, primary_key=True)),
    Column("n", BigInteger, nullable=False),
    Column("hits", BigInteger, nullable=False),
    Column("sum_width", Float, nullable=False),
    Column("sum_interval_score", Float, nullable=False),
)

window_quantile_sums = Table(
    "window_quantile_sums",
    metadata,
    *_key_columns(Column("prob", Float, primary_key=True)),
    Column("n", BigInteger, nullable=False),
    Column("sum_pinball", Float, nullable=False),
    Column("below", BigInteger, nullable=False),
)

WINDOW_TABLES = ("window_marks", "window_point_sums", "window_level_sums", "window_quantile_sums")
# The sum tables, each with the column that extends the (window_name, series, model, horizon) key.
SUM_TABLES = {
    "points": (window_point_sums, None),
    "levels": (window_level_sums, "level"),
    "quantiles": (window_quantile_sums, "prob"),
}
