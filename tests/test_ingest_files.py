"""Files longer than one chunk, malformed CSV lines, and what re-ingesting leaves behind.

The rules checked are the CONTRACT's (design.md, input columns): rows of one file that share a
key but disagree are all rejected with their row numbers, wherever they sit in the file; a bad
row is rejected with a reason while every good row is kept; re-ingesting the same rows changes
nothing. The yardstick for the chunked paths is the same file read as one chunk, and for a
malformed line the row numbers counted by hand. Both stores.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from sqlalchemy import Engine, text

from aftercast.config import Config
from aftercast.errors import InputFileError
from aftercast.ingest import ingest_chunks, ingest_path, ingest_records
from aftercast.ingest.files import Chunk, read_chunks
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config

ROWS = 2_500  # three chunks of 1,000 rows (the smallest chunk the config allows)


def _actual_rows(count: int) -> list[str]:
    days = pd.date_range("2026-01-01", periods=count, freq="h", tz="UTC")
    return [f"s{i % 7},{day:%Y-%m-%dT%H:%M:%SZ},{i}" for i, day in enumerate(days)]


def _write(path: Path, header: str, rows: list[str]) -> Path:
    path.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    return path


def _quarantine(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection, "SELECT row_number, reason FROM quarantine ORDER BY row_number, reason"
        )


def _actuals(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(
            connection,
            "SELECT s.key, a.observed_at, a.value FROM actuals a JOIN series s "
            "ON s.id = a.series_id ORDER BY s.key, a.observed_at",
        )


def _with_chunks(url: str, rows: int) -> Config:
    return make_config(url, ingest={"chunk_rows": rows}, series_defaults={"frequency": "h"})


@pytest.mark.parametrize("fmt", ["csv", "jsonl"])  # CSV is scanned in Arrow, others in pandas
def test_rows_that_disagree_in_different_chunks_are_both_rejected(
    engine: Engine, config: Config, tmp_path: Path, fmt: str
) -> None:
    rows = _actual_rows(ROWS)
    rows[1501] = rows[0].rsplit(",", 1)[0] + ",-99"  # row 1502: row 1's key, another value
    rows[2204] = rows[4]  # row 2205 repeats row 5 exactly: one value, not a conflict
    path = _write(tmp_path / "actuals.csv", "series_id,observed_at,value", rows)
    if fmt == "jsonl":
        frame = pd.read_csv(path, dtype={"value": float})
        path = tmp_path / "actuals.jsonl"
        frame.to_json(path, orient="records", lines=True)

    report = ingest_path(engine, _with_chunks(str(config.store.url), 1_000), "actuals", path)

    assert report.rejected == 2 and dict(report.rejected_reasons) == {
        "same key as another row with other values": 2
    }
    quarantined = _quarantine(engine)
    assert quarantined["row_number"].tolist() == [1, 1502]
    assert quarantined["reason"].tolist() == [
        "same key as another row with other values: row 1502",
        "same key as another row with other values: row 1",
    ]
    stored = _actuals(engine)
    assert len(stored) == ROWS - 2 - 1  # both conflicting rows out, the repeat stored once
    assert -99.0 not in set(stored["value"]) and 0.0 not in set(stored["value"])


def test_chunked_reading_rejects_what_one_chunk_rejects(config: Config, tmp_path: Path) -> None:
    rows = _actual_rows(ROWS)
    rows[10] = rows[3].rsplit(",", 1)[0] + ",-1"  # within the first chunk
    rows[2100] = rows[1200].rsplit(",", 1)[0] + ",-2"  # across the second and third
    path = _write(tmp_path / "actuals.csv", "series_id,observed_at,value", rows)
    results = []
    for chunk_rows in (1_000, 10_000):
        url = f"sqlite:///{tmp_path / f'chunks-{chunk_rows}.db'}"
        chunked = _with_chunks(url, chunk_rows)
        engine = make_engine(url)
        migrate(engine)
        ingest_path(engine, chunked, "actuals", path)
        results.append((_quarantine(engine), _actuals(engine)))
        engine.dispose()
    (q_small, a_small), (q_whole, a_whole) = results
    assert q_small["row_number"].tolist() == q_whole["row_number"].tolist() == [4, 11, 1201, 2101]
    pd.testing.assert_frame_equal(a_small, a_whole)


def test_malformed_csv_lines_are_rejected_in_place_and_the_rest_kept(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    rows = _actual_rows(ROWS)
    rows[1000] = rows[1000] + ",surplus"  # row 1001 starts the second chunk: one field too many
    rows[1700] = "s1"  # row 1701: too few fields
    path = _write(tmp_path / "actuals.csv", "series_id,observed_at,value", rows)

    report = ingest_path(engine, _with_chunks(str(config.store.url), 1_000), "actuals", path)

    assert report.accepted == ROWS - 2 and report.rejected == 2
    quarantined = _quarantine(engine)
    assert quarantined["row_number"].tolist() == [1001, 1701]
    assert quarantined["reason"].tolist() == [
        "malformed CSV line: 4 fields, the header has 3",
        "malformed CSV line: 1 fields, the header has 3",
    ]
    # Rows around them keep their own values: nothing shifted into a neighbour's place.
    stored = _actuals(engine).set_index("value")
    expected = {float(i) for i in range(ROWS)} - {1000.0, 1700.0}
    assert set(stored.index) == expected
    # The quarantine keeps each line as written, since it has no cells to show.
    with engine.connect() as connection:
        raw = read_frame(connection, "SELECT raw FROM quarantine ORDER BY row_number")["raw"]
    assert [json.loads(r) for r in raw] == [{"line": rows[1000]}, {"line": "s1"}]
    assert report.rejected_reasons == {"malformed CSV line": 2}


def test_a_long_malformed_line_is_kept_cut_with_its_length(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    line = "s1,2026-01-01T00:00:00Z,1," + "x" * 5_000
    path = _write(tmp_path / "actuals.csv", "series_id,observed_at,value", [line])
    ingest_path(engine, config, "actuals", path)
    with engine.connect() as connection:
        raw = json.loads(connection.execute(text("SELECT raw FROM quarantine")).scalar_one())
    assert raw == {"line": line[:2_000], "line_length": len(line)}


def test_ingesting_again_stores_no_second_quarantine_row_and_no_phantom_series(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = _write(
        tmp_path / "actuals.csv",
        "series_id,observed_at,value",
        ["kept,2026-01-01T00:00:00Z,1", "ghost,not a time,2", "kept,2026-01-02T00:00:00Z,nan"],
    )
    first = ingest_path(engine, config, "actuals", path)
    with engine.connect() as connection:
        before = connection.execute(text("SELECT COUNT(*) FROM quarantine")).scalar_one()
        keys = connection.execute(text("SELECT key FROM series")).scalars().all()
    again = ingest_path(engine, config, "actuals", path)
    with engine.connect() as connection:
        after = connection.execute(text("SELECT COUNT(*) FROM quarantine")).scalar_one()
    assert (first.rejected, again.rejected, again.unchanged) == (2, 2, 1)  # counted each time
    assert before == after == 2  # but stored once
    assert keys == ["kept"]  # a series whose only row was rejected is not created


def test_label_columns_of_a_series_file_are_read_not_ignored(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = _write(
        tmp_path / "series.csv",
        "series_id,frequency,season,label_team,comment",
        ["north/rye,D,7,bakers,first"],
    )
    report = ingest_path(engine, config, "series", path)
    assert report.ignored_columns == ["comment"]
    with engine.connect() as connection:
        labels = connection.execute(text("SELECT labels FROM series")).scalar_one()
    assert labels == '{"team": "bakers"}'


def test_a_series_file_may_not_move_the_periods_of_a_series_with_data(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    """The CONTRACT's definitions count horizons in the series' periods and scale errors by its
    season: once a series holds data, a file may relabel it but not move those."""
    header = "series_id,frequency,season,timezone,unit,label_team"
    first = _write(tmp_path / "s1.csv", header, ["a,D,7,UTC,loaves,ovens", "b,D,7,UTC,,ovens"])
    assert ingest_path(engine, config, "series", first).accepted == 2
    actuals = _write(tmp_path / "a.csv", "series_id,observed_at,value", ["a,2026-01-01,1"])
    ingest_path(engine, config, "actuals", actuals)
    refused = []
    for name, row in (("freq", "a,h,7,UTC,loaves,ovens"), ("season", "a,D,12,UTC,loaves,ovens")):
        report = ingest_path(
            engine, config, "series", _write(tmp_path / f"{name}.csv", header, [row])
        )
        refused.append((report.rejected, report.examples[0].split(": ", 1)[1]))
    assert (
        refused
        == [(1, "frequency, timezone or season cannot change once the series holds data")] * 2
    )
    rows = [
        "a,D,7,UTC,trays,counter",  # labels and unit only: applied
        "b,h,24,Europe/Paris,,counter",  # b holds no data yet: everything applied
        "c,D,7,Mars/Olympus,,x",  # no such time zone
    ]
    report = ingest_path(engine, config, "series", _write(tmp_path / "s2.csv", header, rows))
    assert report.rejected == 1 and "timezone" in report.examples[0]
    with engine.connect() as connection:
        stored = read_frame(connection, "SELECT * FROM series ORDER BY key").set_index("key")
    assert (stored.loc["a", "frequency"], stored.loc["a", "season"]) == ("D", 7)
    assert (stored.loc["a", "unit"], stored.loc["a", "labels"]) == ("trays", '{"team": "counter"}')
    assert (stored.loc["b", "frequency"], stored.loc["b", "season"]) == ("h", 24)
    assert stored.loc["b", "timezone"] == "Europe/Paris" and "c" not in stored.index


def test_text_that_is_not_unicode_and_a_season_too_long_are_rejected_not_errors(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    """JSON may escape a lone surrogate (RFC 8259 allows `\\ud800`), which UTF-8, and so no
    store, can hold; such a row is rejected like any bad row, as is a season the store's
    integer column cannot hold (the pushed case an OpenAPI fuzzer found)."""
    from aftercast.ingest import ingest_records

    pushed: list[dict[str, Any]] = [
        {"series_id": "north/\ud8d0rye"},
        {"series_id": "north/wheat", "season": 10**20},
        {"series_id": "north/rye", "season": 7},
    ]
    report = ingest_records(engine, config, "series", pushed, "POST /v1/series")
    assert (report.accepted, report.rejected) == (1, 2)
    assert report.examples == [
        "POST /v1/series row 1: series_id is not Unicode text",
        "POST /v1/series row 2: season is not a whole number from 1 to 1000000: "
        "'100000000000000000000'",
    ]
    path = tmp_path / "actuals.jsonl"
    path.write_text(
        '{"series_id": "north/rye", "observed_at": "2026-01-01\\udd21", "value": 1}\n'
        '{"series_id": "north/rye", "observed_at": "2026-01-02", "value": 2}\n',
        encoding="utf-8",
    )
    report = ingest_path(engine, config, "actuals", path)
    assert (report.accepted, report.rejected) == (1, 1)
    assert report.examples == [f"{path} row 1: observed_at is not Unicode text"]


def test_a_nul_character_is_rejected_where_postgresql_could_not_store_it(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    """PostgreSQL's text type cannot hold NUL (its documentation, "Character Types"); pandas'
    text hash table would also have read "zz\\x00" as "zz". Each such row is rejected."""
    path = tmp_path / "actuals.csv"
    path.write_bytes(
        b"series_id,observed_at,value\n"
        b"zz,2026-01-01T00:00:00Z\x00,1\n"
        b"zz\x00,2026-01-02T00:00:00Z,2\n"
        b"zz,2026-01-03T00:00:00Z,3\n"
    )
    report = ingest_path(engine, config, "actuals", path)
    assert (report.accepted, report.rejected) == (1, 2)
    assert [e.split(": ", 1)[1] for e in report.examples] == [
        "unparseable observed_at: '2026-01-01T00:00:00Z\\x00'",
        "series_id holds a NUL character",
    ]
    assert _actuals(engine)["key"].tolist() == ["zz"]
    alone = tmp_path / "alone.csv"  # its only key holds a NUL: never even looked up
    alone.write_bytes(b"series_id,observed_at,value\ns\x00,2026-01-01T00:00:00Z,1\n")
    assert ingest_path(engine, config, "actuals", alone).rejected == 1


def test_a_key_of_a_nul_alone_and_an_empty_key_stay_two_rejections(
    engine: Engine, config: Config
) -> None:
    """pandas' text hash table reads "\x00" as "": factorized together, the empty key took the
    NUL text and reached the store's lookup, which PostgreSQL refuses ("cannot contain NUL").
    Found by the API's generated requests (tests/test_web_openapi.py) on PostgreSQL."""
    rows = [{"series_id": "\x00"}, {"series_id": ""}, {"series_id": "ok"}]
    report = ingest_records(engine, config, "series", rows, "push")
    assert (report.accepted, report.rejected) == (1, 2)
    assert sorted(e.split(": ", 1)[1] for e in report.examples) == [
        "missing series_id",
        "series_id holds a NUL character",
    ]


@pytest.mark.parametrize("chunk_rows", [1_000, 200_000])
def test_blank_json_lines_are_skipped_and_rows_keep_their_line_numbers(
    engine: Engine, config: Config, tmp_path: Path, chunk_rows: int
) -> None:
    good = '{"series_id": "s", "observed_at": "2026-01-%02d", "value": %d}'
    bad = ['{"series_id": "s", "value": 3}', '{"series_id": "s", "observed_at": "2026-01-04"}']
    lines = [good % (1, 1), "", "   \t", good % (2, 2), bad[0]]
    lines += [""] * 1_200  # with 1,000-row chunks, one chunk of blank lines alone
    lines += [good % (3, 3), bad[1], ""]
    path = tmp_path / "actuals.jsonl"
    path.write_text("\r\n".join(lines) + "\n", encoding="utf-8")
    chunked = make_config(str(config.store.url), ingest={"chunk_rows": chunk_rows})
    report = ingest_path(engine, chunked, "actuals", path)
    assert (report.accepted, report.rejected) == (3, 2)
    # The file's own line numbers of the two bad lines, counted by the standard library.
    text = path.read_text(encoding="utf-8").splitlines()
    numbers = [n for n, line in enumerate(text, start=1) if line in bad]
    assert _quarantine(engine)["row_number"].tolist() == numbers == [5, 1207]
    assert _actuals(engine)["value"].tolist() == [1.0, 2.0, 3.0]


def test_json_lines_of_blank_lines_alone_are_a_file_without_rows(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = tmp_path / "empty.jsonl"
    path.write_text("\n  \n\n", encoding="utf-8")
    with pytest.raises(InputFileError, match="the file has no rows, only blank lines"):
        ingest_path(engine, config, "actuals", path)


def test_a_csv_line_of_white_space_is_blank_not_malformed(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = tmp_path / "actuals.csv"
    blank = "  \t \n\n,,\n"  # white space, an empty line, empty fields: each keeps its place
    path.write_text(
        f"series_id,observed_at,value\ns,2026-01-01,1\n{blank}s,2026-01-02,x\ns,2026-01-03,3\n  \n",
        encoding="utf-8",
    )
    report = ingest_path(engine, config, "actuals", path)
    assert (report.accepted, report.rejected) == (2, 1)
    # The bad row is row 5, the sixth line of the file, whichever blank lines come before it.
    assert _quarantine(engine).values.tolist() == [[5, "value is not a finite number: 'x'"]]


def test_a_batch_that_cannot_be_read_leaves_no_unfinished_log_row(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    header = "series_id,observed_at,value"
    not_utf8 = tmp_path / "bytes.csv"
    not_utf8.write_bytes(f"{header}\ns1,2026-01-01,\n".encode() + b"\xff\n")
    unreadable = [
        not_utf8,
        _write(tmp_path / "header.csv", header, []),
        _write(tmp_path / "columns.csv", "series_id,value", ["s1,1"]),
    ]
    for _ in range(2):  # as a source pulls it again and again
        for path in unreadable:
            with pytest.raises(InputFileError):
                ingest_chunks(engine, config, "actuals", path.name, read_chunks(path, 1_000))

    def broken() -> Iterator[Chunk]:  # one chunk stored, then the body breaks off
        yield from read_chunks(_write(tmp_path / "ok.csv", header, ["s1,2026-01-01,1"]), 1_000)
        raise InputFileError("ok.csv: cut short")

    with pytest.raises(InputFileError, match="the 1 rows before it were kept"):
        ingest_chunks(engine, config, "actuals", "ok.csv", broken())
    with engine.connect() as connection:
        log = read_frame(connection, "SELECT source, accepted, finished_at FROM ingest_log")
    assert log[["source", "accepted"]].values.tolist() == [["ok.csv", 1]]
    assert log["finished_at"].notna().all()


def test_a_json_line_that_is_valid_json_but_not_an_object_is_that_rows_rejection(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    good = '{"series_id": "s", "observed_at": "2026-01-0%d", "value": %d}'
    lines = [good % (1, 1), "[1, 2]", "5", good % (2, 2), "null", '"text"']
    path = tmp_path / "actuals.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    report = ingest_path(engine, config, "actuals", path)
    assert (report.accepted, report.rejected) == (2, 4)
    assert _quarantine(engine)["row_number"].tolist() == [2, 3, 5, 6]
    assert report.rejected_reasons == {"not a JSON object": 4}
