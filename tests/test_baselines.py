"""Baselines: made from the first days of each key, frozen, reset (logged), seeded by a backtest.

Outside sources: scikit-learn's mean_absolute_error and root_mean_squared_error on the very
pairs of the baseline window; the reset log must hold what was discarded.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error, root_mean_squared_error
from sqlalchemy import Engine

from aftercast.cli import main
from aftercast.periods import parse_instant
from aftercast.scenario import Scenario, ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from tests.conftest import make_config
from tests.test_detect_run_feed import cycle_on, feed_day, load_through

SECTIONS = {"window": {"days": 14}, "baseline": {"days": 14}}
KEY = "shop-001/rye"


@pytest.fixture
def scenario() -> Scenario:
    spec = ScenarioSpec(n_series=4, days=24, horizons=7, history_days=21, seed=9,
                        models=("shop-planner",))  # fmt: skip
    return generate(spec)


@pytest.fixture
def fed(store_url: str, scenario: Scenario, tmp_path: Path) -> Iterator[tuple[Engine, Path]]:
    config = make_config(store_url, **SECTIONS)
    from aftercast.store.db import make_engine, migrate

    engine = make_engine(store_url)
    migrate(engine)
    load_through(engine, config, scenario, 15)
    for day in range(16, 20):
        feed_day(engine, config, scenario, day)
        cycle_on(engine, config, scenario, day)
    path = tmp_path / "aftercast.yaml"
    path.write_text(json.dumps({"store": {"url": store_url}, **SECTIONS}))
    yield engine, path
    engine.dispose()


def _pairs(engine: Engine, start: int, end: int, low: int, high: int) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT p.actual, p.point, p.target_period FROM pairs p JOIN series s "
            "ON s.id = p.series_id JOIN models m ON m.id = p.model_id WHERE s.key = :k AND "
            "m.name = 'shop-planner' AND p.target_at > :a AND p.target_at <= :b AND "
            "p.horizon BETWEEN :lo AND :hi",
            {"k": KEY, "a": start, "b": end, "lo": low, "hi": high},
        )


def _show(path: Path, capsys: pytest.CaptureFixture[str], *extra: str) -> list[dict[str, Any]]:
    capsys.readouterr()
    assert (
        main(["--config", str(path), "baselines", "show", "--json", "--series", KEY, *extra]) == 0
    )
    return json.loads(capsys.readouterr().out)


def test_first_days_baseline_matches_sklearn_on_its_window(
    fed: tuple[Engine, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    engine, path = fed
    rows = {r["bucket"]: r for r in _show(path, capsys)}
    assert set(rows) == {"1", "2-7"}
    for bucket, (low, high) in (("1", (1, 1)), ("2-7", (2, 7))):
        row = rows[bucket]
        assert row["source"] == "first-days"
        start, end = parse_instant(row["window_start"]), parse_instant(row["window_end"])
        assert end - start == 14 * 86_400
        pairs = _pairs(engine, start, end, low, high)
        assert row["pairs"] == len(pairs) and row["targets"] == pairs["target_period"].nunique()
        assert row["mae"] == pytest.approx(mean_absolute_error(pairs["actual"], pairs["point"]))
        assert row["rmse"] == pytest.approx(
            root_mean_squared_error(pairs["actual"], pairs["point"])
        )


def test_freeze_reset_and_the_reset_log(
    fed: tuple[Engine, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    engine, path = fed
    before = {r["bucket"]: r for r in _show(path, capsys)}
    args = ["--config", str(path), "baselines", "freeze", "--series", KEY,
            "--from", "2026-06-08T00:00:00Z", "--to", "2026-06-18T00:00:00Z"]  # fmt: skip
    assert main(args) == 0
    frozen = {r["bucket"]: r for r in _show(path, capsys)}
    assert frozen["1"]["source"] == "manual"
    pairs = _pairs(engine, parse_instant("2026-06-08"), parse_instant("2026-06-18"), 1, 1)
    assert frozen["1"]["mae"] == pytest.approx(mean_absolute_error(pairs["actual"], pairs["point"]))
    assert frozen["1"]["mae"] != before["1"]["mae"]
    reset = ["--config", str(path), "baselines", "reset", "--series", KEY, "--reason",
             "retrained", "--by", "tester", "--at", "2026-06-20T00:00:00Z"]  # fmt: skip
    assert main(reset) == 0
    assert _show(path, capsys) == []
    with engine.connect() as connection:
        log = read_frame(
            connection, "SELECT reason, actor, reset_at, previous FROM baseline_resets"
        )
    assert log[["reason", "actor"]].values.tolist() == [["retrained", "tester"]]
    discarded = json.loads(log["previous"].iloc[0])
    assert {d["mae"] for d in discarded} == {frozen["1"]["mae"], frozen["2-7"]["mae"]}
    # New baselines collect from the reset on; other series keep theirs.
    assert main(["--config", str(path), "baselines", "reset"]) == 2  # no selection: refused
    capsys.readouterr()
    assert main(["--config", str(path), "baselines", "show", "--json"]) == 0
    assert {r["series"] for r in json.loads(capsys.readouterr().out)} == {
        "shop-001/sourdough", "shop-001/white", "shop-001/wholemeal"
    }  # fmt: skip


def test_a_reset_baseline_is_collected_again_after_the_reset(
    fed: tuple[Engine, Path], scenario: Scenario, capsys: pytest.CaptureFixture[str]
) -> None:
    engine, path = fed
    at = "2026-06-05T06:00:00Z"
    assert main(["--config", str(path), "baselines", "reset", "--series", KEY, "--at", at]) == 0
    assert _show(path, capsys) == []
    config = make_config(str(engine.url.render_as_string(hide_password=False)), **SECTIONS)
    for day in range(20, 22):
        feed_day(engine, config, scenario, day)
        cycle_on(engine, config, scenario, day)
    # The new window is the 14 days after the reset, made once they (and a settle day) passed.
    rows = _show(path, capsys)
    assert {r["window_start"] for r in rows} == {at}
    assert {r["window_end"] for r in rows} == {"2026-06-19T06:00:00Z"}


def test_backtest_pairs_seed_baselines(
    fed: tuple[Engine, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    engine, path = fed
    capsys.readouterr()
    args = ["--config", str(path), "backtest", "--json", "--folds", "5", "--horizon", "7",
            "--initial", "14"]  # fmt: skip
    assert main(args) == 0
    run = json.loads(capsys.readouterr().out)
    args = ["--config", str(path), "baselines", "seed", "--run", str(run["run_id"]), "--model",
            "shop-planner"]  # fmt: skip
    assert main(args) == 0
    rows = {r["bucket"]: r for r in _show(path, capsys)}
    assert rows["2-7"]["source"] == f"backtest:{run['run_id']}"
    with engine.connect() as connection:
        backtest = read_frame(
            connection,
            "SELECT p.actual, p.point FROM backtest_pairs p JOIN series s ON s.id = p.series_id "
            "JOIN models m ON m.id = p.model_id WHERE s.key = :k AND m.name = :m "
            "AND p.horizon BETWEEN 2 AND 7 AND p.run_id = :r",
            {"k": KEY, "r": run["run_id"], "m": "benchmark:seasonal-naive"},
        )
    assert rows["2-7"]["mae"] == pytest.approx(
        mean_absolute_error(backtest["actual"], backtest["point"])
    )
