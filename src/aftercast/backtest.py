"""Rolling-origin backtest of aftercast's benchmark methods over the stored history.

For each series, `folds` issue periods are placed so that the last fold's targets end at the
series' latest actual, `step` periods apart (default: the horizon, so the folds' targets
tile the end of the history). At issue period P only actuals before P are known and the
targets are P + 1 .. P + horizon, exactly as the live benchmark stage forecasts: in sklearn's
terms this is `TimeSeriesSplit(n_splits=folds, test_size=horizon, gap=1)` on a gap-free
series. Folds whose training history is shorter than `initial` periods are skipped. Each fold
is computed for every series at once (`benchmark_methods`), so the loop runs over folds only;
its pairs (with interval hits and scores) are stored as a run, which can seed baselines.
Common practice is 5 to 10 folds; the default is 5.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine

from aftercast import measures
from aftercast.benchmark_methods import METHODS, benchmark_forecasts, model_name
from aftercast.config import Config
from aftercast.errors import AftercastError
from aftercast.store.bulk import allocate_ids, insert_frame, read_frame, stage_keys
from aftercast.store.catalog import ensure_models
from aftercast.store.db import write
from aftercast.store.schema_detect import backtest_intervals, backtest_pairs, backtest_runs

Progress = Callable[[int, int], None]


@dataclass(frozen=True)
class BacktestOptions:
    series: tuple[str, ...] = ()  # series keys; empty: every series with actuals
    methods: tuple[str, ...] = METHODS
    horizon: int = 14
    folds: int = 5
    step: int | None = None  # default: the horizon
    initial: int | None = None  # default: four seasons, at least 10 periods

    def check(self) -> None:
        unknown = sorted(set(self.methods) - set(METHODS))
        if unknown:
            raise AftercastError(f"--methods {unknown[0]!r}: use {' or '.join(METHODS)}")
        for name in ("horizon", "folds"):
            if getattr(self, name) < 1:
                raise AftercastError(f"--{name} must be at least 1")
        if (self.step is not None and self.step < 1) or (
            self.initial is not None and self.initial < 2
        ):
            raise AftercastError("--step must be at least 1 and --initial at least 2")


@dataclass
class BacktestResult:
    run_id: int
    series: int
    folds: int
    pairs: int
    summary: list[dict[str, Any]] = field(default_factory=list)

    def as_json(self) -> dict[str, Any]:
        return asdict(self)


def _history(engine: Engine, keys: Sequence[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    with engine.connect() as connection:
        series = read_frame(connection, "SELECT id AS series_id, key, season FROM series")
        if keys:
            unknown = sorted(set(keys) - set(series["key"]))
            if unknown:
                raise AftercastError(f"--series {unknown[0]!r}: no such series in the store")
            series = series.loc[series["key"].isin(list(keys))]
        staged = stage_keys(connection, "bt_series", series[["series_id"]])
        actuals = read_frame(
            connection,
            "SELECT a.series_id, a.period, a.observed_at, a.value FROM actuals a "
            f"JOIN {staged} s ON s.series_id = a.series_id",
        )
    return series, actuals


def fold_issues(
    actuals: pd.DataFrame, series: pd.DataFrame, options: BacktestOptions
) -> pd.DataFrame:
    """(series_id, fold, issue_period) of every fold with enough training history."""
    bounds = actuals.groupby("series_id")["period"].agg(["min", "max"])
    season = series.set_index("series_id")["season"].reindex(bounds.index)
    step = options.step or options.horizon
    initial = (
        np.full(len(bounds), options.initial)
        if options.initial is not None
        else np.maximum(4 * season.to_numpy(), 10)
    )
    fold = np.arange(options.folds)
    issue = bounds["max"].to_numpy()[:, None] - options.horizon - step * (options.folds - 1 - fold)
    frame = pd.DataFrame(
        {
            "series_id": np.repeat(bounds.index.to_numpy(), options.folds),
            "fold": np.tile(fold, len(bounds)),
            "issue_period": issue.ravel(),
            "training": (issue - bounds["min"].to_numpy()[:, None]).ravel(),
            "initial": np.repeat(initial, options.folds),
        }
    )
    return frame.loc[frame["training"] >= frame["initial"], ["series_id", "fold", "issue_period"]]


def _fold_pairs(
    config: Config,
    actuals: pd.DataFrame,
    seasons: pd.Series,
    issues: pd.DataFrame,
    options: BacktestOptions,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Benchmark pairs (one per method and target) and their intervals for some folds."""
    horizon = np.arange(1, options.horizon + 1)
    requests = issues.loc[issues.index.repeat(len(horizon))].reset_index(drop=True)
    requests["horizon"] = np.tile(horizon, len(issues))
    requests["target_period"] = requests["issue_period"] + requests["horizon"]
    requests["season"] = seasons.reindex(requests["series_id"]).to_numpy()
    settings = config.benchmarks
    made, intervals = benchmark_forecasts(
        actuals,
        requests,
        list(options.methods),
        settings.levels,
        settings.error_window,
        settings.min_errors,
    )
    observed = actuals.rename(
        columns={"period": "target_period", "observed_at": "target_at", "value": "actual"}
    )
    pairs = made.merge(observed, on=["series_id", "target_period"])
    pairs["error"] = measures.forecast_error(pairs["actual"], pairs["point"])
    pairs["abs_error"] = np.abs(pairs["error"])
    scored = intervals.merge(pairs[["row", "actual"]], on="row")
    scored["hit"] = measures.interval_hit(scored["actual"], scored["lower"], scored["upper"])
    scored["interval_score"] = measures.interval_score(
        scored["actual"], scored["lower"], scored["upper"], scored["level"]
    )
    return pairs, scored.drop(columns="actual")


def _store(
    engine: Engine, options: BacktestOptions, pairs: pd.DataFrame, scored: pd.DataFrame, series: int
) -> int:
    with write(engine) as connection:
        result = connection.execute(
            backtest_runs.insert().values(
                created_at=int(time.time()),
                options=json.dumps(asdict(options)),
                series=series,
                pairs=len(pairs),
            )
        )
        run_id = int(result.inserted_primary_key[0])  # type: ignore[index]
        models = ensure_models(connection, [model_name(m) for m in options.methods])
        pairs = pairs.assign(
            run_id=run_id,
            model_id=pairs["method"].map(lambda m: models[model_name(m)]).astype("int64"),
            id=allocate_ids(connection, backtest_pairs, len(pairs)),
        )
        insert_frame(connection, backtest_pairs, pairs[[c.name for c in backtest_pairs.columns]])
        ids = pd.Series(pairs["id"].to_numpy(), index=pairs["row"].to_numpy())
        child = scored.assign(pair_id=ids.reindex(scored["row"]).to_numpy())
        child = child.loc[child["pair_id"].notna()].astype({"pair_id": "int64", "hit": "int16"})
        insert_frame(
            connection, backtest_intervals, child[[c.name for c in backtest_intervals.columns]]
        )
    return run_id


def summarise_run(pairs: pd.DataFrame, scored: pd.DataFrame) -> list[dict[str, Any]]:
    """Per method and horizon: pairs, MAE, RMSE and coverage per level (over all series)."""
    grouped = pairs.groupby(["method", "horizon"])
    table = grouped.agg(n=("error", "size"), mae=("abs_error", "mean"))
    table["rmse"] = np.sqrt(grouped["error"].apply(lambda e: float(np.mean(e**2))))
    if len(scored):
        hits = scored.merge(pairs[["row", "method", "horizon"]], on="row")
        coverage = hits.groupby(["method", "horizon", "level"])["hit"].mean().unstack("level")
        coverage.columns = [f"coverage_{level:g}" for level in coverage.columns]
        table = table.join(coverage)
    return json.loads(table.reset_index().to_json(orient="records"))


def run_backtest(
    engine: Engine, config: Config, options: BacktestOptions, progress: Progress | None = None
) -> BacktestResult:
    """Run the backtest, store its pairs as a new run and return the run's summary."""
    options.check()
    series, actuals = _history(engine, options.series)
    issues = fold_issues(actuals, series, options)
    if issues.empty:
        raise AftercastError(
            "backtest: no series has enough history for these folds (try fewer --folds, a "
            "shorter --horizon or a smaller --initial)"
        )
    seasons = series.set_index("series_id")["season"]
    parts: list[pd.DataFrame] = []
    bounds: list[pd.DataFrame] = []
    for index, fold in enumerate(range(options.folds)):
        pairs, scored = _fold_pairs(
            config, actuals, seasons, issues.loc[issues["fold"] == fold], options
        )
        offset = sum(len(p) for p in parts)
        parts.append(pairs.assign(row=pairs["row"] + offset))
        bounds.append(scored.assign(row=scored["row"] + offset))
        if progress is not None:
            progress(index + 1, options.folds)
    pairs = pd.concat(parts, ignore_index=True)
    scored = pd.concat(bounds, ignore_index=True)
    run_id = _store(engine, options, pairs, scored, int(issues["series_id"].nunique()))
    return BacktestResult(
        run_id=run_id,
        series=int(issues["series_id"].nunique()),
        folds=int(issues["fold"].nunique()),
        pairs=len(pairs),
        summary=summarise_run(pairs, scored),
    )
