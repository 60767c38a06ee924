"""`ingest series`: bad seasons and label columns, rows that disagree, and ingesting again.

The rules are the CONTRACT's (design.md, input columns): a bad row is rejected with a reason and
its row number while the good rows are kept; rows of one file that share a key but disagree
are all rejected, naming each other, as forecasts and actuals are; re-ingesting the same rows
changes nothing. Expected values are the input rows themselves, counted by hand. Both stores.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from sqlalchemy import Engine, event

from aftercast.config import MAX_SEASON, Config
from aftercast.errors import InputFileError
from aftercast.ingest import ingest_path
from aftercast.store.bulk import read_frame
from tests.conftest import make_config, write_csv

HEADER = "series_id,frequency,season,unit,label_team"


def _quarantine(engine: Engine) -> list[tuple[int, str]]:
    with engine.connect() as connection:
        frame = read_frame(connection, "SELECT row_number, reason FROM quarantine")
    return sorted(zip(frame["row_number"].astype(int), frame["reason"], strict=True))


def _series(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(connection, "SELECT * FROM series ORDER BY key").set_index("key")


def test_a_season_that_is_not_a_whole_number_in_range_is_rejected_naming_the_row(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    cells = ["abc", "2.5", "-1", "0", "0x10", str(MAX_SEASON + 1), "7.0", " 12 ", ""]
    rows = [f"s{i},D,{cell},,x" for i, cell in enumerate(cells)]
    report = ingest_path(engine, config, "series", write_csv(tmp_path / "s.csv", HEADER, *rows))
    assert (report.accepted, report.rejected) == (3, 6)
    reason = f"season is not a whole number from 1 to {MAX_SEASON}"
    assert report.rejected_reasons == {reason: 6}
    assert _quarantine(engine) == [(i + 1, f"{reason}: '{cells[i]}'") for i in range(6)]
    stored = _series(engine)["season"]
    assert stored.to_dict() == {"s6": 7, "s7": 12, "s8": config.series_defaults.season}


def test_pushed_seasons_of_other_types_are_checked_alike(engine: Engine, config: Config) -> None:
    from aftercast.ingest import ingest_records

    pushed: list[dict[str, Any]] = [
        {"series_id": "text", "season": "weekly"},
        {"series_id": "true", "season": True},
        {"series_id": "whole", "season": 7.0},
    ]
    report = ingest_records(engine, config, "series", pushed, "POST /v1/series")
    assert (report.accepted, report.rejected) == (1, 2)
    assert [line.split(": ", 2)[2] for line in report.examples] == ["'weekly'", "'True'"]


@pytest.mark.parametrize("column", ["label_", "label_ "])
def test_a_label_column_without_a_name_is_an_error_naming_it(
    engine: Engine, config: Config, tmp_path: Path, column: str
) -> None:
    path = write_csv(tmp_path / "s.csv", f"series_id,label_team,{column}", "s,bakers,x")
    with pytest.raises(InputFileError) as error:
        ingest_path(engine, config, "series", path)
    assert str(error.value).startswith(f"{path}: column {column!r} has no label name")
    assert _series(engine).empty


def test_rows_of_one_series_that_disagree_are_rejected_and_repeats_count_once(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    rows = [
        "a,D,7,loaves,bakers",
        "b,D,7,,ovens",
        "a,D,7,loaves,counter",  # a's label disagrees with row 1
        "b,D,7,,ovens",  # b repeated exactly: one series
        "c,h,24,,night",
        "a,D,7,loaves,bakers",  # row 1 again: still a's rows disagree
    ]
    report = ingest_path(engine, config, "series", write_csv(tmp_path / "s.csv", HEADER, *rows))
    assert (report.accepted, report.rejected, report.unchanged) == (2, 3, 1)
    same = "same key as another row with other values: row"
    assert _quarantine(engine) == [(1, f"{same} 3, 6"), (3, f"{same} 1, 6"), (6, f"{same} 1, 3")]
    assert _series(engine).index.tolist() == ["b", "c"]


def test_rows_of_one_series_disagreeing_across_chunks_are_rejected(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    rows = [f"s{i},D,7,,team{i % 3}" for i in range(2_500)]
    rows[1_700] = "s5,D,14,,team2"  # row 1701 disagrees with row 6 (s5), two chunks apart
    rows[2_100] = rows[8]  # row 2101 repeats row 9 exactly
    path = write_csv(tmp_path / "s.csv", HEADER, *rows)
    chunked = make_config(str(config.store.url), ingest={"chunk_rows": 1_000})
    report = ingest_path(engine, chunked, "series", path)
    assert (report.rejected, report.unchanged) == (2, 1)
    assert [number for number, _ in _quarantine(engine)] == [6, 1701]
    assert len(_series(engine)) == 2_500 - 2 - 1


def test_ingesting_a_series_file_again_changes_nothing(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    rows = ["a,D,7,loaves,bakers", "b,h,24,,", "c,,,,ovens"]
    path = write_csv(tmp_path / "s.csv", HEADER + ",label_region", *(r + ",north" for r in rows))
    first = ingest_path(engine, config, "series", path)
    before = _series(engine)
    again = ingest_path(engine, config, "series", path)
    assert (first.accepted, first.revised, first.unchanged) == (3, 0, 0)
    assert (again.accepted, again.revised, again.unchanged) == (0, 0, 3)
    pd.testing.assert_frame_equal(_series(engine), before)  # updated_at included
    edited = write_csv(tmp_path / "s2.csv", HEADER, "a,D,7,trays,bakers", *rows[1:])
    third = ingest_path(engine, config, "series", edited)
    assert (third.accepted, third.revised, third.unchanged) == (0, 1, 2)  # only a's unit moved
    assert _labels(engine)["b"] == {"region": "north"}  # no label_region column: region stays


def _pushed_and_from_lines(
    engine: Engine,
    config: Config,
    folder: Path,
    pushed: list[dict[str, object]],
    lines: list[str],
) -> tuple[int, int]:
    """Rows accepted from `pushed` records (as the API ingests them), then from a JSON Lines
    file of `lines`."""
    from aftercast.ingest import ingest_records

    by_api = ingest_records(engine, config, "series", pushed, "POST /v1/series").accepted
    path = folder / "s.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return by_api, ingest_path(engine, config, "series", path).accepted


def test_label_numbers_are_stored_as_written_pushed_or_in_json_lines(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    # A null in the column makes pandas read its numbers as floats; 5 must not become "5.0".
    pushed: list[dict[str, object]] = [
        {"series_id": "a", "label_store": 5, "label_ratio": 1.5},
        {"series_id": "b", "label_store": None, "label_ratio": None},
        {"series_id": "c", "label_store": "0017", "label_ratio": 2},
    ]
    lines = ['{"series_id": "d", "label_shelf": 12}', '{"series_id": "e", "label_shelf": null}']
    assert _pushed_and_from_lines(engine, config, tmp_path, pushed, lines) == (3, 2)
    assert _labels(engine) == {
        "a": {"store": "5", "ratio": "1.5"},
        "b": {},
        "c": {"store": "0017", "ratio": "2"},
        "d": {"shelf": "12"},
        "e": {},
    }


def _labels(engine: Engine) -> dict[str, dict[str, str]]:
    return {key: json.loads(text) for key, text in _series(engine)["labels"].items()}


def test_a_series_file_sets_only_its_label_columns_and_an_empty_cell_removes_one(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    first = write_csv(
        tmp_path / "1.csv", "series_id,label_team,label_region", "a,bakers,north", "b,ovens,south"
    )
    ingest_path(engine, config, "series", first)
    units = write_csv(tmp_path / "2.csv", "series_id,unit", "a,loaves", "b,trays")
    report = ingest_path(engine, config, "series", units)
    assert (report.revised, report.unchanged) == (2, 0)
    assert _labels(engine) == {
        "a": {"region": "north", "team": "bakers"},
        "b": {"region": "south", "team": "ovens"},
    }
    edits = write_csv(
        tmp_path / "3.csv", "series_id,label_team,label_shelf", "a,,top", "b,counter, ", "c,,"
    )
    report = ingest_path(engine, config, "series", edits)
    assert (report.accepted, report.revised, report.unchanged) == (1, 2, 0)
    assert _labels(engine) == {
        "a": {"region": "north", "shelf": "top"},  # team removed, shelf added
        "b": {"region": "south", "team": "counter"},  # a blank cell removes too
        "c": {},
    }
    again = ingest_path(engine, config, "series", edits)
    assert (again.accepted, again.revised, again.unchanged) == (0, 0, 3)


def test_moving_periods_is_refused_for_actuals_or_forecasts_found_series_by_series(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    """The same check as the config's entries: a series holding actuals (a) or only forecasts (b)
    keeps its periods; one holding nothing (c) moves. The stored data is probed per series the
    file moves, never read whole (every statement on actuals or forecasts names its series)."""
    start = ["a,D,7,,x", "b,D,7,,x", "c,D,7,,x"]
    first = ingest_path(engine, config, "series", write_csv(tmp_path / "s.csv", HEADER, *start))
    assert first.accepted == 3
    ingest_path(
        engine,
        config,
        "actuals",
        write_csv(tmp_path / "a.csv", "series_id,observed_at,value", "a,2026-01-01,1"),
    )
    ingest_path(
        engine,
        config,
        "forecasts",
        write_csv(
            tmp_path / "f.csv",
            "series_id,model,issued_at,target_at,point",
            "b,m,2026-01-01,2026-01-02,1",
        ),
    )
    statements: list[str] = []
    listen = (engine, "before_cursor_execute")
    seen = lambda *args: statements.append(args[2])  # noqa: E731
    event.listen(*listen, seen)
    moved = ["a,h,24,,x", "b,h,24,,x", "c,h,24,,x"]
    report = ingest_path(engine, config, "series", write_csv(tmp_path / "m.csv", HEADER, *moved))
    event.remove(*listen, seen)
    reason = "frequency, timezone or season cannot change once the series holds data"
    assert (report.rejected, report.revised) == (2, 1)
    assert _quarantine(engine) == [(1, reason), (2, reason)]
    stored = _series(engine)
    assert list(stored["frequency"]) == ["D", "D", "h"]
    reads = [s for s in statements if re.search(r"\bFROM (actuals|forecasts)\b", s)]
    assert reads and all(re.search(r"\.series_id = s\.id\b", s) for s in reads), reads


def test_label_booleans_are_stored_as_json_writes_them(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    # JSON's literals are `true` and `false` (RFC 8259, section 3); Python's str() would
    # store "True". A column of booleans only, and one mixed with text and a null.
    pushed: list[dict[str, object]] = [
        {"series_id": "a", "label_critical": True, "label_note": "x"},
        {"series_id": "b", "label_critical": False, "label_note": True},
    ]
    lines = ['{"series_id": "c", "label_pilot": true}', '{"series_id": "d", "label_pilot": null}']
    assert _pushed_and_from_lines(engine, config, tmp_path, pushed, lines) == (2, 2)
    assert _labels(engine) == {
        "a": {"critical": "true", "note": "x"},
        "b": {"critical": "false", "note": "true"},
        "c": {"pilot": "true"},
        "d": {},
    }
