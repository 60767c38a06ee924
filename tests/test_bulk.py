"""The bulk insert path on both stores: what goes in comes back, NULLs, text and extremes too.

On PostgreSQL this is the binary COPY payload built with numpy (`store.copy_binary`), whose
layout follows the PostgreSQL documentation ("COPY", "Binary Format"); the server itself is
the outside check: it refuses a malformed payload and parses the values it is given.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from sqlalchemy import (
    BigInteger,
    Column,
    Float,
    Integer,
    LargeBinary,
    MetaData,
    SmallInteger,
    String,
    Table,
    Text,
    create_engine,
    text,
)

from aftercast.store import copy_binary, schema
from aftercast.store.bulk import allocate_ids, id_condition, insert_frame, read_frame
from aftercast.store.db import make_engine, migrate, refresh_statistics


def _table() -> Table:
    return Table(
        "bulk_check",
        MetaData(),
        Column("big", BigInteger),
        Column("real", Float),
        Column("label", String(20)),
        Column("small", Integer),
        Column("tiny", SmallInteger),
        Column("note", Text),
    )


def test_rows_come_back_as_written_with_nulls_text_and_infinities(store_url: str) -> None:
    frame = pd.DataFrame(
        {
            "big": pd.array([2**62, None, -3], dtype="Int64"),
            "real": [0.1 + 0.2, np.nan, -np.inf],
            "label": ["x", None, "bäckerei ∑"],
            "small": [7.0, 8.0, np.nan],
            "tiny": [1, 2, 3],
            "note": ["", "a longer note, with a comma", None],
        }
    )
    table = _table()
    engine = create_engine(store_url)
    table.metadata.create_all(engine)
    with engine.begin() as connection:
        assert insert_frame(connection, table, frame) == 3
        back = read_frame(connection, "SELECT * FROM bulk_check")
    engine.dispose()
    back = back.sort_values("tiny").reset_index(drop=True)
    assert back["big"].tolist()[0] == 2**62 and back["big"].tolist()[2] == -3
    assert pd.isna(back["big"][1])
    assert back["real"][0] == 0.1 + 0.2  # every bit kept, not a rounded text form
    assert np.isnan(back["real"][1]) and back["real"][2] == -np.inf
    assert back["label"].tolist() == ["x", None, "bäckerei ∑"]
    assert back["small"][0] == 7 and back["small"][1] == 8 and pd.isna(back["small"][2])
    # SQLite reads back an empty text as '' as well; NULL stays NULL.
    assert back["note"][0] == "" and back["note"][1] == "a longer note, with a comma"
    assert back["note"][2] is None or pd.isna(back["note"][2])


def test_blobs_come_back_byte_for_byte_with_trailing_zeros_and_nulls(store_url: str) -> None:
    # numpy's fixed-width byte strings drop trailing zero bytes; a packed 0.0 is eight of them.
    blobs = [np.array([1.5, 0.0]).tobytes(), None, b"", bytes(range(256)), b"\x00"]
    table = Table("blob_check", MetaData(), Column("n", Integer), Column("blob", LargeBinary))
    engine = create_engine(store_url)
    table.metadata.create_all(engine)
    with engine.begin() as connection:
        insert_frame(connection, table, pd.DataFrame({"n": range(5), "blob": blobs}))
        back = read_frame(connection, "SELECT n, blob FROM blob_check ORDER BY n")
    engine.dispose()
    got = [
        None if b is None or (isinstance(b, float) and np.isnan(b)) else bytes(b)
        for b in back["blob"]
    ]
    assert got == blobs


def test_binary_layout_signature_and_field_lengths() -> None:
    """Header, one row of two fields (a BIGINT and a NULL TEXT) and the trailer, per the
    PostgreSQL documentation's description of the binary COPY format."""
    payload = copy_binary.encode(pd.DataFrame({"a": [5], "b": [None]}), ["BIGINT", "TEXT"])
    assert payload is not None
    assert payload[:11] == b"PGCOPY\n\xff\r\n\x00"
    row = payload[19:-2]
    assert row == (
        (2).to_bytes(2, "big")
        + (8).to_bytes(4, "big")
        + (5).to_bytes(8, "big")
        + (-1).to_bytes(4, "big", signed=True)
    )
    assert payload[-2:] == b"\xff\xff"


def test_values_an_integer_column_cannot_hold_are_left_to_the_database() -> None:
    """A fraction or an overflow is not cast silently: no binary payload, so the CSV path lets
    PostgreSQL refuse the row as it does any bad integer (INTEGER is 32 bits in PostgreSQL)."""
    assert copy_binary.encode(pd.DataFrame({"a": [1.5]}), ["INTEGER"]) is None
    assert copy_binary.encode(pd.DataFrame({"a": [2**40]}), ["INTEGER"]) is None
    assert copy_binary.encode(pd.DataFrame({"a": [2.0, None]}), ["INTEGER"]) is not None
    assert copy_binary.encode(pd.DataFrame({"a": [2**40]}), ["BIGINT"]) is not None


def test_numeric_reads_keep_integers_exact_and_nulls_as_nan(store_url: str) -> None:
    """Rows of numbers only take numpy's one-pass conversion; what comes back must equal what
    pandas' own per-column conversion gives (the reference), types included."""
    engine = create_engine(store_url)
    table = Table(
        "bulk_numbers",
        MetaData(),
        Column("id", BigInteger),
        Column("x", Float),
        Column("n", Integer),
    )
    table.metadata.create_all(engine)
    frame = pd.DataFrame(
        {
            "id": [1, 2**53 - 1, 5],
            "x": [0.1 + 0.2, -np.inf, 2.5],
            "n": pd.array([3, None, 4], dtype="Int64"),
        }
    )
    with engine.begin() as connection:
        insert_frame(connection, table, frame)
        back = read_frame(connection, "SELECT id, x, n FROM bulk_numbers ORDER BY id")
        raw = connection.exec_driver_sql("SELECT id, x, n FROM bulk_numbers ORDER BY id")
        reference = pd.DataFrame.from_records(raw.fetchall(), columns=["id", "x", "n"])
        big = read_frame(connection, "SELECT id FROM bulk_numbers WHERE id > 2 ORDER BY id")
    engine.dispose()
    assert back["id"].dtype == np.int64 and back["id"].tolist() == [1, 5, 2**53 - 1]
    assert back["x"].tolist() == reference["x"].tolist()
    assert back["n"].dtype == np.float64 and np.isnan(back["n"][2])
    assert back["n"][:2].tolist() == [3.0, 4.0]
    assert big["id"].tolist() == [5, 2**53 - 1]


def test_integers_beyond_float_precision_take_the_exact_path(store_url: str) -> None:
    engine = create_engine(store_url)
    table = Table("bulk_huge", MetaData(), Column("id", BigInteger), Column("x", Float))
    table.metadata.create_all(engine)
    with engine.begin() as connection:
        insert_frame(connection, table, pd.DataFrame({"id": [2**62 + 1], "x": [1.0]}))
        back = read_frame(connection, "SELECT id, x FROM bulk_huge")
    engine.dispose()
    assert back["id"].tolist() == [2**62 + 1]


def test_id_condition_selects_exactly_the_given_ids(store_url: str) -> None:
    """The condition matches the rows whose id is listed, huge and negative ids included, and
    nothing else; the reference is numpy's own membership test on the same ids."""
    engine = create_engine(store_url)
    table = Table("bulk_ids", MetaData(), Column("id", BigInteger), Column("x", Float))
    table.metadata.create_all(engine)
    stored = np.array([-(2**62), -1, 0, 1, 7, 2**53 + 1, 2**62 + 5], dtype=np.int64)
    wanted = np.array([2**62 + 5, -1, 7, 7, 12345], dtype=np.int64)  # a repeat, an absent id
    with engine.begin() as connection:
        insert_frame(connection, table, pd.DataFrame({"id": stored, "x": 1.0}))
        condition, params = id_condition(connection, "id", wanted, "wanted")
        back = read_frame(connection, f"SELECT id FROM bulk_ids WHERE {condition}", params)
    engine.dispose()
    assert sorted(back["id"].tolist()) == sorted(stored[np.isin(stored, wanted)].tolist())


def test_allocated_ids_are_fresh_and_distinct_across_transactions(store_url: str) -> None:
    from aftercast.store import schema
    from aftercast.store.db import make_engine, migrate

    engine = make_engine(store_url)
    migrate(engine)
    with engine.begin() as connection:
        first = allocate_ids(connection, schema.models, 1000)
    with engine.begin() as connection:
        second = allocate_ids(connection, schema.models, 3)
        none = allocate_ids(connection, schema.models, 0)
    engine.dispose()
    assert len(first) == 1000 and len(np.unique(first)) == 1000 and first.dtype == np.int64
    assert len(second) == 3 and len(none) == 0
    # PostgreSQL's sequence never hands an id out twice; on SQLite nothing was inserted, so
    # the second block may reuse the first's ids (max(id) + 1 under the write lock).
    if store_url.startswith("postgresql"):
        assert not np.isin(second, first).any()


def test_postgres_sessions_keep_the_urls_own_options(pg_url: str) -> None:
    """JIT is turned off per session without dropping session options the URL itself gives."""
    from sqlalchemy import text

    from aftercast.store.db import make_engine

    engine = make_engine(pg_url + "?options=-c%20statement_timeout%3D12345")
    with engine.connect() as connection:
        jit = connection.execute(text("SHOW jit")).scalar()
        timeout = connection.execute(text("SHOW statement_timeout")).scalar()
    engine.dispose()
    assert (jit, timeout) == ("off", "12345ms")


def test_planner_statistics_follow_the_rows_just_written(store_url: str) -> None:
    # PostgreSQL documents that ANALYZE updates pg_class.reltuples (a table this small is read
    # whole, so the count is exact); SQLite is left alone, so no sqlite_stat1 table appears.
    engine = make_engine(store_url)
    migrate(engine)
    frame = pd.DataFrame({"series_id": np.arange(500), "period": 7, "kind": 0})
    with engine.begin() as connection:
        insert_frame(connection, schema.match_queue, frame)
    refresh_statistics(engine, ("match_queue",))
    with engine.connect() as connection:
        if store_url.startswith("postgresql"):
            tuples = connection.execute(
                text("SELECT reltuples FROM pg_class WHERE relname = 'match_queue'")
            ).scalar_one()
            assert tuples == 500
        else:
            names = connection.execute(text("SELECT name FROM sqlite_master")).scalars().all()
            assert "sqlite_stat1" not in names
    engine.dispose()


def test_two_writers_creating_the_same_model_and_series_both_succeed(pg_url: str) -> None:
    """Two transactions create the same catalogue rows at once (replicas cycling their shards):
    the second waits for the first to commit, then finds its rows; PostgreSQL's unique index is
    the yardstick (one row per name, both writers see the same id)."""
    import threading
    import time

    from aftercast.store.catalog import ensure_models, ensure_series
    from aftercast.store.db import write
    from tests.conftest import make_config

    engine = make_engine(pg_url)
    migrate(engine)
    config = make_config(pg_url)
    started, seen, failures = threading.Barrier(2), {}, []

    def writer(name: str, first: bool) -> None:
        try:
            if not first:
                started.wait()
            with write(engine) as connection:
                models = ensure_models(connection, ["benchmark:naive"])
                series = ensure_series(connection, config, pd.Series(["north/rye"]))
                if first:
                    started.wait()
                    time.sleep(0.5)  # the other writer's insert now waits on ours
            seen[name] = (models["benchmark:naive"], int(series.loc["north/rye", "id"]))
        except Exception as exc:  # reported below, with the writer's name
            failures.append(f"{name}: {exc}")

    threads = [threading.Thread(target=writer, args=(n, n == "a")) for n in ("a", "b")]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(30)
    assert failures == [] and seen["a"] == seen["b"]
    with engine.connect() as connection:
        assert connection.execute(text("SELECT COUNT(*) FROM models")).scalar_one() == 1
        assert connection.execute(text("SELECT COUNT(*) FROM series")).scalar_one() == 1
    engine.dispose()
