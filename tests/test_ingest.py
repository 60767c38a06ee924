"""Ingest: every CONTRACT rejection, idempotency and revisions, on SQLite and PostgreSQL.

The expected values here are the CONTRACT's own rules (design.md: input columns), applied to
small hand-made rows; each test names the rule it checks.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import Engine, text

from aftercast.config import Config
from aftercast.cycle import run_cycle
from aftercast.errors import InputFileError
from aftercast.ingest import ingest_path
from aftercast.periods import parse_instant
from tests.conftest import write_csv

FORECAST_HEADER = "series_id,model,issued_at,target_at,point,lower_80,upper_80"
ACTUAL_HEADER = "series_id,observed_at,value"


def _count(engine: Engine, table: str) -> int:
    with engine.connect() as connection:
        return int(connection.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar_one())


def _dump(engine: Engine, tables: list[str]) -> dict[str, list[tuple[object, ...]]]:
    with engine.connect() as connection:
        out = {}
        for table in tables:
            rows = connection.execute(text(f"SELECT * FROM {table}")).all()
            out[table] = sorted(tuple(r) for r in rows)
        return out


def test_bad_rows_are_rejected_with_reasons_and_good_rows_kept(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = write_csv(
        tmp_path / "f.csv",
        FORECAST_HEADER,
        "s1,m,2026-01-01T06:00Z,2026-01-02,10,8,12",  # good
        "s1,m,2026-01-01T06:00Z,2026-01-01,10,8,12",  # target in the issue period
        "s1,m,yesterday,2026-01-03,10,8,12",  # unparseable time
        "s1,m,2026-01-01T06:00Z,2026-01-04,NaN,8,12",  # non-finite point
        "s1,m,2026-01-01T06:00Z,2026-01-05,inf,8,12",  # infinite point
        "s1,m,2026-01-01T06:00Z,2026-01-06,7,8,12",  # lower above point
        "s1,m,2026-01-01T06:00Z,2026-01-07,13,8,12",  # point above upper
        ",m,2026-01-01T06:00Z,2026-01-08,10,8,12",  # missing key
        "s2,m,2026-01-01T06:00Z,2026-01-02,10,8,12",  # same key as next row, other values
        "s2,m,2026-01-01T06:00Z,2026-01-02,11,8,12",
        "s1,m,2026-01-01T06:00Z,2026-01-09,10,8,12",  # good
    )
    report = ingest_path(engine, config, "forecasts", path)
    assert report.accepted == 2
    assert report.rejected == 9
    assert report.rejected_reasons == {
        "target_at is not after the issue period": 1,
        "unparseable issued_at": 1,
        "point is not a finite number": 2,
        "lower_80 > point": 1,
        "point > upper_80": 1,
        "missing series_id": 1,
        "same key as another row with other values": 2,
    }
    assert _count(engine, "forecasts") == 2
    assert _count(engine, "quarantine") == 9
    with engine.connect() as connection:
        rows = connection.execute(
            text("SELECT row_number, reason, raw FROM quarantine ORDER BY row_number")
        ).all()
    numbers = [r[0] for r in rows]
    assert numbers == [2, 3, 4, 5, 6, 7, 8, 9, 10]
    conflict = {r[0]: r[1] for r in rows}
    assert conflict[9].endswith("row 10") and conflict[10].endswith("row 9")
    assert json.loads(rows[1][2])["issued_at"] == "yesterday"


def test_level_outside_range_and_horizon_disagreement(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    path = write_csv(
        tmp_path / "f.csv",
        "series_id,model,issued_at,target_at,point,lower_120,upper_120,horizon",
        "s1,m,2026-01-01T06:00Z,2026-01-02,10,8,12,1",
        "s1,m,2026-01-01T06:00Z,2026-01-03,10,,,5",
    )
    report = ingest_path(engine, config, "forecasts", path)
    assert report.rejected_reasons == {
        "level outside (0, 100)": 1,
        "horizon column disagrees with the times": 1,
    }
    with engine.connect() as connection:
        reasons = connection.execute(text("SELECT reason FROM quarantine")).scalars().all()
    # The column's number is quoted as written (5), not as the float it was read into (5.0).
    assert "horizon column disagrees with the times: column says 5, times give 2" in reasons


@pytest.mark.parametrize(
    ("name", "content", "message"),
    [
        ("f.txt", b"series_id\n", "unknown file type"),
        ("f.csv", b"", "the file is empty"),
        (
            "f.csv",
            b"series_id,model,issued_at,point\ns,m,2026-01-01,1\n",
            "missing required column target_at",
        ),
        (
            "f.csv",
            "series_id,model,issued_at,target_at,point\ns\xe9,m,2026-01-01,2026-01-02,1\n".encode(
                "latin-1"
            ),
            "not UTF-8",
        ),
        ("f.csv", b"series_id,model,issued_at,target_at,point\n", "no rows"),
        ("f.parquet", b"not parquet at all", "not a readable Parquet file"),
    ],
)
def test_unreadable_files_raise_one_line(
    engine: Engine, config: Config, tmp_path: Path, name: str, content: bytes, message: str
) -> None:
    path = tmp_path / name
    path.write_bytes(content)
    with pytest.raises(InputFileError) as caught:
        ingest_path(engine, config, "forecasts", path)
    assert message in str(caught.value)
    assert str(path) in str(caught.value)
    assert "\n" not in str(caught.value)


def _example_files(tmp_path: Path) -> tuple[Path, Path]:
    forecasts = write_csv(
        tmp_path / "f.csv",
        FORECAST_HEADER,
        *[
            f"s1,m,2026-01-{d:02d}T06:00Z,2026-01-{d + h:02d},{10 + h},{8 + h},{12 + h}"
            for d in range(1, 15)
            for h in (1, 2)
        ],
    )
    actuals = write_csv(
        tmp_path / "a.csv",
        ACTUAL_HEADER,
        *[f"s1,2026-01-{d:02d},{10 + (d % 7)}" for d in range(1, 17)],
    )
    return forecasts, actuals


# aftercast adds its own benchmark forecasts; these tests look at the model they ingested.
PRODUCTION = "model_id = (SELECT id FROM models WHERE name = 'm')"
PAIR_TABLES = ["forecasts", "actuals", "pairs", "pair_intervals"]


def _pairs_without_times(engine: Engine) -> list[tuple[object, ...]]:
    with engine.connect() as connection:
        rows = connection.execute(
            text(
                "SELECT forecast_id, actual, point, error, scale_abs FROM pairs "
                f"WHERE {PRODUCTION} ORDER BY forecast_id"
            )
        ).all()
    return [tuple(r) for r in rows]


def test_ingest_twice_changes_nothing(engine: Engine, config: Config, tmp_path: Path) -> None:
    forecasts, actuals = _example_files(tmp_path)
    ingest_path(engine, config, "forecasts", forecasts)
    ingest_path(engine, config, "actuals", actuals)
    run_cycle(engine, config, parse_instant("2026-01-20"))
    before = _dump(engine, ["forecasts", "actuals", "actual_history"])
    pairs_before = _pairs_without_times(engine)
    again_f = ingest_path(engine, config, "forecasts", forecasts)
    again_a = ingest_path(engine, config, "actuals", actuals)
    assert (again_f.accepted, again_f.unchanged, again_f.revised) == (0, 28, 0)
    assert (again_a.accepted, again_a.unchanged, again_a.revised) == (0, 16, 0)
    run_cycle(engine, config, parse_instant("2026-01-21"))
    assert _dump(engine, ["forecasts", "actuals", "actual_history"]) == before
    assert _pairs_without_times(engine) == pairs_before


def test_both_arrival_orders_give_the_same_pairs(
    config: Config, tmp_path: Path, engine: Engine
) -> None:
    forecasts, actuals = _example_files(tmp_path)
    ingest_path(engine, config, "actuals", actuals)
    run_cycle(engine, config, parse_instant("2026-01-20"))
    ingest_path(engine, config, "forecasts", forecasts)
    run_cycle(engine, config, parse_instant("2026-01-20"))
    late = _pairs_without_times(engine)
    assert len(late) == 28
    # Forecasts first, in a fresh SQLite store.
    from aftercast.store.db import make_engine, migrate

    other = make_engine(f"sqlite:///{tmp_path / 'other.db'}")
    migrate(other)
    ingest_path(other, config, "forecasts", forecasts)
    run_cycle(other, config, parse_instant("2026-01-20"))
    ingest_path(other, config, "actuals", actuals)
    run_cycle(other, config, parse_instant("2026-01-20"))
    early = _pairs_without_times(other)
    assert [r[1:] for r in early] == [r[1:] for r in late]


def test_revised_actual_wins_keeps_history_and_rescores(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    forecasts, actuals = _example_files(tmp_path)
    ingest_path(engine, config, "forecasts", forecasts)
    ingest_path(engine, config, "actuals", actuals)
    run_cycle(engine, config, parse_instant("2026-01-20"))
    revision = write_csv(tmp_path / "rev.csv", ACTUAL_HEADER, "s1,2026-01-03,100")
    report = ingest_path(engine, config, "actuals", revision)
    assert (report.accepted, report.revised) == (0, 1)
    run_cycle(engine, config, parse_instant("2026-01-20"))
    with engine.connect() as connection:
        history = connection.execute(
            text(
                "SELECT value, revision FROM actual_history h JOIN series s ON s.id = h.series_id "
                "WHERE s.key = 's1' ORDER BY revision"
            )
        ).all()
        used = connection.execute(
            text("SELECT actual, error, point, actual_revision FROM pairs WHERE target_at = :t"),
            {"t": parse_instant("2026-01-03")},
        ).all()
    old = [v for v, r in history if r == 0]
    assert [v for v, r in history if r == 1] == [100.0] and old
    assert used and all(a == 100.0 and e == 100.0 - p and r == 1 for a, e, p, r in used)
    # Pairs issued after the revised period are rescored too: their scale used the old value.
    fresh = _fresh_store_pairs(tmp_path, config, [forecasts, actuals, revision])
    assert _pairs_as_values(engine) == fresh


def _pairs_as_values(engine: Engine) -> list[tuple[object, ...]]:
    with engine.connect() as connection:
        rows = connection.execute(
            text(
                "SELECT issued_at, target_at, actual, error, scale_abs, scaled_error FROM pairs "
                f"WHERE {PRODUCTION} ORDER BY issued_at, target_at"
            )
        ).all()
    return [tuple(round(v, 9) if isinstance(v, float) else v for v in r) for r in rows]


def _fresh_store_pairs(
    tmp_path: Path, config: Config, files: list[Path]
) -> list[tuple[object, ...]]:
    from aftercast.store.db import make_engine, migrate

    fresh = make_engine(f"sqlite:///{tmp_path / 'fresh.db'}")
    migrate(fresh)
    ingest_path(fresh, config, "forecasts", files[0])
    for path in files[1:]:
        ingest_path(fresh, config, "actuals", path)
    run_cycle(fresh, config, parse_instant("2026-01-20"))
    return _pairs_as_values(fresh)


def test_naive_times_use_the_series_time_zone(tmp_path: Path, store_url: str) -> None:
    from aftercast.store.db import make_engine, migrate
    from tests.conftest import make_config

    config = make_config(store_url, series=[{"id": "berlin", "timezone": "Europe/Berlin"}])
    engine = make_engine(store_url)
    migrate(engine)
    path = write_csv(
        tmp_path / "a.csv", ACTUAL_HEADER, "berlin,2026-07-01T00:30,5", "utc,2026-07-01T00:30,5"
    )
    ingest_path(engine, config, "actuals", path)
    with engine.connect() as connection:
        rows: dict[str, int] = dict(
            connection.execute(
                text(
                    "SELECT s.key, a.observed_at FROM actuals a JOIN series s ON s.id = a.series_id"
                )
            )
            .tuples()
            .all()
        )
    # Berlin is UTC+2 in July: local 00:30 is 22:30 UTC the day before.
    assert rows["berlin"] == parse_instant("2026-06-30T22:30Z")
    assert rows["utc"] == parse_instant("2026-07-01T00:30Z")


def test_parquet_and_jsonl_read_like_csv(engine: Engine, config: Config, tmp_path: Path) -> None:
    frame = pd.DataFrame(
        {
            "series_id": ["p1", "p1"],
            "observed_at": ["2026-01-01", "2026-01-02"],
            "value": [1.0, 2.0],
        }
    )
    frame.to_parquet(tmp_path / "a.parquet")
    frame.assign(series_id="j1").to_json(tmp_path / "a.jsonl", orient="records", lines=True)
    (tmp_path / "bad.jsonl").write_text(
        '{"series_id": "j2", "observed_at": "2026-01-01", "value": 3}\n{oops\n'
    )
    assert ingest_path(engine, config, "actuals", tmp_path / "a.parquet").accepted == 2
    assert ingest_path(engine, config, "actuals", tmp_path / "a.jsonl").accepted == 2
    bad = ingest_path(engine, config, "actuals", tmp_path / "bad.jsonl")
    assert (bad.accepted, bad.rejected) == (1, 1)
    assert bad.rejected_reasons == {"not a JSON object": 1}


def _quarantined(engine: Engine) -> list[tuple[int, str]]:
    with engine.connect() as connection:
        rows = connection.execute(text("SELECT row_number, reason FROM quarantine")).all()
    return sorted((int(number), str(reason)) for number, reason in rows)


def test_local_times_the_clock_change_skips_or_repeats_are_rejected_saying_so(
    engine: Engine, store_url: str, tmp_path: Path
) -> None:
    from tests.conftest import make_config

    # UK clocks in 2026 (gov.uk "When do the clocks change?", the IANA tz database): forward at
    # 01:00 GMT on 29 March (01:30 local never happens), back at 02:00 BST on 25 October (01:30
    # local happens twice).
    config = make_config(store_url, series_defaults={"timezone": "Europe/London"})
    path = write_csv(
        tmp_path / "a.csv",
        ACTUAL_HEADER,
        "gap,2026-03-29T01:30,1",
        "twice,2026-10-25T01:30:00,2",
        "written,2026-10-25T01:30+01:00,3",  # with its offset: one instant, kept
        "later,2026-03-30T01:30,4",  # an ordinary night: kept
        "bad,29/03/2026,5",
    )
    report = ingest_path(engine, config, "actuals", path)
    assert (report.accepted, report.rejected) == (2, 3)
    assert report.rejected_reasons == {
        "nonexistent local observed_at": 1,
        "ambiguous local observed_at": 1,
        "unparseable observed_at": 1,
    }
    london = "Europe/London (the clocks go {}); give the time with its UTC offset"
    assert _quarantined(engine) == [
        (
            1,
            "nonexistent local observed_at: '2026-03-29T01:30' does not exist in "
            + london.format("forward over it"),
        ),
        (
            2,
            "ambiguous local observed_at: '2026-10-25T01:30:00' happens twice in "
            + london.format("back over it"),
        ),
        (5, "unparseable observed_at: '29/03/2026'"),
    ]

    # Parquet keeps naive datetimes as datetimes, not text: the same reasons.
    frame = pd.DataFrame(
        {
            "series_id": ["p", "p"],
            "model": ["m", "m"],
            "issued_at": pd.to_datetime(["2026-03-20T00:00", "2026-03-20T00:00"]),
            "target_at": pd.to_datetime(["2026-03-29T01:15", "2026-03-30T01:15"]),
            "point": [1.0, 2.0],
        }
    )
    frame.to_parquet(tmp_path / "f.parquet")
    forecasts = ingest_path(engine, config, "forecasts", tmp_path / "f.parquet")
    assert (forecasts.accepted, forecasts.rejected) == (1, 1)
    assert forecasts.rejected_reasons == {"nonexistent local target_at": 1}
    assert forecasts.examples == [
        f"{tmp_path / 'f.parquet'} row 1: nonexistent local target_at: '2026-03-29 01:15:00' "
        "does not exist in " + london.format("forward over it")
    ]
