"""`aftercast status`: CONTRACT JSON rows, CSV, the table, filters, sorting and paging.

Check values come from outside the project: scikit-learn for the measures of the rows,
Python's fnmatch for the series pattern, plain sorting of the full JSON for `--sort`, and the
CONTRACT (design.md) for the row's fields and nulls.
"""

from __future__ import annotations

import csv
import io
import json
from fnmatch import fnmatchcase
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from sklearn import metrics
from sqlalchemy import Engine

from aftercast.cli import main
from aftercast.config import Config, load_config
from aftercast.ingest import ingest_chunks
from aftercast.ingest.files import Chunk
from aftercast.matching import match
from aftercast.periods import parse_instant
from aftercast.report import StatusQuery, open_status, window_status
from aftercast.scenario import ScenarioSpec, generate
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate
from aftercast.window_store import find_window, refresh_windows
from tests.conftest import STATUS_CONTRACT as CONTRACT
from tests.conftest import make_config

NOW = "2026-06-18T12:00:00Z"
SECTIONS: dict[str, Any] = {
    "window": {"name": "recent", "days": 7},
    "windows": [{"name": "latest", "points": 5}],
    "horizon_buckets": ["2-3"],
}


def _fill(engine: Engine, config: Config) -> None:
    scenario = generate(
        ScenarioSpec(n_series=6, days=20, horizons=3, models=("a", "b"), history_days=14, seed=5)
    )
    actuals = scenario.actuals.copy()
    actuals.loc[actuals.index[-40:-38], "value"] = 0.0  # zero actuals: left out of MAPE
    for kind, frame in (
        ("series", scenario.series),
        ("actuals", actuals),
        ("forecasts", scenario.forecasts),
    ):
        ingest_chunks(engine, config, kind, kind, iter([Chunk(frame.reset_index(drop=True), 1)]))
    now = parse_instant(NOW)
    refresh_windows(engine, config, now, match(engine, now).touched)


@pytest.fixture
def store(tmp_path: Path) -> tuple[Path, Config, Engine]:
    url = f"sqlite:///{tmp_path / 'status.db'}"
    path = tmp_path / "aftercast.yaml"
    path.write_text(yaml.safe_dump({"store": {"url": url}, **SECTIONS}), encoding="utf-8")
    config = load_config(str(path))
    engine = make_engine(url)
    migrate(engine)
    _fill(engine, config)
    return path, config, engine


def _cli(capsys: pytest.CaptureFixture[str], config: Path, *args: str) -> str:
    capsys.readouterr()
    assert main(["--config", str(config), "status", "--now", NOW, *args]) == 0
    return capsys.readouterr().out


def _strict_json(text: str) -> Any:
    def no_nan(name: str) -> None:
        raise AssertionError(f"{name} in JSON output (CONTRACT: null, never NaN)")

    return json.loads(text, parse_constant=no_nan)


def test_json_rows_follow_the_contract(
    store: tuple[Path, Config, Engine], capsys: pytest.CaptureFixture[str]
) -> None:
    path, config, engine = store
    rows = _strict_json(_cli(capsys, path, "--json"))
    assert rows and all(set(CONTRACT) <= set(r) for r in rows)
    # CONTRACT: horizon is an integer or "all"; the configured bucket 2-3 is not a horizon.
    assert {r["horizon"] for r in rows} == {1, 2, 3, "all"}
    assert not any("horizon_bucket" in r for r in rows)
    with_buckets = _strict_json(_cli(capsys, path, "--json", "--buckets"))
    assert with_buckets[: len(rows)] == rows
    buckets = with_buckets[len(rows) :]
    assert buckets and all("horizon" not in r and r["horizon_bucket"] == "2-3" for r in buckets)
    assert all(set(CONTRACT) - {"horizon"} <= set(r) for r in buckets)
    rows = with_buckets
    assert all(set(r["coverage"]) == {"80", "95"} for r in rows)
    # Every row against scikit-learn on the pairs of its window.
    with engine.connect() as connection:
        pairs = read_frame(
            connection,
            "SELECT s.key AS series_id, m.name AS model, p.horizon, p.actual, p.point, "
            "p.target_at FROM pairs p JOIN series s ON s.id = p.series_id "
            "JOIN models m ON m.id = p.model_id",
        )
    now = parse_instant(NOW)
    pairs = pairs[(pairs["target_at"] > now - 7 * 86_400) & (pairs["target_at"] <= now)]
    for row in rows:
        mine = pairs[(pairs["series_id"] == row["series_id"]) & (pairs["model"] == row["model"])]
        if "horizon_bucket" in row:
            mine = mine[mine["horizon"].between(2, 3)]
        elif row["horizon"] != "all":
            mine = mine[mine["horizon"] == row["horizon"]]
        assert row["n"] == len(mine)
        assert row["mae"] == pytest.approx(
            metrics.mean_absolute_error(mine["actual"], mine["point"])
        )
        nonzero = mine[mine["actual"] != 0]
        assert row["mape_excluded"] == len(mine) - len(nonzero)
        assert row["mape"] == pytest.approx(
            100 * metrics.mean_absolute_percentage_error(nonzero["actual"], nonzero["point"])
        )
        assert row["window_end"] == NOW


def test_json_is_the_same_from_stored_sums_and_from_pairs(
    store: tuple[Path, Config, Engine], capsys: pytest.CaptureFixture[str]
) -> None:
    path, config, engine = store
    stored = _strict_json(_cli(capsys, path, "--json"))
    now = parse_instant(NOW)
    refresh_windows(engine, config, now + 3600, None)  # the stored sums move on
    from_pairs = _strict_json(_cli(capsys, path, "--json"))
    assert len(stored) == len(from_pairs)
    for a, b in zip(stored, from_pairs, strict=True):
        assert a.keys() == b.keys()
        assert _close(a, b)


def _close(a: dict[str, Any], b: dict[str, Any]) -> bool:
    for key, value in a.items():
        other = b[key]
        if isinstance(value, dict):
            assert _close(value, other)
        elif isinstance(value, float):
            assert other == pytest.approx(value, rel=1e-9), key
        else:
            assert value == other, key
    return True


def test_filters_match_fnmatch_and_labels(
    store: tuple[Path, Config, Engine], capsys: pytest.CaptureFixture[str]
) -> None:
    path, config, engine = store
    everything = _strict_json(_cli(capsys, path, "--json", "--buckets"))
    pattern = "shop-00[12]/*"
    got = _strict_json(
        _cli(
            capsys,
            path,
            *("--json", "--buckets", "--series", pattern, "--model", "b", "--horizon", "2-3"),
        )
    )
    want = [
        r
        for r in everything
        if fnmatchcase(r["series_id"], pattern)
        and r["model"] == "b"
        and r.get("horizon_bucket") == "2-3"
    ]
    assert got == want and got
    with engine.connect() as connection:
        labels = read_frame(connection, "SELECT key, labels FROM series")
    team = {
        k: json.loads(v).get("team") for k, v in zip(labels["key"], labels["labels"], strict=True)
    }
    got = _strict_json(_cli(capsys, path, "--json", "--buckets", "--label", "team=planning"))
    assert got == [r for r in everything if team[r["series_id"]] == "planning"] and got


def test_sort_worst_first_and_limit(
    store: tuple[Path, Config, Engine], capsys: pytest.CaptureFixture[str]
) -> None:
    path, _config, _engine = store
    everything = _strict_json(_cli(capsys, path, "--json"))
    worst = sorted(everything, key=lambda r: -r["mae"])[:4]
    got = _strict_json(_cli(capsys, path, "--json", "--sort", "mae", "--limit", "4"))
    assert [r["mae"] for r in got] == [r["mae"] for r in worst]
    gaps = sorted(
        max(abs(v - float(k) / 100) for k, v in r["coverage"].items()) for r in everything
    )[::-1][:3]
    got = _strict_json(_cli(capsys, path, "--json", "--sort", "coverage", "--limit", "3"))
    assert [max(abs(v - float(k) / 100) for k, v in r["coverage"].items()) for r in got] == gaps


def test_csv_has_the_json_values(
    store: tuple[Path, Config, Engine], capsys: pytest.CaptureFixture[str]
) -> None:
    path, _config, _engine = store
    rows = _strict_json(_cli(capsys, path, "--json"))
    table = list(csv.DictReader(io.StringIO(_cli(capsys, path, "--csv"))))
    assert len(table) == len(rows)
    for line, row in zip(table, rows, strict=True):
        assert line["series_id"] == row["series_id"] and line["horizon"] == str(row["horizon"])
        assert float(line["rmse"]) == pytest.approx(row["rmse"])
        assert float(line["coverage_95"]) == pytest.approx(row["coverage"]["95"])
        assert float(line["pinball_90"]) == pytest.approx(row["pinball"]["90"])
    assert "horizon_bucket" not in table[0]
    rows = _strict_json(_cli(capsys, path, "--json", "--buckets"))
    table = list(csv.DictReader(io.StringIO(_cli(capsys, path, "--csv", "--buckets"))))
    assert [(line["horizon"], line["horizon_bucket"]) for line in table] == [
        (str(r.get("horizon", "")), r.get("horizon_bucket", "")) for r in rows
    ]


def test_table_shows_worst_rows_first(
    store: tuple[Path, Config, Engine],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    path, _config, _engine = store
    monkeypatch.setenv("COLUMNS", "60")  # not a terminal: the table is not cut to any width
    out = _cli(capsys, path, "--horizon", "all", "--limit", "3", "--window", "latest")
    assert "worst mase first" in out and "3 of 12 rows" in out
    header = next(line for line in out.splitlines() if " series " in line)
    assert "\u2026" not in out and " MAPE % " in header and header.rstrip().endswith(" TS ┃")
    out = _cli(capsys, path, "--buckets", "--horizon", "2-3", "--limit", "0")
    assert out.count("bucket 2-3") == 12


def test_table_leaves_benchmark_models_out_unless_asked(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """aftercast's own benchmark models are scored like any model and stay in --json and
    --csv (CONTRACT rows per model); the table, read to find production forecasts in trouble,
    shows them only with --benchmarks show or when one is named with --model."""
    url = f"sqlite:///{tmp_path / 'bm.db'}"
    path = tmp_path / "aftercast.yaml"
    path.write_text(yaml.safe_dump({"store": {"url": url}, **SECTIONS}), encoding="utf-8")
    engine = make_engine(url)
    migrate(engine)
    scenario = generate(
        ScenarioSpec(n_series=3, days=20, horizons=3, models=("a", "b"), history_days=14, seed=5)
    )
    for kind in ("series", "actuals", "forecasts"):
        frame = getattr(scenario, kind).reset_index(drop=True)
        ingest_chunks(engine, load_config(str(path)), kind, kind, iter([Chunk(frame, 1)]))
    monkeypatch.setenv("COLUMNS", "200")
    capsys.readouterr()
    assert main(["--config", str(path), "cycle", "--now", NOW]) == 0  # makes the benchmarks
    rows = _strict_json(_cli(capsys, path, "--json", "--horizon", "all"))
    models = {r["model"] for r in rows}
    assert {"a", "b"} < models and any(m.startswith("benchmark:") for m in models)
    production = [r for r in rows if not r["model"].startswith("benchmark:")]
    hidden = _cli(capsys, path, "--horizon", "all", "--limit", "0")
    assert "benchmark:" not in hidden.replace("--benchmarks show", "")
    assert f"{len(production)} of" not in hidden and hidden.count("│ all │") == len(production)
    assert "left out: --benchmarks show" in hidden
    shown = _cli(capsys, path, "--horizon", "all", "--limit", "0", "--benchmarks", "show")
    assert shown.count("│ all │") == len(rows)
    named = _cli(capsys, path, "--horizon", "all", "--model", "benchmark:naive")
    assert named.count("benchmark:naive") == sum(r["model"] == "benchmark:naive" for r in rows)
    assert len(_strict_json(_cli(capsys, path, "--json", "--benchmarks", "hide"))) < len(
        _strict_json(_cli(capsys, path, "--json"))
    )


def test_pages_of_one_series_give_the_same_rows(store_url: str) -> None:
    config = make_config(store_url, **SECTIONS)
    engine = make_engine(store_url)
    migrate(engine)
    try:
        _fill(engine, config)
        window = find_window(config, "latest")
        now = parse_instant(NOW) - 86_400  # not the stored clock: computed from the pairs
        query = StatusQuery(window, now, ("2-3",), sort="rmse")
        with open_status(engine, query, page_series=1) as small:
            paged = list(small.rows)
        with open_status(engine, query, page_series=1_000) as large:
            whole = list(large.rows)
        # PostgreSQL may add a group's terms in another order: equal up to rounding.
        assert len(paged) == small.total == len(whole) == 6 * 2 * 5
        assert all(_close(a, b) for a, b in zip(paged, whole, strict=True))
        assert [r["rmse"] for r in whole] == sorted((r["rmse"] for r in whole), reverse=True)
        frame = window_status(engine, window, now, ("2-3",))
        assert len(frame) == len(whole)
        assert np.isclose(
            frame["rmse"].sort_values().to_numpy(), np.sort([r["rmse"] for r in whole])
        ).all()
    finally:
        engine.dispose()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--label", "team"], "--label 'team': expected NAME=VALUE"),
        (["--window", "nope"], "window 'nope': no such window; configured: recent, latest"),
        (["--horizon", "soon"], "--horizon 'soon': expected a number"),
        (["--horizon", "2-3"], "--horizon '2-3' is a horizon bucket: add --buckets"),
        (["--buckets", "--horizon", "4-5"], "--horizon '4-5': not a configured horizon bucket"),
    ],
)
def test_user_errors_are_one_line(
    store: tuple[Path, Config, Engine],
    capsys: pytest.CaptureFixture[str],
    args: list[str],
    message: str,
) -> None:
    path, _config, _engine = store
    capsys.readouterr()
    assert main(["--config", str(path), "status", *args]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"aftercast: error: {message}") and "\n" not in err


def test_cycle_then_status_on_the_command_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The user's path: ingest files, run a cycle, read status.
    scenario = generate(
        ScenarioSpec(n_series=2, days=12, horizons=2, models=("a",), history_days=14, seed=1)
    )
    path = tmp_path / "aftercast.yaml"
    path.write_text(
        yaml.safe_dump({"store": {"url": f"sqlite:///{tmp_path / 'c.db'}"}, **SECTIONS}),
        encoding="utf-8",
    )
    for kind, frame in (("actuals", scenario.actuals), ("forecasts", scenario.forecasts)):
        file = tmp_path / f"{kind}.csv"
        frame.to_csv(file, index=False)
        assert main(["--config", str(path), "ingest", kind, str(file)]) == 0
    assert main(["--config", str(path), "cycle", "--now", "2026-06-10T12:00:00Z"]) == 0
    capsys.readouterr()
    assert main(["--config", str(path), "status", "--json", "--now", "2026-06-10T12:00Z"]) == 0
    rows = _strict_json(capsys.readouterr().out)
    produced = {(r["series_id"], r["horizon"]) for r in rows if r["model"] == "a"}
    assert produced == {(s, h) for s in scenario.series["series_id"] for h in (1, 2, "all")}
    n = {(r["series_id"], r["model"], r["horizon"]): r["n"] for r in rows}
    for series, model, horizon in n:
        if horizon == "all":  # the "all" row pools the horizons (CONTRACT)
            assert n[series, model, "all"] == sum(
                v for (s, m, h), v in n.items() if (s, m) == (series, model) and isinstance(h, int)
            )
