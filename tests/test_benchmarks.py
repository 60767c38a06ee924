"""Benchmark forecasts: the methods against outside definitions, and the stage in a store.

Outside sources: statsmodels' simple exponential smoothing with smoothing level 1 (which is
the naive method), the seasonal naive formula of Hyndman and Athanasopoulos, Forecasting:
Principles and Practice (3rd ed., section 5.2), numpy's quantile (Hyndman and Fan type 7) for
the intervals, statsmodels' ETSModel for the ETS benchmark, and the open datasets shipped with
statsmodels (Nile flow, El Nino sea temperature).
"""

from __future__ import annotations

import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from sqlalchemy import Engine

from aftercast.benchmark_methods import benchmark_forecasts, error_quantiles, point_forecasts
from aftercast.config import Config
from aftercast.scenario import Scenario, ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.test_detect_run_feed import cycle_on, day_start, feed_day, load_through


def _nile() -> pd.DataFrame:
    values = sm.datasets.nile.load_pandas().data["volume"].to_numpy(np.float64)
    return pd.DataFrame({"series_id": 1, "period": np.arange(len(values)), "value": values})


def _elnino() -> pd.DataFrame:
    wide = sm.datasets.elnino.load_pandas().data.drop(columns="YEAR")
    values = wide.to_numpy(np.float64).ravel()
    return pd.DataFrame({"series_id": 2, "period": np.arange(len(values)), "value": values})


def _requests(series_id: int, issues: list[int], leads: range, season: int) -> pd.DataFrame:
    rows = [(series_id, p, p - 1 + j, season) for p in issues for j in leads]
    return pd.DataFrame(rows, columns=["series_id", "issue_period", "target_period", "season"])


def test_naive_equals_simple_exponential_smoothing_with_level_one() -> None:
    from statsmodels.tsa.holtwinters import SimpleExpSmoothing

    history = _nile()
    requests = _requests(1, [20, 57, 100], range(1, 6), 1)
    got = point_forecasts("naive", history, requests)
    expected = []
    for issue in (20, 57, 100):
        # statsmodels: SES with alpha = 1 forecasts the last observation at every lead.
        fit = SimpleExpSmoothing(
            history["value"].to_numpy()[:issue], initialization_method="known", initial_level=0.0
        ).fit(smoothing_level=1.0, optimized=False)
        expected.extend(fit.forecast(5))
    np.testing.assert_allclose(got, expected)


def test_seasonal_naive_follows_the_textbook_formula_on_monthly_data() -> None:
    history = _elnino()
    y = history["value"].to_numpy()
    issues, leads = [30, 131, 500], range(1, 30)
    got = point_forecasts("seasonal-naive", history, _requests(2, issues, leads, 12))
    # FPP3 section 5.2: y_hat(T + h | T) = y(T + h - m (k + 1)), k = floor((h - 1) / m).
    expected = [y[(p - 1) + h - 12 * ((h - 1) // 12 + 1)] for p in issues for h in leads]
    np.testing.assert_allclose(got, expected)


def test_seasonal_naive_skips_a_missing_season_back_to_the_last_known_one() -> None:
    history = _elnino()
    y = history["value"].to_numpy()
    gappy = history.loc[history["period"] != 119]  # December of the tenth year is missing
    got = point_forecasts("seasonal-naive", gappy, _requests(2, [121], range(11, 12), 12))
    # Target 131 (a December): period 119 is missing, so the December before, 107, is used.
    assert got.tolist() == [y[107]]


def test_interval_quantiles_equal_numpy_quantiles_of_past_errors() -> None:
    history = _nile()
    y = history["value"].to_numpy()
    issue, lag, window = 80, 3, 25
    got = error_quantiles(
        history,
        _requests(1, [issue], range(lag, lag + 1), 1),
        np.array([lag]),
        [0.1, 0.9],
        window,
        8,
    )
    # The lag-3 naive errors whose period is before the issue period, the latest 25 of them.
    errors = (y[lag:issue] - y[: issue - lag])[-window:]
    np.testing.assert_allclose(got.iloc[0].to_numpy(), np.quantile(errors, [0.1, 0.9]))


def test_intervals_contain_their_point_and_need_enough_errors() -> None:
    history = _elnino()
    requests = _requests(2, [14, 200, 400], range(1, 13), 12)
    made, intervals = benchmark_forecasts(history, requests, ["seasonal-naive"], [80, 95], 56, 8)
    joined = intervals.merge(made[["row", "point", "issue_period"]], on="row")
    assert (joined["lower"] <= joined["point"]).all() and (joined["point"] <= joined["upper"]).all()
    # At issue period 14 only two seasonal differences are known: fewer than 8, no interval.
    assert 14 not in set(joined["issue_period"]) and {200, 400} <= set(joined["issue_period"])
    wide = joined.pivot_table(index="row", columns="level", values=["lower", "upper"])
    assert (wide["lower"][95] <= wide["lower"][80]).all() and (
        wide["upper"][95] >= wide["upper"][80]
    ).all()


def test_ets_benchmark_equals_statsmodels_fitted_on_the_known_history() -> None:
    from statsmodels.tsa.exponential_smoothing.ets import ETSModel

    from aftercast.benchmark_ets import ets_forecasts

    history = _nile()
    requests = _requests(1, [70], range(1, 4), 1).assign(horizon=0)
    made, intervals = ets_forecasts(history, requests, [80.0], max_history=200)
    fit = ETSModel(pd.Series(history["value"].to_numpy()[:70]), error="add").fit(disp=False)
    frame = fit.get_prediction(start=70, end=72).summary_frame(alpha=0.2)
    np.testing.assert_allclose(made["point"], frame["mean"], rtol=1e-6)
    np.testing.assert_allclose(intervals["lower"], frame["pi_lower"], rtol=1e-6)


@pytest.fixture
def small() -> Scenario:
    return generate(ScenarioSpec(n_series=6, days=20, horizons=5, history_days=21, seed=3))


def _benchmark_rows(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT s.key, m.name, f.issued_at, f.target_period, f.issue_period, f.point "
            "FROM forecasts f JOIN series s ON s.id = f.series_id JOIN models m "
            "ON m.id = f.model_id WHERE m.name LIKE 'benchmark:%' ORDER BY 1, 2, 3, 4",
        )


def test_stage_stores_benchmarks_that_are_matched_like_any_model(
    engine: Engine, config: Config, small: Scenario
) -> None:
    load_through(engine, config, small, 12)
    report = cycle_on(engine, config, small, 12)
    assert report.benchmarks == 6 * 13 * 5 * 2  # series x issue days x horizons x methods
    rows = _benchmark_rows(engine)
    actuals = small.actuals.assign(
        period=(small.actuals["observed_at"] - pd.Timestamp(0, tz="UTC")).dt.days
    ).set_index(["series_id", "period"])["value"]
    naive = rows.loc[rows["name"] == "benchmark:naive"]
    # Naive (FPP3 5.2): the latest actual before the issue period.
    expected = actuals.reindex(
        list(zip(naive["key"], naive["issue_period"] - 1, strict=True))
    ).to_numpy()
    np.testing.assert_allclose(naive["point"], expected)
    seasonal = rows.loc[rows["name"] == "benchmark:seasonal-naive"]
    lead = seasonal["target_period"] - seasonal["issue_period"] + 1
    source = seasonal["target_period"] - 7 * ((lead - 1) // 7 + 1)
    expected = actuals.reindex(list(zip(seasonal["key"], source, strict=True))).to_numpy()
    np.testing.assert_allclose(seasonal["point"], expected)
    with engine.connect() as connection:
        scored = read_frame(
            connection,
            "SELECT m.name, COUNT(*) AS n FROM pairs p JOIN models m ON m.id = p.model_id "
            "WHERE m.name LIKE 'benchmark:%' GROUP BY m.name",
        )
    assert set(scored["name"]) == {"benchmark:naive", "benchmark:seasonal-naive"}
    again = cycle_on(engine, config, small, 12)
    assert again.benchmarks == 0  # nothing new: incremental


def _loaded_and_empty(
    engine: Engine, config: Config, small: Scenario, tmp_path: Path
) -> tuple[Engine, Config]:
    """`small` loaded through day 12 and cycled in `engine`; a second, empty store to compare."""
    load_through(engine, config, small, 12)
    cycle_on(engine, config, small, 12)
    other_url = f"sqlite:///{tmp_path / 'other.db'}"
    other = make_engine(other_url)
    migrate(other)
    return other, make_config(other_url)


def test_benchmarks_do_not_depend_on_arrival_order(
    config: Config, engine: Engine, small: Scenario, tmp_path: Path
) -> None:
    other, other_config = _loaded_and_empty(engine, config, small, tmp_path)
    # Forecasts first, day by day with no actuals at all (no benchmark can be made), then every
    # actual at once: the benchmarks issued after each newly known period are made again.
    forecasts_only = replace(small, actuals=small.actuals.iloc[:0])
    load_through(other, other_config, forecasts_only, -1)
    for day in range(13):
        feed_day(other, other_config, forecasts_only, day)
        cycle_on(other, other_config, small, day)
    assert _benchmark_rows(other).empty
    load_through(other, other_config, small, 12)
    cycle_on(other, other_config, small, 12)
    pd.testing.assert_frame_equal(_benchmark_rows(engine), _benchmark_rows(other))
    other.dispose()


def test_forecasts_arriving_with_the_days_actuals_get_benchmarks(
    config: Config, engine: Engine, small: Scenario
) -> None:
    # A daily feed: actuals cycled for a while with no forecasts yet, then a day brings its
    # actual and the first forecasts together. Those forecasts are new: all get benchmarks.
    actuals_only = replace(small, forecasts=small.forecasts.iloc[:0])
    load_through(engine, config, actuals_only, 2)
    cycle_on(engine, config, small, 2)
    feed_day(engine, config, small, 3)
    issued = small.forecasts["issued_at"]
    fresh = small.forecasts.loc[(issued >= day_start(small, 3)) & (issued < day_start(small, 4))]
    requests = len(fresh.drop_duplicates(["series_id", "issued_at", "target_at"]))
    assert requests == 6 * 5  # series x horizons, issued that day
    assert cycle_on(engine, config, small, 3).benchmarks == requests * 2  # x methods
    assert set(_benchmark_rows(engine)["name"]) == {"benchmark:naive", "benchmark:seasonal-naive"}


def test_past_errors_are_the_lagged_differences_of_each_series_with_gaps() -> None:
    """Against a direct computation on statsmodels' Nile data (and a gappy copy of it):
    y_t - y_(t - lag) wherever both periods are stored."""
    from aftercast.benchmark_methods import _past_errors

    nile = _nile()
    other = nile.assign(series_id=2, value=nile["value"] * 0.5)
    history = pd.concat([nile, other.loc[other["period"] % 7 != 3]]).sample(frac=1, random_state=3)
    needed = pd.DataFrame({"series_id": [2, 1, 2], "lag": [1, 3, 7]})
    got = _past_errors(history, needed)
    expected = []
    for series, lag in [(1, 3), (2, 1), (2, 7)]:
        y = history.loc[history["series_id"] == series].set_index("period")["value"]
        for period, value in y.sort_index().items():
            if period - lag in y.index:
                expected.append((series, lag, period, value - y[period - lag]))
    assert list(got.itertuples(index=False, name=None)) == expected


def test_seasonal_naive_ignores_the_history_of_series_without_requests() -> None:
    # The backtest passes every series' actuals: a series without a request has no season, and
    # must neither change the others' forecasts (FPP3 section 5.2) nor cast NaN to a phase.
    history = pd.concat([_elnino(), _nile().assign(series_id=7)], ignore_index=True)
    y = _elnino()["value"].to_numpy()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = point_forecasts("seasonal-naive", history, _requests(2, [131], range(1, 3), 12))
    assert got.tolist() == [y[130 - 12 + 1], y[130 - 12 + 2]]


def test_a_daily_feed_of_actuals_and_forecasts_gets_every_benchmark(
    config: Config, engine: Engine, small: Scenario, tmp_path: Path
) -> None:
    """The usual feed: the history first, then each day's actuals and forecasts together and
    a cycle. Every forecast of a series not seen before is new, whatever actuals came with it,
    so the store ends as when everything was loaded at once (and the activity that baselines
    and the stalled check read knows every production model)."""
    other, other_config = _loaded_and_empty(engine, config, small, tmp_path)
    load_through(other, other_config, replace(small, forecasts=small.forecasts.iloc[:0]), -1)
    cycle_on(other, other_config, small, -1)  # the history alone: nothing to benchmark yet
    for day in range(13):
        feed_day(other, other_config, small, day)
        cycle_on(other, other_config, small, day)
    pd.testing.assert_frame_equal(_benchmark_rows(engine), _benchmark_rows(other))
    with other.connect() as connection:
        activity = read_frame(connection, "SELECT series_id, model_id FROM forecast_activity")
    assert len(activity) == small.forecasts[["series_id", "model"]].drop_duplicates().shape[0]
    other.dispose()


def test_a_model_backfilled_behind_the_daily_one_gets_its_benchmarks_once(
    config: Config,
    engine: Engine,
    small: Scenario,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Model A fed and cycled day by day, then model B's forecasts for the same days arrive:
    every B issue time A did not share gets its benchmarks, those A shared are not made again,
    and the store ends as when both were loaded at once."""
    from aftercast import benchmarks

    made: list[int] = []
    make = benchmarks._forecast_frames

    def counted(config: Config, history: pd.DataFrame, missing: pd.DataFrame):  # type: ignore[no-untyped-def]
        made.append(len(missing))
        return make(config, history, missing)

    monkeypatch.setattr(benchmarks, "_forecast_frames", counted)
    a = small.forecasts.loc[small.forecasts["model"] == "shop-planner"]
    b = small.forecasts.loc[small.forecasts["model"] == "quick-trend"].copy()
    own = b["issued_at"].dt.day % 2 == 0  # every other day B issues two hours after A
    b.loc[own, "issued_at"] += pd.Timedelta(hours=2)
    both = replace(small, forecasts=pd.concat([a, b], ignore_index=True))
    at_once_url = f"sqlite:///{tmp_path / 'at-once.db'}"
    at_once = make_engine(at_once_url)
    migrate(at_once)
    load_through(at_once, make_config(at_once_url), both, 12)
    cycle_on(at_once, make_config(at_once_url), small, 12)
    expected = _benchmark_rows(at_once)
    at_once.dispose()

    load_through(engine, config, replace(small, forecasts=a.iloc[:0]), -1)
    for day in range(13):
        feed_day(engine, config, replace(small, forecasts=a), day)
        cycle_on(engine, config, small, day)
    made.clear()
    load_through(engine, config, both, 12)  # B, issued before A's latest issue period
    backfilled = b.loc[own & (b["issued_at"] < day_start(small, 13))]
    wanted = len(backfilled.drop_duplicates(["series_id", "issued_at", "target_at"])) * 2
    assert wanted == 6 * 6 * 5 * 2  # series x B's own issue days x horizons x methods
    assert cycle_on(engine, config, small, 12).benchmarks == wanted
    assert made == [wanted]  # none of those A's issue times had were made again
    pd.testing.assert_frame_equal(_benchmark_rows(engine), expected)
    made.clear()
    assert cycle_on(engine, config, small, 12).benchmarks == 0
    assert made == []
    pd.testing.assert_frame_equal(_benchmark_rows(engine), expected)


def _activity(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT s.key, m.name, a.first_issued_at, a.last_issued_at, a.last_issue_period "
            "FROM forecast_activity a JOIN series s ON s.id = a.series_id "
            "JOIN models m ON m.id = a.model_id ORDER BY 1, 2",
        )


def test_activity_is_kept_the_same_with_no_benchmark_methods(
    config: Config, engine: Engine, small: Scenario, tmp_path: Path
) -> None:
    """With no methods the stage only aggregates the queued forecasts' activity in the store;
    the rows equal those kept while benchmarks are made, day by day and with a late backfill."""
    bare_url = f"sqlite:///{tmp_path / 'bare.db'}"
    bare = make_engine(bare_url)
    migrate(bare)
    bare_config = make_config(bare_url, benchmarks={"methods": []})
    late = small.forecasts["issued_at"] < day_start(small, 4)
    backfill = replace(small, forecasts=small.forecasts.loc[late])
    daily = replace(small, forecasts=small.forecasts.loc[~late])
    for store, settings in ((engine, config), (bare, bare_config)):
        load_through(store, settings, replace(daily, forecasts=daily.forecasts.iloc[:0]), -1)
        for day in range(8):
            feed_day(store, settings, daily, day)
            cycle_on(store, settings, small, day)
        load_through(store, settings, replace(backfill, actuals=backfill.actuals.iloc[:0]), 7)
        cycle_on(store, settings, small, 8)
    expected = _activity(engine)
    assert len(expected) == small.forecasts[["series_id", "model"]].drop_duplicates().shape[0]
    assert (expected["first_issued_at"] < day_start(small, 4).timestamp()).all()  # backfill
    pd.testing.assert_frame_equal(_activity(bare), expected)
    bare.dispose()
