"""Rolling-origin backtest: folds placed as scikit-learn's TimeSeriesSplit places them, errors
as the naive formula gives them (FPP3 section 5.2), measures as scikit-learn computes them;
5 folds by default (common practice: 5 to 10)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error, root_mean_squared_error
from sklearn.model_selection import TimeSeriesSplit
from sqlalchemy import Engine

from aftercast.backtest import BacktestOptions, fold_issues, run_backtest
from aftercast.cli import main
from aftercast.config import Config
from aftercast.scenario import ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from tests.test_detect_run_feed import load_through


def test_folds_are_those_of_time_series_split_with_a_gap_of_one() -> None:
    actuals = pd.DataFrame({"series_id": 1, "period": np.arange(100), "value": 0.0})
    series = pd.DataFrame({"series_id": [1], "season": [7]})
    options = BacktestOptions(horizon=7, folds=5)
    issues = fold_issues(actuals, series, options)["issue_period"].to_numpy()
    # At issue period P only periods before P are known and P + 1 .. P + h are the targets:
    # training ends one period before the test block, scikit-learn's `gap=1`.
    splits = TimeSeriesSplit(n_splits=5, test_size=7, gap=1).split(np.arange(100))
    for issue, (train, test) in zip(issues, splits, strict=True):
        assert train.max() == issue - 1
        assert test.tolist() == list(range(issue + 1, issue + 8))


def test_folds_without_enough_training_are_skipped() -> None:
    actuals = pd.DataFrame({"series_id": 1, "period": np.arange(40), "value": 0.0})
    series = pd.DataFrame({"series_id": [1], "season": [7]})
    issues = fold_issues(actuals, series, BacktestOptions(horizon=7, folds=5, initial=20))
    assert issues["issue_period"].tolist() == [25, 32]  # 4 and 11 have under 20 periods


def test_run_stores_pairs_whose_errors_and_summary_match_outside_definitions(
    engine: Engine, config: Config
) -> None:
    scenario = generate(ScenarioSpec(n_series=3, days=30, horizons=3, history_days=40, seed=4))
    load_through(engine, config, scenario, 29)
    seen: list[tuple[int, int]] = []
    result = run_backtest(
        engine, config, BacktestOptions(horizon=7, folds=5), lambda d, t: seen.append((d, t))
    )
    assert seen == [(k, 5) for k in range(1, 6)] and result.folds == 5 and result.series == 3
    with engine.connect() as connection:
        pairs = read_frame(
            connection,
            "SELECT p.series_id, p.issue_period, p.target_period, p.horizon, p.actual, p.point, "
            "m.name FROM backtest_pairs p JOIN models m ON m.id = p.model_id WHERE p.run_id = :r",
            {"r": result.run_id},
        )
        actuals = read_frame(connection, "SELECT series_id, period, value FROM actuals")
    assert len(pairs) == result.pairs == 3 * 5 * 7 * 2
    known = actuals.set_index(["series_id", "period"])["value"]
    naive = pairs.loc[pairs["name"] == "benchmark:naive"]
    # Naive (FPP3 5.2): the latest actual before the issue period.
    last = known.reindex(list(zip(naive["series_id"], naive["issue_period"] - 1, strict=True)))
    np.testing.assert_allclose(naive["point"], last.to_numpy())
    summary = {(r["method"], r["horizon"]): r for r in result.summary}
    for (name, horizon), part in pairs.groupby(["name", "horizon"]):
        row = summary[(name.removeprefix("benchmark:"), horizon)]
        assert row["mae"] == pytest.approx(mean_absolute_error(part["actual"], part["point"]))
        assert row["rmse"] == pytest.approx(root_mean_squared_error(part["actual"], part["point"]))


def test_command_prints_json_and_refuses_impossible_folds(
    engine: Engine,
    config: Config,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    scenario = generate(ScenarioSpec(n_series=2, days=10, horizons=3, history_days=60, seed=4))
    load_through(engine, config, scenario, 9)
    path = tmp_path / "aftercast.yaml"
    path.write_text(json.dumps({"store": {"url": config.store.url}}))
    capsys.readouterr()
    assert main(["--config", str(path), "backtest", "--json", "--horizon", "7"]) == 0
    out = capsys.readouterr()
    assert json.loads(out.out)["folds"] == 5
    monkeypatch.setenv("COLUMNS", "40")  # in a pipe the table is printed whole all the same
    assert main(["--config", str(path), "backtest", "--horizon", "7"]) == 0
    table = capsys.readouterr().out
    assert "\u2026" not in table and " cov 80% " in table and " seasonal-naive " in table
    assert main(["--config", str(path), "backtest", "--horizon", "60"]) == 2
    assert "no series has enough history" in capsys.readouterr().err
