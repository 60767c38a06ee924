"""Bulk paths per dialect: inserting data frames, allocating ids, reading frames back.

PostgreSQL gets COPY through psycopg 3, in the binary format built with numpy
(`copy_binary`; CSV text for a type it does not lay out);
SQLite gets executemany over plain tuples inside one IMMEDIATE transaction, which is the fastest
path its driver has. Either way no Python code runs per row besides the driver's own.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import BigInteger, Column, Connection, MetaData, Table, text

from aftercast.store import copy_binary


def is_postgres(connection: Connection) -> bool:
    return connection.dialect.name == "postgresql"


def _python_rows(frame: pd.DataFrame) -> Iterable[tuple[Any, ...]]:
    """Rows as tuples of plain Python values, NA as None (what DB-API drivers bind).

    Built column-wise with `tolist()` (in C) and zipped, rather than converted row by row.
    Float NaN is left as NaN: SQLite stores it as NULL.
    """
    columns = []
    for name in frame.columns:
        column = frame[name]
        if isinstance(column.dtype, np.dtype) and column.dtype.kind in "fiub":
            columns.append(column.tolist())
        else:
            columns.append(column.astype(object).where(column.notna(), None).tolist())
    return zip(*columns, strict=True)


def insert_frame(connection: Connection, table: Table, frame: pd.DataFrame) -> int:
    """Insert every row of `frame` (columns named as the table's) into `table`."""
    if frame.empty:
        return 0
    columns = list(frame.columns)
    if is_postgres(connection):
        _copy_postgres(connection, table, columns, frame)
    else:
        placeholders = ", ".join("?" for _ in columns)
        sql = f"INSERT INTO {table.name} ({', '.join(columns)}) VALUES ({placeholders})"
        raw = connection.connection.driver_connection
        assert raw is not None
        raw.executemany(sql, _python_rows(frame))
    return len(frame)


def insert_new(connection: Connection, table: Table, frame: pd.DataFrame, key: str) -> None:
    """Insert the rows of `frame` whose unique `key` is not stored yet, skipping the others.

    For catalogue rows (series, models) that several writers may create at once: replicas
    cycling their shards, a push and a pull. On PostgreSQL a second insert of a key waits for
    the first writer's commit and then does nothing, where COPY would fail the transaction.
    """
    if frame.empty:
        return
    columns = list(frame.columns)
    names = ", ".join(columns)
    if is_postgres(connection):
        # COPY into a bare staging copy, then one INSERT ... SELECT: 100,000 series in about a
        # quarter of the time a pipelined executemany takes.
        staged = f"tmp_new_{table.name}"
        connection.execute(text(f"DROP TABLE IF EXISTS {staged}"))
        connection.execute(
            text(
                f"CREATE TEMP TABLE {staged} ON COMMIT DROP AS "
                f"SELECT {names} FROM {table.name} WITH NO DATA"
            )
        )
        bare = Table(staged, MetaData(), *[Column(c, table.c[c].type) for c in columns])
        _copy_postgres(connection, bare, columns, frame)
        connection.execute(
            text(
                f"INSERT INTO {table.name} ({names}) SELECT {names} FROM {staged} "
                f"ON CONFLICT ({key}) DO NOTHING"
            )
        )
        return
    sql = (
        f"INSERT INTO {table.name} ({names}) VALUES ({', '.join('?' for _ in columns)}) "
        f"ON CONFLICT ({key}) DO NOTHING"
    )
    raw = connection.connection.driver_connection
    assert raw is not None
    raw.executemany(sql, _python_rows(frame))


def _copy_postgres(
    connection: Connection, table: Table, columns: list[str], frame: pd.DataFrame
) -> None:
    """COPY in PostgreSQL's binary format where every column's type allows it, else as CSV."""
    types = [table.c[c].type.compile(dialect=connection.dialect) for c in columns]
    payload = None
    if all(copy_binary.supported(t) for t in types):
        payload = copy_binary.encode(frame, types)
    if payload is None:
        buffer = io.StringIO()
        frame.to_csv(buffer, index=False, header=False, na_rep="\\N", float_format="%.17g")
        options = "FORMAT csv, NULL '\\N'"
    else:
        options = "FORMAT binary"
    raw = connection.connection.driver_connection
    assert raw is not None
    with raw.cursor() as cursor:
        sql = f"COPY {table.name} ({', '.join(columns)}) FROM STDIN WITH ({options})"
        with cursor.copy(sql) as copy:
            copy.write(payload if payload is not None else buffer.getvalue())


def allocate_ids(connection: Connection, table: Table, count: int) -> np.ndarray:
    """`count` fresh primary keys for `table`, safe against concurrent writers.

    SQLite: the write transaction holds the database lock, so max(id) + 1 is ours. PostgreSQL:
    the serial column's sequence hands out the block, named once (looking it up per id cost
    ten times the ids themselves) and sent back as one comma-separated text.
    """
    if count == 0:
        return np.empty(0, dtype=np.int64)
    if is_postgres(connection):
        sequence = connection.execute(
            text("SELECT pg_get_serial_sequence(:t, 'id')"), {"t": table.name}
        ).scalar_one()
        listed = connection.execute(
            text(
                "SELECT string_agg(nextval(CAST(:s AS regclass))::text, ',') "
                "FROM generate_series(1, :n)"
            ),
            {"s": sequence, "n": count},
        ).scalar_one()
        return np.array(listed.split(","), dtype=np.int64)
    start = connection.execute(text(f"SELECT COALESCE(MAX(id), 0) FROM {table.name}")).scalar_one()
    return np.arange(start + 1, start + 1 + count, dtype=np.int64)


_NAMED = re.compile(r"(?<!:):([A-Za-z_][A-Za-z0-9_]*)")


def read_frame(
    connection: Connection, sql: str, params: dict[str, Any] | None = None
) -> pd.DataFrame:
    """Run a SELECT on the driver's own cursor and return its rows as a frame.

    The driver cursor skips building a SQLAlchemy Row per row, which dominates large reads.
    Parameters are written `:name`, as in SQLAlchemy's `text()`.
    """
    raw = connection.connection.driver_connection
    assert raw is not None
    if is_postgres(connection):
        sql = _NAMED.sub(r"%(\1)s", sql.replace("%", "%%"))
    cursor = raw.cursor()
    try:
        cursor.execute(sql, params or {})
        names = [d[0] for d in cursor.description]
        rows = cursor.fetchall()
    finally:
        cursor.close()
    frame = _numeric_frame(rows, names)
    if frame is None:
        frame = pd.DataFrame.from_records(rows, columns=names, coerce_float=True)
    # A column of NULLs arrives as objects; as NaN floats it behaves like the numbers it stands for.
    for column in frame.columns[frame.dtypes.map(pd.api.types.is_object_dtype)]:
        if frame[column].isna().all():
            frame[column] = frame[column].astype("float64")
    return frame


# Integers up to 2**53 survive a trip through float64 exactly.
_EXACT = float(2**53)


def _numeric_frame(rows: list[Any], names: list[str]) -> pd.DataFrame | None:
    """Rows whose first row holds only ints and floats, converted by numpy in one pass (about
    twice as fast as pandas' per-column object conversion); None where that does not apply.

    A column whose first value is an int comes back int64 unless it holds a NULL (then float
    with NaN, as pandas would give), or a value too large for float64 to carry exactly.
    """
    if not rows or len(set(names)) != len(names):
        return None
    if not all(type(v) in (int, float) for v in rows[0]):
        return None
    try:
        values = np.array(rows, dtype=np.float64)
    except (TypeError, ValueError):
        return None
    if values.ndim != 2 or values.shape[1] != len(names):
        return None
    columns: dict[str, np.ndarray] = {}
    for index, (name, first) in enumerate(zip(names, rows[0], strict=True)):
        column = values[:, index]
        if type(first) is int and not np.isnan(column).any():
            if np.abs(column).max() >= _EXACT or not np.array_equal(column, np.trunc(column)):
                return None
            columns[name] = column.astype(np.int64)
        else:
            columns[name] = column.copy()
    return pd.DataFrame(columns, copy=False)


def stage_keys(connection: Connection, name: str, frame: pd.DataFrame) -> str:
    """Load a small frame of integer keys into a temporary table for joins; returns its name.

    Used where a query needs "rows matching these keys": a join against a temp table stays fast
    where an IN list of thousands of tuples would not.
    """
    table = f"tmp_{name}"
    columns = ", ".join(f"{c} BIGINT" for c in frame.columns)
    if is_postgres(connection):
        connection.execute(
            text(f"CREATE TEMP TABLE IF NOT EXISTS {table} ({columns}) ON COMMIT DROP")
        )
    else:
        connection.execute(text(f"CREATE TEMP TABLE IF NOT EXISTS {table} ({columns})"))
    connection.execute(text(f"DELETE FROM {table}"))
    temp = Table(table, MetaData(), *[Column(c, BigInteger) for c in frame.columns])
    insert_frame(connection, temp, frame.astype("int64"))
    return table


def id_condition(
    connection: Connection, column: str, ids: np.ndarray | pd.Series, name: str
) -> tuple[str, dict[str, Any]]:
    """A WHERE condition "`column` is one of `ids`", with its parameters.

    PostgreSQL gets an array parameter (`= ANY`), whose size its planner knows, so it probes
    the index per id; joined to a fresh staging table it chose to hash the whole big table,
    once per batch, which made a cycle's cost grow with the stored history. The array travels
    as one text literal that the server casts: psycopg's list adapter inspects every element
    in Python, which took longer than the statements themselves for a batch's 400,000 ids.
    SQLite gets an IN over a staged table, which its planner already answers from the index.
    """
    values = np.asarray(ids, dtype=np.int64)
    if is_postgres(connection):
        return f"{column} = ANY(CAST(:{name} AS BIGINT[]))", {name: _array_literal(values)}
    staged = stage_keys(connection, name, pd.DataFrame({"id": values}))
    return f"{column} IN (SELECT id FROM {staged})", {}


def key_rows(connection: Connection, name: str, frame: pd.DataFrame) -> tuple[str, dict[str, Any]]:
    """A FROM item `name` holding the rows of a frame of integer keys, with its parameters.

    PostgreSQL gets one array parameter per column, unnested side by side: the planner knows
    how many rows they hold and probes an index once per row, where a fresh staging table
    (estimated at a thousand-odd rows) had it walk a whole index or table. SQLite gets the
    staging table, kept as the outer loop by a CROSS JOIN after it.
    """
    if is_postgres(connection):
        arrays = ", ".join(f"CAST(:{name}_{c} AS BIGINT[])" for c in frame.columns)
        params = {f"{name}_{c}": _array_literal(frame[c].to_numpy(np.int64)) for c in frame.columns}
        return f"unnest({arrays}) AS {name}({', '.join(frame.columns)})", params
    return f"{stage_keys(connection, name, frame)} AS {name}", {}


def _array_literal(values: np.ndarray) -> str:
    """A PostgreSQL array literal of integers, e.g. '{1,2,3}'."""
    return "{" + ",".join(map(str, values.tolist())) + "}"


def delete_by_ids(connection: Connection, tables: Sequence[Table], ids: np.ndarray) -> None:
    """Delete rows whose forecast_id is in `ids` from each table."""
    if len(ids) == 0:
        return
    condition, params = id_condition(connection, "forecast_id", ids, "delete_ids")
    for table in tables:
        connection.execute(text(f"DELETE FROM {table.name} WHERE {condition}"), params)
