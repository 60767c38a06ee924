"""The SQL of shard leases: members, acquisition, renewal, release, fencing and the cycle log.

Every function runs inside the caller's transaction (`store.db.write` for the writes) and
compares times with the database's clock, so replicas whose clocks disagree still agree on who
holds what. Acquisition takes rows that are free or expired with `SELECT ... FOR UPDATE SKIP
LOCKED` on PostgreSQL, so replicas acquiring at the same moment take different rows and never
wait on each other; on SQLite the write transaction already holds the database lock, so a plain
UPDATE ... WHERE expires_at < now is atomic. Every acquisition adds one to the row's token.
Row FLEET (-1) is the lease on the once-per-slot stages that look at all series together.
"""

from __future__ import annotations

import pandas as pd
from sqlalchemy import Connection, text

from aftercast.errors import AftercastError
from aftercast.store.bulk import is_postgres, read_frame

FLEET = -1


def database_now(connection: Connection) -> int:
    """The database server's clock in epoch seconds."""
    sql = (
        "SELECT CAST(FLOOR(EXTRACT(EPOCH FROM clock_timestamp())) AS BIGINT)"
        if is_postgres(connection)
        else "SELECT CAST(strftime('%s', 'now') AS INTEGER)"
    )
    return int(connection.execute(text(sql)).scalar_one())


def ensure_shards(connection: Connection, shards: int, now: int) -> None:
    """Create the lease rows for `shards` shards (and FLEET); refuse a count in use elsewhere."""
    rows = read_frame(connection, "SELECT shard, shards, holder, expires_at FROM shard_leases")
    other = rows[rows["shards"] != shards] if len(rows) else rows
    busy = other[other["holder"].notna() & (other["expires_at"] >= now)] if len(other) else other
    if len(busy):
        raise AftercastError(
            f"config key coordination.shards: this replica has {shards}, replica "
            f"{busy['holder'].iloc[0]} works with {int(busy['shards'].iloc[0])}; "
            "give every replica the same value"
        )
    if len(other):  # nobody works with the old count: start afresh (tokens keep counting)
        connection.execute(text("DELETE FROM shard_leases WHERE shard >= :n"), {"n": shards})
        connection.execute(
            text("UPDATE shard_leases SET shards = :n, holder = NULL, cycle_now = NULL"),
            {"n": shards},
        )
    for shard in [FLEET, *range(shards)]:
        connection.execute(
            text(
                "INSERT INTO shard_leases (shard, shards, token, expires_at) "
                "VALUES (:s, :n, 0, 0) ON CONFLICT (shard) DO NOTHING"
            ),
            {"s": shard, "n": shards},
        )


def heartbeat(connection: Connection, holder: str, now: int, until: int) -> None:
    """Keep `holder` in the member list and extend every lease it holds to `until`."""
    connection.execute(
        text(
            "INSERT INTO replicas (name, started_at, seen_at, expires_at) "
            "VALUES (:name, :now, :now, :until) ON CONFLICT (name) DO UPDATE "
            "SET seen_at = :now, expires_at = :until"
        ),
        {"name": holder, "now": now, "until": until},
    )
    connection.execute(
        text("UPDATE shard_leases SET expires_at = :until WHERE holder = :h"),
        {"until": until, "h": holder},
    )


def held_by(connection: Connection, holder: str, lock: bool = False) -> dict[int, int]:
    """Shard -> token of every row `holder` holds (FLEET included); `lock` locks them."""
    suffix = " FOR NO KEY UPDATE" if lock and is_postgres(connection) else ""
    rows = connection.execute(
        text(f"SELECT shard, token FROM shard_leases WHERE holder = :h{suffix}"), {"h": holder}
    ).all()
    return {int(shard): int(token) for shard, token in rows}


def live_members(connection: Connection, now: int) -> int:
    sql = "SELECT COUNT(*) FROM replicas WHERE expires_at > :now"
    return int(connection.execute(text(sql), {"now": now}).scalar_one())


def take_free(
    connection: Connection, holder: str, now: int, until: int, want: int, fleet: bool = False
) -> None:
    """Give `holder` up to `want` shards that are free or expired (or the FLEET row)."""
    which = "shard = -1" if fleet else "shard >= 0"
    free = (
        f"SELECT shard FROM shard_leases WHERE {which} "
        "AND (holder IS NULL OR expires_at < :now) ORDER BY shard LIMIT :want"
    )
    values = "holder = :h, acquired_at = :now, expires_at = :until"
    if is_postgres(connection):
        sql = (
            f"WITH free AS ({free} FOR UPDATE SKIP LOCKED) UPDATE shard_leases l "
            f"SET token = l.token + 1, {values} FROM free WHERE l.shard = free.shard"
        )
    else:
        sql = f"UPDATE shard_leases SET token = token + 1, {values} WHERE shard IN ({free})"
    params = {"now": now, "until": until, "want": want, "h": holder}
    connection.execute(text(sql), params)


def release(connection: Connection, holder: str, shards: list[int]) -> None:
    if shards:
        marks = ", ".join(str(int(s)) for s in shards)
        connection.execute(
            text(
                "UPDATE shard_leases SET holder = NULL, expires_at = 0 "
                f"WHERE holder = :h AND shard IN ({marks})"
            ),
            {"h": holder},
        )


def leave(connection: Connection, holder: str) -> None:
    connection.execute(text("DELETE FROM replicas WHERE name = :n"), {"n": holder})


def cycle_marks(connection: Connection) -> pd.DataFrame:
    """shard, holder and cycle_now (the slot of its last finished cycle) of every row."""
    return read_frame(connection, "SELECT shard, holder, cycle_now FROM shard_leases")


def record_start(
    connection: Connection, holder: str, tokens: dict[int, int], slot: int, now: int
) -> None:
    for shard, token in tokens.items():
        connection.execute(
            text(
                "INSERT INTO shard_cycles (shard, now, holder, token, started_at) "
                "VALUES (:s, :slot, :h, :t, :now)"
            ),
            {"s": shard, "slot": slot, "h": holder, "t": token, "now": now},
        )


def record_finish(
    connection: Connection,
    holder: str,
    shards: list[int],
    slot: int,
    cycle_id: int | None,
    now: int,
) -> None:
    """Mark `slot` done for `shards`: their cycle_now and their open cycle log entries."""
    marks = ", ".join(str(int(s)) for s in shards)
    params = {"slot": slot, "h": holder, "c": cycle_id, "now": now}
    connection.execute(
        text(f"UPDATE shard_leases SET cycle_now = :slot WHERE holder = :h AND shard IN ({marks})"),
        params,
    )
    connection.execute(
        text(
            "UPDATE shard_cycles SET finished_at = :now, cycle_id = :c WHERE holder = :h "
            f"AND now = :slot AND finished_at IS NULL AND shard IN ({marks})"
        ),
        params,
    )


def keys_scored_at(connection: Connection, now: int) -> pd.DataFrame:
    """(series_id, model_id) of the pairs scored by cycles at `now`: what the shards touched."""
    return read_frame(
        connection,
        "SELECT DISTINCT series_id, model_id FROM pairs WHERE scored_at = :now",
        {"now": now},
    ).astype("int64")
