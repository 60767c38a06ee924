"""Pulled sources: folder (once per content hash), SQL (after the watermark), schedules, config.

Outside references: file identity is checked with the standard library's `hashlib.sha256`; the
rows a SQL pull should read are counted with the standard library's `sqlite3` running the
same condition on the source database; cron due times follow crontab(5) ("0 6 * * *" fires
at 06:00 each day). The counts a pull reports must equal what `ingest --json` reports for the
same file (the issue's requirement), so that is checked against `ingest_path` on a fresh store.
"""

from __future__ import annotations

import hashlib
import logging
import os
import sqlite3
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine, text

from aftercast.config import Config, parse_config
from aftercast.errors import ConfigError
from aftercast.ingest import ingest_path
from aftercast.periods import parse_instant
from aftercast.settings.schedule import Schedule
from aftercast.sources.pull import pull_all, pull_source
from aftercast.sources.sql import decode_watermark
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config, write_csv

ACTUAL_HEADER = "series_id,observed_at,value"


def _config(engine: Engine, *sources: dict[str, object]) -> Config:
    return make_config(engine.url.render_as_string(hide_password=False), sources=list(sources))


def _scalar(engine: Engine, sql: str) -> object:
    with engine.connect() as connection:
        return connection.execute(text(sql)).scalar_one()


def _folder(path: Path, **extra: object) -> dict[str, object]:
    return {
        "type": "folder",
        "name": "drop",
        "kind": "actuals",
        "path": str(path),
        "settle_seconds": 0,
        **extra,
    }


def test_folder_reads_each_content_once_and_counts_like_ingest_json(
    engine: Engine, tmp_path: Path
) -> None:
    drop = tmp_path / "drop"
    drop.mkdir()
    first = write_csv(
        drop / "a.csv", ACTUAL_HEADER, "s1,2026-01-01,10", "s1,2026-01-02,x", "s2,2026-01-01,7"
    )
    config = _config(engine, _folder(drop))
    result = pull_source(engine, config, config.sources[0])
    assert result is not None and result.ok and result.batches == 1

    # Issue requirement: same counts and reasons as `ingest --json` on the same file.
    other = make_engine(f"sqlite:///{tmp_path / 'other.db'}")
    migrate(other)
    expected = ingest_path(other, config, "actuals", first).as_json()
    assert (result.accepted, result.rejected, result.rejected_reasons) == (
        expected["accepted"],
        expected["rejected"],
        expected["rejected_reasons"],
    )

    # The same bytes under another name are not read again (identity = SHA-256, hashlib).
    (drop / "copy-of-a.csv").write_bytes(first.read_bytes())
    again = pull_source(engine, config, config.sources[0])
    assert again is not None and again.ok and again.batches == 0
    recorded = _scalar(engine, "SELECT content_hash FROM source_files")
    assert recorded == hashlib.sha256(first.read_bytes()).hexdigest()
    assert _scalar(engine, "SELECT COUNT(*) FROM ingest_log") == 1


def test_folder_moves_done_and_unreadable_files_and_keeps_going(
    engine: Engine, tmp_path: Path
) -> None:
    drop = tmp_path / "drop"
    drop.mkdir()
    (drop / "bad.csv").write_bytes(b"series_id,observed_at,value\ns1,2026-01-01,\xff\xfe\n")
    os.utime(drop / "bad.csv", (time.time() - 10, time.time() - 10))  # read first
    write_csv(drop / "good.csv", ACTUAL_HEADER, "s1,2026-01-01,10")
    config = _config(engine, _folder(drop, after="move"))
    result = pull_source(engine, config, config.sources[0])
    assert result is not None
    assert result.ok and result.batches == 1 and result.batches_failed == 1
    assert "not UTF-8" in result.problems[0]
    assert sorted(p.name for p in (drop / "done").iterdir()) == ["good.csv"]
    assert sorted(p.name for p in (drop / "failed").iterdir()) == ["bad.csv"]
    assert not list(drop.glob("*.csv"))
    assert _scalar(engine, "SELECT COUNT(*) FROM actuals") == 1
    # The log holds the file that was read, finished; the unreadable one left no row behind.
    assert _scalar(engine, "SELECT COUNT(*) FROM ingest_log WHERE finished_at IS NOT NULL") == 1
    assert _scalar(engine, "SELECT COUNT(*) FROM ingest_log") == 1


def _aged_drop(folder: Path, *names: str) -> Path:
    """A drop folder with one actual per file, the files in `names`' order of age."""
    drop = folder / "drop"
    drop.mkdir()
    for age, name in enumerate(reversed(names), start=10):
        write_csv(drop / name, ACTUAL_HEADER, f"{name},2026-01-01,1")
        os.utime(drop / name, (time.time() - age, time.time() - age))
    return drop


def _vanishing(read: Callable[..., Any], name: str) -> Callable[..., Any]:
    """`read`, except that the file called `name` is removed first (another process took it)."""

    def wrapped(path: Path, *args: Any) -> Any:
        if path.name == name:
            path.unlink()
        return read(path, *args)

    return wrapped


def test_folder_files_that_vanish_are_warned_of_and_the_rest_are_read(
    engine: Engine,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
) -> None:
    import aftercast.sources.folder as folder

    drop = _aged_drop(tmp_path, "a.csv", "early.csv", "late.csv", "z.csv")
    # Removed between listing and hashing, and between hashing and reading.
    monkeypatch.setattr(folder, "content_hash", _vanishing(folder.content_hash, "early.csv"))
    monkeypatch.setattr(folder, "read_chunks", _vanishing(folder.read_chunks, "late.csv"))
    config = _config(engine, _folder(drop, after="move"))
    with caplog.at_level(logging.WARNING, logger="aftercast.sources"):
        result = pull_source(engine, config, config.sources[0])
    assert result is not None and result.ok, result
    assert (result.batches, result.batches_failed) == (2, 2)
    assert sorted(p.name for p in (drop / "done").iterdir()) == ["a.csv", "z.csv"]
    assert _scalar(engine, "SELECT COUNT(*) FROM actuals") == 2
    warned = [r.aftercast_fields for r in caplog.records if r.levelno == logging.WARNING]  # type: ignore[attr-defined]
    not_read = {f["batch"]: f["error"] for f in warned if f.get("source") == "drop"}
    assert (
        not_read[str(drop / "early.csv")]
        == f"{drop / 'early.csv'}: cannot read (No such file or directory)"
    )
    assert str(drop / "late.csv") in not_read


def test_folder_file_without_read_permission_is_skipped_until_readable(
    engine: Engine, tmp_path: Path
) -> None:
    drop = _aged_drop(tmp_path, "locked.csv", "open.csv")
    (drop / "locked.csv").chmod(0)
    if os.access(drop / "locked.csv", os.R_OK):
        pytest.skip("this user reads files without read permission (root)")
    config = _config(engine, _folder(drop))
    result = pull_source(engine, config, config.sources[0])
    assert result is not None and result.ok and (result.batches, result.batches_failed) == (1, 1)
    assert result.problems == [f"{drop / 'locked.csv'}: cannot read (Permission denied)"]
    (drop / "locked.csv").chmod(0o644)
    again = pull_source(engine, config, config.sources[0])
    assert again is not None and (again.batches, again.batches_failed) == (1, 0)
    assert _scalar(engine, "SELECT COUNT(*) FROM actuals") == 2


def test_folder_leaves_files_still_being_written(engine: Engine, tmp_path: Path) -> None:
    drop = tmp_path / "drop"
    drop.mkdir()
    write_csv(drop / "fresh.csv", ACTUAL_HEADER, "s1,2026-01-01,10")
    config = _config(engine, _folder(drop, settle_seconds=3600))
    result = pull_source(engine, config, config.sources[0])
    assert result is not None and result.ok and result.batches == 0


def _sales_db(path: Path) -> sqlite3.Connection:
    db = sqlite3.connect(path)
    db.execute("CREATE TABLE sales (store TEXT, day TEXT, qty REAL, loaded_at TEXT)")
    db.executemany(
        "INSERT INTO sales VALUES (?, ?, ?, ?)",
        [
            (f"shop-{i % 3}", f"2026-01-{1 + i // 3:02d}", 10.0 + i, f"2026-01-10 0{i % 4}:00:00")
            for i in range(12)
        ],
    )
    db.commit()
    return db


def test_sql_source_reads_only_rows_after_its_watermark(engine: Engine, tmp_path: Path) -> None:
    source_path = tmp_path / "warehouse.db"
    db = _sales_db(source_path)
    query = (
        "SELECT store AS series_id, day AS observed_at, qty AS value, loaded_at "
        "FROM sales WHERE loaded_at > :since ORDER BY loaded_at"
    )
    config = _config(
        engine,
        {
            "type": "sql",
            "name": "dw",
            "kind": "actuals",
            "url": f"sqlite:///{source_path}",
            "query": query,
            "watermark_column": "loaded_at",
        },
    )
    first = pull_source(engine, config, config.sources[0])
    assert first is not None and first.ok
    # sqlite3 (outside the project) says which rows the first pull should see: all of them.
    assert first.accepted == db.execute("SELECT COUNT(*) FROM sales").fetchone()[0]
    mark = db.execute("SELECT MAX(loaded_at) FROM sales").fetchone()[0]
    stored = _scalar(engine, "SELECT watermark FROM source_state WHERE name = 'dw'")
    assert decode_watermark(str(stored)) == mark

    # New rows after the mark, and a changed row loaded before it (which must not be read).
    db.executemany(
        "INSERT INTO sales VALUES (?, ?, ?, ?)",
        [
            ("shop-0", "2026-01-20", 50.0, "2026-01-11 00:00:00"),
            ("shop-1", "2026-01-20", 51.0, "2026-01-11 01:00:00"),
            ("shop-9", "2026-01-01", 99.0, "2026-01-09 00:00:00"),
        ],
    )
    db.commit()
    expected = db.execute("SELECT COUNT(*) FROM sales WHERE loaded_at > ?", (mark,)).fetchone()[0]
    second = pull_source(engine, config, config.sources[0])
    assert second is not None and second.ok
    read = second.accepted + second.revised + second.rejected + second.unchanged
    assert read == expected == 2
    assert _scalar(engine, "SELECT COUNT(*) FROM series WHERE key = 'shop-9'") == 0
    third = pull_source(engine, config, config.sources[0])
    assert third is not None and third.ok and third.batches == 0
    db.close()


def test_sql_source_with_epoch_watermark_and_failing_query(engine: Engine, tmp_path: Path) -> None:
    source_path = tmp_path / "epoch.db"
    db = sqlite3.connect(source_path)
    db.execute("CREATE TABLE a (sid TEXT, at TEXT, v REAL, version INTEGER)")
    db.executemany(
        "INSERT INTO a VALUES (?, ?, ?, ?)",
        [("s1", "2026-01-01", 1.0, 100), ("s1", "2026-01-02", 2.0, 200)],
    )
    db.commit()
    good = {
        "type": "sql",
        "name": "epoch",
        "kind": "actuals",
        "url": f"sqlite:///{source_path}",
        "query": "SELECT sid AS series_id, at AS observed_at, v AS value, version FROM a "
        "WHERE version > :since",
        "watermark_column": "version",
        "watermark_start": 0,
    }
    broken = {**good, "name": "broken", "query": "SELECT * FROM no_such_table WHERE 1 > :since"}
    config = _config(engine, broken, good)
    results = pull_all(engine, config)
    by_name = {r.name: r for r in results}
    assert not by_name["broken"].ok and "no_such_table" in str(by_name["broken"].error)
    assert by_name["epoch"].ok and by_name["epoch"].accepted == 2  # the failure stopped nothing
    assert (
        decode_watermark(
            str(_scalar(engine, "SELECT watermark FROM source_state WHERE name = 'epoch'"))
        )
        == 200
    )
    failures = _scalar(engine, "SELECT consecutive_failures FROM source_state WHERE name='broken'")
    assert failures == 1
    db.close()


def test_pull_all_pulls_only_due_sources(engine: Engine, tmp_path: Path) -> None:
    drop = tmp_path / "drop"
    drop.mkdir()
    config = _config(engine, _folder(drop, schedule={"interval_seconds": 3600}))
    now = parse_instant("2026-03-01T12:00:00Z")
    assert [r.name for r in pull_all(engine, config, now)] == ["drop"]
    assert pull_all(engine, config, now + 1800) == []
    assert [r.name for r in pull_all(engine, config, now + 3600)] == ["drop"]
    # A replay with an earlier clock pulls as a live run would.
    assert [r.name for r in pull_all(engine, config, now - 86_400)] == ["drop"]


def test_cron_schedule_is_due_at_its_fire_times() -> None:
    # crontab(5): "0 6 * * *" fires every day at 06:00 (here UTC).
    daily = Schedule(cron="0 6 * * *")
    last = parse_instant("2026-01-01T06:00:00Z")
    assert not daily.is_due(last, parse_instant("2026-01-02T05:59:59Z"))
    assert daily.is_due(last, parse_instant("2026-01-02T06:00:00Z"))
    assert daily.is_due(None, last)
    assert Schedule.model_validate(90).interval_seconds == 90
    assert Schedule.model_validate("*/5 * * * *").cron == "*/5 * * * *"


@pytest.mark.parametrize(
    ("sources", "needle"),
    [
        ([{"type": "ftp", "name": "x", "kind": "actuals"}], "sources.0"),
        ([{"type": "folder", "name": "x", "kind": "actuals", "path": "."}] * 2, "unique"),
        (
            [{"type": "folder", "name": "x", "kind": "actuals", "path": ".", "schedule": "nope"}],
            "cron",
        ),
        (
            [{"type": "http", "name": "x", "kind": "sales", "url": "http://h"}],
            "sources.0.http.kind",
        ),
        ([{"type": "sql", "name": "x", "kind": "actuals", "url": "sqlite://"}], "query"),
    ],
)
def test_bad_source_config_is_one_line_naming_the_key(
    sources: list[dict[str, object]], needle: str
) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_config({"sources": sources}, "aftercast.yaml")
    assert needle in str(caught.value) and "\n" not in str(caught.value)


def test_secret_header_values_never_print() -> None:
    config = parse_config(
        {
            "sources": [
                {
                    "type": "http",
                    "name": "x",
                    "kind": "actuals",
                    "url": "http://h",
                    "headers": {"X-Key": "hunter2"},
                }
            ]
        }
    )
    assert "hunter2" not in repr(config) and "hunter2" not in str(config.sources[0])


@pytest.mark.postgres
def test_another_replica_pulling_a_source_makes_this_one_skip_it(
    pg_url: str, tmp_path: Path
) -> None:
    """PostgreSQL's own lock table is the yardstick: while another session holds the source's
    advisory lock (a replica mid-pull), this process skips the source; afterwards it pulls."""
    from aftercast.sources.state import _lock_key

    engine = make_engine(pg_url)
    migrate(engine)
    drop = tmp_path / "drop"
    drop.mkdir()
    write_csv(drop / "a.csv", ACTUAL_HEADER, "s1,2026-01-01,10")
    config = _config(engine, _folder(drop))
    with engine.connect() as other:  # the other replica, mid-pull
        other.execute(text("SELECT pg_advisory_lock(:k)"), {"k": _lock_key("drop")})
        assert pull_source(engine, config, config.sources[0]) is None
        assert _scalar(engine, "SELECT COUNT(*) FROM actuals") == 0
        other.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": _lock_key("drop")})
    result = pull_source(engine, config, config.sources[0])
    assert result is not None and result.ok
    assert _scalar(engine, "SELECT COUNT(*) FROM actuals") == 1
    # The pull gave its lock back: nobody holds an advisory lock on this database any more
    # (pg_locks is the whole server's: other databases' sessions are not counted).
    held = (
        "SELECT COUNT(*) FROM pg_locks WHERE locktype = 'advisory' "
        "AND database = (SELECT oid FROM pg_database WHERE datname = current_database())"
    )
    assert _scalar(engine, held) == 0
    engine.dispose()
