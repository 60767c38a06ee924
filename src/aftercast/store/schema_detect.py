"""Tables of forecast activity, baselines, detection findings and backtests.

`forecast_activity` records, per (series, model), when forecasts were first and last issued;
the benchmark stage keeps it current from the match queue, so neither the benchmark stage nor
the stalled-forecast check ever scans the forecasts table.

`baselines` holds one reference window per (series, model, horizon bucket) with its summary,
and `baseline_losses` the per-target losses of that window that the drift tests compare the
recent window with; `baseline_resets` logs every reset with the statistics it discarded.

`findings` has one row per (cycle, detection, series, model, horizon bucket): the statistic,
its p-value, the fleet-adjusted p-value, whether it is flagged, a severity and the evidence as
JSON. Unflagged rows are kept only when nominally significant or flagged the cycle before, so a
fleet of healthy series costs little. `detections` summarises each detection per cycle.

`backtest_runs` and `backtest_pairs` (+ `backtest_intervals`) keep rolling-origin evaluations.
"""

from __future__ import annotations

from sqlalchemy import BigInteger, Column, Float, Index, Integer, SmallInteger, String, Table, Text

from aftercast.store.schema import Id, metadata

forecast_activity = Table(
    "forecast_activity",
    metadata,
    Column("series_id", BigInteger, primary_key=True),
    Column("model_id", BigInteger, primary_key=True),
    Column("first_issued_at", BigInteger, nullable=False),
    Column("last_issued_at", BigInteger, nullable=False),
    Column("last_issue_period", BigInteger, nullable=False),
)

baselines = Table(
    "baselines",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("bucket", String(16), nullable=False),
    Column("source", String(64), nullable=False),  # first-days | dates | manual | backtest:<run>
    Column("window_start", BigInteger, nullable=False),  # targets in (start, end]
    Column("window_end", BigInteger, nullable=False),
    Column("targets", Integer, nullable=False),
    Column("pairs", Integer, nullable=False),
    Column("mae", Float),
    Column("rmse", Float),
    Column("me", Float),
    Column("error_sd", Float),  # sd of per-target mean errors: the bias charts' scale
    Column("coverage", Text, nullable=False, default="{}"),  # JSON level -> share
    Column("interval_score", Text, nullable=False, default="{}"),  # JSON level -> mean
    Column("created_at", BigInteger, nullable=False),
    Index("ix_baselines_key", "series_id", "model_id", "bucket", unique=True),
)

baseline_losses = Table(
    "baseline_losses",
    metadata,
    Column("baseline_id", BigInteger, primary_key=True),
    Column("target_period", BigInteger, primary_key=True),
    Column("abs_error", Float, nullable=False),  # mean over the bucket's horizons
    Column("error", Float, nullable=False),
)

baseline_resets = Table(
    "baseline_resets",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("reset_at", BigInteger, nullable=False),  # a new baseline collects from here
    Column("reason", Text, nullable=False, default=""),
    Column("actor", String(128), nullable=False, default="cli"),
    Column("previous", Text, nullable=False, default="[]"),  # JSON of the discarded baselines
    Index("ix_baseline_resets_key", "series_id", "model_id"),
)

detections = Table(
    "detections",
    metadata,
    Column("cycle_id", BigInteger, primary_key=True),
    Column("detection", String(64), primary_key=True),
    Column("now", BigInteger, nullable=False),
    Column("tests", Integer, nullable=False),
    Column("flagged", Integer, nullable=False),
    Column("families_selected", Integer, nullable=False),
    Column("families", Integer, nullable=False),
)

findings = Table(
    "findings",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("cycle_id", BigInteger, nullable=False),
    Column("now", BigInteger, nullable=False),
    Column("detection", String(64), nullable=False),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("bucket", String(16), nullable=False),  # "1", "2-7", "15+" or "all"
    Column("level", Float),  # the interval level a coverage finding is about
    Column("n", Integer, nullable=False),
    Column("statistic", Float),
    Column("p_value", Float),
    Column("p_adjusted", Float),
    Column("flagged", SmallInteger, nullable=False),
    Column("severity", String(16), nullable=False),
    Column("evidence", Text, nullable=False, default="{}"),
    Index("ix_findings_cycle", "cycle_id", "flagged"),
    Index("ix_findings_key", "series_id", "model_id", "detection", "bucket", "cycle_id"),
)

backtest_runs = Table(
    "backtest_runs",
    metadata,
    Column("id", Id, primary_key=True, autoincrement=True),
    Column("created_at", BigInteger, nullable=False),
    Column("options", Text, nullable=False),  # JSON
    Column("series", Integer, nullable=False),
    Column("pairs", Integer, nullable=False),
)

backtest_pairs = Table(
    "backtest_pairs",
    metadata,
    Column("id", Id, primary_key=True),
    Column("run_id", BigInteger, nullable=False),
    Column("series_id", BigInteger, nullable=False),
    Column("model_id", BigInteger, nullable=False),
    Column("fold", Integer, nullable=False),
    Column("issue_period", BigInteger, nullable=False),
    Column("target_period", BigInteger, nullable=False),
    Column("target_at", BigInteger, nullable=False),
    Column("horizon", Integer, nullable=False),
    Column("actual", Float, nullable=False),
    Column("point", Float, nullable=False),
    Column("error", Float, nullable=False),
    Column("abs_error", Float, nullable=False),
    Index("ix_backtest_pairs_run", "run_id", "series_id", "model_id"),
)

backtest_intervals = Table(
    "backtest_intervals",
    metadata,
    Column("pair_id", BigInteger, primary_key=True),
    Column("level", Float, primary_key=True),
    Column("lower", Float, nullable=False),
    Column("upper", Float, nullable=False),
    Column("hit", SmallInteger, nullable=False),
    Column("interval_score", Float, nullable=False),
)

DETECT_TABLES = (
    "forecast_activity",
    "baselines",
    "baseline_losses",
    "baseline_resets",
    "detections",
    "findings",
    "backtest_runs",
    "backtest_pairs",
    "backtest_intervals",
)
