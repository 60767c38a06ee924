"""Replay: history already in the store, detection evaluated day by day, nothing stored.

The invented scenario's level shift starts on a known day (its own definition): the replay
must raise its alerts after that day and not before, for that series only, and must leave the
findings and baselines tables as they were.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import Engine

from aftercast.cli import main
from aftercast.periods import parse_instant
from aftercast.replay import replay
from aftercast.scenario import ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from tests.conftest import make_config
from tests.test_detect_run_feed import load_through

SHIFTED = "shop-002/rye"
SECTIONS = {"window": {"days": 14}, "baseline": {"days": 14}}


def _counts(engine: Engine) -> tuple[int, int, int]:
    with engine.connect() as connection:
        frame = read_frame(
            connection,
            "SELECT (SELECT COUNT(*) FROM findings) AS f, (SELECT COUNT(*) FROM baselines) AS b, "
            "(SELECT COUNT(*) FROM detections) AS d",
        )
    return tuple(int(v) for v in frame.iloc[0])  # type: ignore[return-value]


def test_replay_raises_the_shift_after_it_starts_and_stores_nothing(
    engine: Engine,
    store_url: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    config = make_config(store_url, **SECTIONS)
    spec = ScenarioSpec(
        n_series=18, days=36, horizons=3, history_days=21, seed=2, models=("shop-planner",),
        degraded={SHIFTED: ("level_shift", 26)},
    )  # fmt: skip
    scenario = generate(spec)
    load_through(engine, config, scenario, 35)  # the whole history, no cycle run yet
    start = parse_instant("2026-06-17T23:00:00Z")
    report = replay(engine, config, start, parse_instant("2026-07-06T23:00:00Z"))
    assert _counts(engine) == (0, 0, 0)
    assert report.days == 20 and report.alerts
    assert {a["series_id"] for a in report.alerts} == {SHIFTED}
    onset = pd.Timestamp("2026-06-01", tz="UTC") + pd.Timedelta(days=26)
    assert min(pd.Timestamp(a["raised_at"]) for a in report.alerts) >= onset
    assert "coverage_low" in report.per_detection
    path = tmp_path / "aftercast.yaml"
    path.write_text(json.dumps({"store": {"url": store_url}, **SECTIONS}))
    capsys.readouterr()
    args = ["--config", str(path), "replay", "--from", "2026-06-17T23:00:00Z", "--to",
            "2026-07-06T23:00:00Z", "--json"]  # fmt: skip
    assert main(args) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed["alerts"] == report.alerts
    monkeypatch.delenv("COLUMNS", raising=False)  # in a pipe, with no width to fit
    assert main(args[:-1]) == 0  # the table shows every header and cell whole
    table = capsys.readouterr().out
    assert "\u2026" not in table and " severity " in table and "coverage_low" in table
    assert main([*args[:-5], "--from", "2026-07-06", "--to", "2026-06-01"]) == 2
