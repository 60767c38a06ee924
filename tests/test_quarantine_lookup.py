"""The quarantine's re-ingest lookup goes through its index, in new stores and migrated ones.

Ingesting a file again asks which of its rejected rows the quarantine already holds
(`ingest.QUARANTINED_ROWS`); without `ix_quarantine_lookup` that read the whole quarantine for
every chunk with a rejected row, a cost that grew with every bad row ever received.
"""

from __future__ import annotations

from pathlib import Path

from alembic import command
from sqlalchemy import inspect, text

from aftercast.ingest import QUARANTINED_ROWS, ingest_path
from aftercast.store.db import _alembic_config, make_engine, migrate, write
from tests.conftest import make_config, write_csv


def _index_columns(url: str) -> list[str | None] | None:
    engine = make_engine(url)
    indexes = {i["name"]: i["column_names"] for i in inspect(engine).get_indexes("quarantine")}
    engine.dispose()
    return indexes.get("ix_quarantine_lookup")


def test_a_new_store_has_the_lookup_index(store_url: str) -> None:
    migrate(make_engine(store_url))
    assert _index_columns(store_url) == ["kind", "source", "row_number"]


def test_an_old_store_gains_the_index_and_keeps_its_rows(store_url: str, tmp_path: Path) -> None:
    engine = make_engine(store_url)
    with write(engine) as connection:
        command.upgrade(_alembic_config(connection), "0001")
        connection.execute(
            text(
                "INSERT INTO quarantine (batch_id, kind, source, row_number, reason, raw, "
                "recorded_at) VALUES (1, 'actuals', 'a.csv', 2, 'non-finite value', '{}', 0)"
            )
        )
    assert _index_columns(store_url) is None
    migrate(engine)
    assert _index_columns(store_url) == ["kind", "source", "row_number"]
    # The stored row still counts: the same bad row ingested again is not stored twice.
    path = write_csv(tmp_path / "a.csv", "series_id,observed_at,value", "s1,2026-01-01,nan")
    config = make_config(store_url)
    with engine.connect() as connection:
        before = connection.execute(text("SELECT COUNT(*) FROM quarantine")).scalar_one()
    ingest_path(engine, config, "actuals", path)
    ingest_path(engine, config, "actuals", path)
    with engine.connect() as connection:
        after = connection.execute(text("SELECT COUNT(*) FROM quarantine")).scalar_one()
    engine.dispose()
    assert after == before + 1


def test_sqlite_answers_the_lookup_from_the_index(sqlite_url: str) -> None:
    engine = make_engine(sqlite_url)
    migrate(engine)
    with engine.connect() as connection:
        plan = connection.execute(
            text(f"EXPLAIN QUERY PLAN {QUARANTINED_ROWS}"),
            {"kind": "actuals", "source": "a.csv", "low": 1, "high": 9},
        ).all()
    engine.dispose()
    details = " ".join(str(row[-1]) for row in plan)
    assert "USING INDEX ix_quarantine_lookup" in details, details
