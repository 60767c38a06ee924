"""The config's `series:` entries hold for series already stored, as far as their data allows.

Expectations come from what the entry says and from the rule `ingest series` already follows
for its own rows: a series' periods are fixed once it holds forecasts or actuals. Both stores.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from sqlalchemy import Engine, text

from aftercast.config import Config
from aftercast.cycle import run_cycle
from aftercast.ingest import ingest_path
from aftercast.periods import parse_instant
from aftercast.store.catalog import ensure_series, sync_series_entries
from aftercast.store.db import write
from tests.conftest import make_config

KEY = "shop-017/rye"


def entry_config(url: str, *entries: dict[str, Any]) -> Config:
    # The entry under test comes after one for another series: its key names index 1.
    return make_config(url, series=[{"id": "shop-001/white"}, *entries])


def stored(engine: Engine, key: str = KEY) -> dict[str, Any]:
    with engine.connect() as connection:
        row = connection.execute(
            text("SELECT frequency, season, timezone, unit, labels FROM series WHERE key = :k"),
            {"k": key},
        ).one()
    return {**row._asdict(), "labels": json.loads(row.labels)}


def create(engine: Engine, config: Config, *keys: str) -> None:
    with write(engine) as connection:
        ensure_series(connection, config, pd.Series(list(keys)))


def add_actuals(engine: Engine, config: Config, tmp_path: Path) -> None:
    path = tmp_path / "actuals.csv"
    pd.DataFrame(
        {"series_id": KEY, "observed_at": ["2026-06-01", "2026-06-02"], "value": [10.0, 12.0]}
    ).to_csv(path, index=False)
    assert ingest_path(engine, config, "actuals", path).accepted == 2


def test_labels_and_unit_of_a_stored_series_follow_its_entry(
    engine: Engine, store_url: str, tmp_path: Path
) -> None:
    first = entry_config(store_url, {"id": KEY, "labels": {"team": "bakery", "region": "north"}})
    create(engine, first, KEY)
    add_actuals(engine, first, tmp_path)  # data does not hold labels or unit back
    with engine.begin() as connection:  # a label from elsewhere (a series file)
        connection.execute(
            text("UPDATE series SET labels = :l WHERE key = :k"),
            {"l": json.dumps({"team": "bakery", "region": "north", "shelf": "a"}), "k": KEY},
        )
    later = entry_config(store_url, {"id": KEY, "unit": "loaves", "labels": {"team": "planning"}})
    assert sync_series_entries(engine, later) == []
    after = stored(engine)
    assert after["unit"] == "loaves"
    assert after["labels"] == {"team": "planning", "region": "north", "shelf": "a"}
    assert (after["frequency"], after["season"], after["timezone"]) == ("D", 7, "UTC")
    # Nothing left to change: a second pass writes nothing and says nothing.
    assert sync_series_entries(engine, later) == [] and stored(engine) == after


def test_period_settings_change_only_while_the_series_holds_no_data(
    engine: Engine, store_url: str, tmp_path: Path
) -> None:
    plain = entry_config(store_url, {"id": KEY})
    create(engine, plain, KEY, "shop-001/white")
    hourly = entry_config(
        store_url, {"id": KEY, "frequency": "h", "season": 24, "timezone": "Europe/London"}
    )
    assert sync_series_entries(engine, hourly) == []
    assert stored(engine) == {
        "frequency": "h",
        "season": 24,
        "timezone": "Europe/London",
        "unit": None,
        "labels": {},
    }
    add_actuals(engine, hourly, tmp_path)
    daily = entry_config(store_url, {"id": KEY, "frequency": "D", "labels": {"team": "x"}})
    assert sync_series_entries(engine, daily) == [
        f"series[1].frequency: series {KEY!r} is stored with 'h' and has data; 'D' is not "
        "applied (a series with forecasts or actuals keeps its periods and season)"
    ]
    after = stored(engine)
    assert after["frequency"] == "h" and after["labels"] == {"team": "x"}  # labels still apply


def test_every_cycle_applies_the_entries_and_logs_what_it_cannot(
    engine: Engine, store_url: str, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    config = entry_config(store_url, {"id": KEY})
    create(engine, config, KEY)
    add_actuals(engine, config, tmp_path)
    changed = entry_config(store_url, {"id": KEY, "season": 14, "labels": {"team": "planning"}})
    with caplog.at_level(logging.WARNING, logger="aftercast.cycle"):
        run_cycle(engine, changed, parse_instant("2026-06-03T00:00:00Z"))
    assert stored(engine)["labels"] == {"team": "planning"}
    assert stored(engine)["season"] == 7
    (record,) = [r for r in caplog.records if r.name == "aftercast.cycle"]
    assert record.getMessage() == "series entry not applied"
    fields = record.aftercast_fields  # type: ignore[attr-defined]
    assert fields["key"] == "series[1].season"
    assert fields["detail"].startswith(f"series {KEY!r} is stored with 7 and has data")


def test_init_applies_the_entries_and_warns_in_one_line_each(
    engine: Engine, store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from aftercast.cli import main

    plain = entry_config(store_url)
    add_actuals(engine, plain, tmp_path)  # KEY now holds data, created with the defaults
    changed = {"id": KEY, "frequency": "h", "labels": {"pager": "night-desk"}}
    path = tmp_path / "aftercast.yaml"
    path.write_text(
        json.dumps({"store": {"url": store_url}, "series": [{"id": "shop-001/white"}, changed]}),
        encoding="utf-8",
    )
    assert main(["--config", str(path), "init"]) == 0
    warnings = capsys.readouterr().err.strip().splitlines()
    assert len(warnings) == 1 and warnings[0].startswith("aftercast: warning: series[1].frequency")
    assert stored(engine)["labels"] == {"pager": "night-desk"}  # applied by init, no cycle
    assert stored(engine)["frequency"] == "D"  # the stored period stays while data exists


def test_an_entry_label_a_series_file_removes_comes_back_at_the_next_sync(
    engine: Engine, store_url: str, tmp_path: Path
) -> None:
    config = entry_config(store_url, {"id": KEY, "labels": {"team": "planning"}})
    create(engine, config, KEY)
    path = tmp_path / "series.csv"
    path.write_text(f"series_id,label_team,label_shelf\n{KEY},,a\n")
    assert ingest_path(engine, config, "series", path).revised == 1
    assert stored(engine)["labels"] == {"shelf": "a"}  # the file removed team
    assert sync_series_entries(engine, config) == []
    assert stored(engine)["labels"] == {"team": "planning", "shelf": "a"}  # the entry on top


@pytest.mark.parametrize("path", ["file", "push"])
def test_a_series_first_created_by_a_series_file_takes_its_entry(
    engine: Engine, store_url: str, tmp_path: Path, path: str
) -> None:
    hourly = {"frequency": "h", "season": 24, "timezone": "Europe/Berlin", "unit": "loaves"}
    config = entry_config(
        store_url,
        {"id": KEY, **hourly, "labels": {"team": "planning"}},
        {"id": "shop-002/bun", "season": 12},
    )
    rows = [  # the entry wins where it speaks, the file's own cells fill in, defaults the rest
        {"series_id": KEY, "frequency": "D", "unit": "", "label_team": "x", "label_shelf": "a"},
        {"series_id": "shop-002/bun", "frequency": "h", "unit": "buns"},
        {"series_id": "shop-003/loaf", "unit": "loaves"},
    ]
    if path == "file":
        file = tmp_path / "series.csv"
        pd.DataFrame(rows).to_csv(file, index=False)
        assert ingest_path(engine, config, "series", file).accepted == 3
    else:
        from aftercast.ingest import ingest_records

        assert ingest_records(engine, config, "series", rows, "POST /v1/series").accepted == 3
    assert stored(engine) == {**hourly, "labels": {"team": "planning", "shelf": "a"}}
    bun = {"frequency": "h", "season": 12, "timezone": "UTC", "unit": "buns", "labels": {}}
    assert stored(engine, "shop-002/bun") == bun
    loaf = {"frequency": "D", "season": 7, "timezone": "UTC", "unit": "loaves", "labels": {}}
    assert stored(engine, "shop-003/loaf") == loaf
    assert sync_series_entries(engine, config) == []
    assert stored(engine)["frequency"] == "h"  # nothing left for the sync to correct
