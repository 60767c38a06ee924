"""What sources remember, kept in the store: watermarks, files read, attempts and failures.

`StoredState` is the `SourceState` a source sees during one pull; `begin_pull` and `finish_pull`
bracket a pull (the attempt time, the outcome, a run-log row); `source_health` is the per-source
picture that `/metrics`, the pages and freshness checks read: when each source last succeeded,
how many pulls in a row failed, and the last error. Each write is its own short transaction, so
a pull that dies half-way leaves the store as it was after its last committed step.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import pandas as pd
from sqlalchemy import Connection, Engine, select, text, update
from sqlalchemy.dialects import postgresql, sqlite

from aftercast.settings.sources import SourceSettings
from aftercast.sources.base import SourceResult
from aftercast.store.bulk import read_frame
from aftercast.store.db import write
from aftercast.store.schema_sources import source_files, source_runs, source_state


def _insert_ignore(connection: Connection, table: Any, values: dict[str, Any]) -> None:
    dialect = postgresql if connection.dialect.name == "postgresql" else sqlite
    connection.execute(dialect.insert(table).values(**values).on_conflict_do_nothing())


def _lock_key(name: str) -> int:
    digest = hashlib.blake2b(f"aftercast source {name}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "big", signed=True)


@contextmanager
def store_claim(engine: Engine, name: str) -> Iterator[bool]:
    """Whether this process may pull source `name` now, held until the block ends.

    On PostgreSQL, where several replicas share the store and each schedules every source, a
    session advisory lock per source lets one replica pull it at a time; the others skip that
    run. The lock lives on a connection kept for the pull, so a replica that dies releases it
    with its connection. SQLite serves one process: always True.
    """
    if engine.dialect.name != "postgresql":
        yield True
        return
    key = _lock_key(name)
    with engine.connect() as connection:
        mine = bool(
            connection.execute(text("SELECT pg_try_advisory_lock(:k)"), {"k": key}).scalar()
        )
        connection.commit()  # a session lock outlives the transaction; do not sit idle in one
        try:
            yield mine
        finally:
            if mine:
                connection.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": key})
                connection.commit()


class StoredState:
    """One source's memory in the store (the `SourceState` protocol)."""

    def __init__(self, engine: Engine, name: str) -> None:
        self.engine = engine
        self.name = name

    def watermark(self) -> Any:
        with self.engine.connect() as connection:
            query = select(source_state.c.watermark).where(source_state.c.name == self.name)
            return connection.execute(query).scalar_one_or_none()

    def set_watermark(self, value: Any) -> None:
        with write(self.engine) as connection:
            connection.execute(
                update(source_state).where(source_state.c.name == self.name).values(watermark=value)
            )

    def seen_hashes(self, hashes: list[str]) -> set[str]:
        seen: set[str] = set()
        with self.engine.connect() as connection:
            for start in range(0, len(hashes), 5_000):
                query = select(source_files.c.content_hash).where(
                    source_files.c.source == self.name,
                    source_files.c.content_hash.in_(hashes[start : start + 5_000]),
                )
                seen.update(connection.execute(query).scalars())
        return seen

    def record_file(self, digest: str, path: str, outcome: str, detail: str | None) -> None:
        with write(self.engine) as connection:
            _insert_ignore(
                connection,
                source_files,
                {
                    "source": self.name,
                    "content_hash": digest,
                    "path": path,
                    "outcome": outcome,
                    "detail": detail,
                    "processed_at": int(time.time()),
                },
            )


def last_attempts(engine: Engine) -> dict[str, int | None]:
    """When each known source was last tried (epoch seconds)."""
    with engine.connect() as connection:
        rows = connection.execute(select(source_state.c.name, source_state.c.last_attempt_at))
        return {str(name): at for name, at in rows}


def begin_pull(engine: Engine, settings: SourceSettings, now: int) -> None:
    with write(engine) as connection:
        _insert_ignore(
            connection,
            source_state,
            {
                "name": settings.name,
                "type": settings.type,
                "kind": settings.kind,
                "consecutive_failures": 0,
            },
        )
        connection.execute(
            update(source_state)
            .where(source_state.c.name == settings.name)
            .values(last_attempt_at=now, type=settings.type, kind=settings.kind)
        )


def finish_pull(engine: Engine, result: SourceResult, started_at: int, cycle_id: int | None) -> int:
    """Store the outcome of a pull; returns the run-log id."""
    state = source_state.c
    outcome: dict[str, Any] = (
        {"last_success_at": started_at, "last_error": None, "consecutive_failures": 0}
        if result.ok
        else {"last_error": result.error, "consecutive_failures": state.consecutive_failures + 1}
    )
    with write(engine) as connection:
        connection.execute(update(source_state).where(state.name == result.name).values(**outcome))
        inserted = connection.execute(
            source_runs.insert().values(
                source=result.name,
                cycle_id=cycle_id,
                started_at=started_at,
                seconds=result.seconds,
                ok=int(result.ok),
                batches=result.batches,
                accepted=result.accepted + result.revised,
                rejected=result.rejected,
                unchanged=result.unchanged,
                attempts=result.attempts,
                error=result.error,
            )
        )
        return int(inserted.inserted_primary_key[0])  # type: ignore[index]


def source_health(engine: Engine, now: int) -> pd.DataFrame:
    """Per source: type, kind, last attempt and success, lag_seconds, failures, last error.

    `lag_seconds` is the time since the last successful pull (since the first attempt when none
    has succeeded yet), the number freshness alerts compare against a limit.
    """
    with engine.connect() as connection:
        frame = read_frame(connection, "SELECT * FROM source_state ORDER BY name")
        first = read_frame(
            connection,
            "SELECT source AS name, MIN(started_at) AS first_at FROM source_runs GROUP BY source",
        )
    if frame.empty:
        return frame.assign(lag_seconds=pd.Series(dtype="float64"))
    frame = frame.merge(first, on="name", how="left")
    since = frame["last_success_at"].fillna(frame["first_at"]).fillna(frame["last_attempt_at"])
    frame["lag_seconds"] = (now - since).astype("float64")
    return frame.drop(columns=["first_at"])
