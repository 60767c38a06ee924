"""Several replicas on one store: series split into shards, each shard's cycle run by one replica.

A series belongs to shard `SipHash(series key) mod shards`, the same on every replica and across
restarts. A replica holds shards through leases in `shard_leases` (holder, expiry on the
database's clock, fencing token): it takes its fair share (shards / live replicas) of those that
are free or expired, with `SELECT ... FOR UPDATE SKIP LOCKED` on PostgreSQL (replicas acquiring
at the same moment take different rows) and an atomic UPDATE inside SQLite's write lock, renews
them while it works and releases what exceeds its share afterwards. A shard is cycled once per
scheduled slot: `cycle_now` records the slot its last cycle finished. While a shard cycle runs,
every write transaction of that thread first checks that the leases still carry our tokens
(locking those rows on PostgreSQL, so no one can take them until it commits): a replica that
stalled past its lease and lost a shard has its next write refused, never applied on top of the
new holder's. A replica killed mid-cycle simply stops renewing; when its leases expire another
replica takes the shards and, their slot not being marked done, cycles them. Each stage commits
in its own transactions, so the new holder finishes the work and redoes none of it.
"""

from __future__ import annotations

import logging
import math
import os
import socket
import threading
import time
import uuid
from collections.abc import Collection, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field
from sqlalchemy import Connection, Engine, event, text

from aftercast.errors import AftercastError
from aftercast.logs import log_event
from aftercast.store.bulk import is_postgres, read_frame
from aftercast.store.db import write

if TYPE_CHECKING:
    from aftercast.config import Config
    from aftercast.cycle import CycleReport
    from aftercast.sources.base import Schedule

log = logging.getLogger("aftercast.coordination")

# SipHash-2-4 key (16 bytes) of the shard hash; changing it would move every series.
SHARD_HASH_KEY = "aftercast shards"


class CoordinationConfig(BaseModel):
    """`coordination:` - how replicas sharing one store split the series between them."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    shards: int = Field(16, ge=1, le=4096)
    lease_seconds: int = Field(60, ge=2)

    @property
    def renew_seconds(self) -> float:
        """How often a holder renews, and how often the daemon should look for due shards."""
        return self.lease_seconds / 3


class LeaseLost(RuntimeError):
    """A shard lease this replica held was taken over; the transaction was not applied."""


def shard_of(keys: Any, shards: int) -> np.ndarray:
    """Shard number of each series key: a keyed SipHash of its UTF-8 text, mod `shards`.

    Unlike Python's `hash`, the value does not change between processes or runs.
    """
    values = np.asarray(keys, dtype=object)
    hashed = pd.util.hash_array(values, encoding="utf8", hash_key=SHARD_HASH_KEY, categorize=False)
    return (hashed % np.uint64(shards)).astype(np.int64)


def series_in_shards(connection: Connection, shards: Collection[int], total: int) -> np.ndarray:
    """Store ids of the series whose shard is one of `shards` (out of `total`)."""
    frame = read_frame(connection, "SELECT id, key FROM series")
    if frame.empty:
        return np.empty(0, dtype=np.int64)
    mask = np.isin(shard_of(frame["key"], total), np.fromiter(shards, dtype=np.int64))
    return frame["id"].to_numpy(np.int64)[mask]


def database_now(connection: Connection) -> int:
    """The database server's clock: every replica compares lease expiries against one clock."""
    sql = (
        "SELECT CAST(FLOOR(EXTRACT(EPOCH FROM clock_timestamp())) AS BIGINT)"
        if is_postgres(connection)
        else "SELECT CAST(strftime('%s', 'now') AS INTEGER)"
    )
    return int(connection.execute(text(sql)).scalar_one())


def latest_slot(schedule: Schedule, clock: float) -> int:
    """The latest scheduled cycle time at or before `clock`, identical on every replica.

    Interval schedules are aligned to the epoch (900 s: on the quarter hours); cron schedules
    give their latest fire time.
    """
    if schedule.interval_seconds is not None:
        return int(math.floor(clock / schedule.interval_seconds) * schedule.interval_seconds)
    trigger = schedule.trigger()
    moment = datetime.fromtimestamp(clock, UTC)
    lookback = timedelta(hours=1)
    while lookback < timedelta(days=1500):
        fire = trigger.get_next_fire_time(None, moment - lookback)
        if fire is not None and fire <= moment:
            while (after := trigger.get_next_fire_time(fire, moment)) and after <= moment:
                fire = after
            return int(fire.timestamp())
        lookback *= 4
    return int(clock)


@dataclass(frozen=True)
class _Fence:
    holder: str
    tokens: dict[int, int]  # shard -> token this replica acquired it with


_FENCE: ContextVar[_Fence | None] = ContextVar("aftercast_shard_fence", default=None)


def _check_fence(connection: Connection) -> None:
    """On every write transaction begun under a fence: refuse it unless our tokens still hold.

    Runs inside the transaction (after SQLite's BEGIN IMMEDIATE), and on PostgreSQL locks our
    lease rows until commit, so a takeover waits for, or skips, a transaction already checked.
    """
    fence = _FENCE.get()
    if fence is None or not connection.info.get("write"):
        return
    lock = " FOR NO KEY UPDATE" if is_postgres(connection) else ""
    rows = connection.execute(
        text(f"SELECT shard, token FROM shard_leases WHERE holder = :h{lock}"), {"h": fence.holder}
    ).all()
    stored = {int(shard): int(token) for shard, token in rows}
    lost = sorted(s for s, t in fence.tokens.items() if stored.get(s) != t)
    if lost:
        raise LeaseLost(f"replica {fence.holder} no longer holds shards {lost}")


def _install_fence(engine: Engine) -> None:
    # Registered after the store's own "begin" hook, so SQLite's BEGIN IMMEDIATE comes first.
    if not event.contains(engine, "begin", _check_fence):
        event.listen(engine, "begin", _check_fence)


def replica_name() -> str:
    """Host, process and a random part: unique even when two replicas share a host name."""
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


class Coordinator:
    """One replica's view of the shard leases: acquire, renew, release, and fence its writes."""

    def __init__(self, engine: Engine, settings: CoordinationConfig, name: str | None = None):
        self.engine, self.settings = engine, settings
        self.name = name or replica_name()
        self.held: dict[int, int] = {}  # shard -> fencing token
        self._lock = threading.Lock()
        self._joined = False
        _install_fence(engine)

    @property
    def shards(self) -> int:
        return self.settings.shards

    def _ensure_shards(self, connection: Connection, now: int) -> None:
        rows = read_frame(connection, "SELECT shard, shards, holder, expires_at FROM shard_leases")
        other = rows[rows["shards"] != self.shards] if len(rows) else rows
        if len(other):
            busy = other[other["holder"].notna() & (other["expires_at"] >= now)]
            if len(busy):
                raise AftercastError(
                    f"config key coordination.shards: this replica has {self.shards}, replica "
                    f"{busy['holder'].iloc[0]} works with {int(busy['shards'].iloc[0])}; "
                    "give every replica the same value"
                )
            connection.execute(
                text("DELETE FROM shard_leases WHERE shard >= :n"), {"n": self.shards}
            )
            connection.execute(
                text(
                    "UPDATE shard_leases SET shards = :n, holder = NULL, expires_at = 0, "
                    "cycle_now = NULL"
                ),
                {"n": self.shards},
            )
        for shard in range(self.shards):
            connection.execute(
                text(
                    "INSERT INTO shard_leases (shard, shards, token, expires_at) "
                    "VALUES (:s, :n, 0, 0) ON CONFLICT (shard) DO NOTHING"
                ),
                {"s": shard, "n": self.shards},
            )

    def _heartbeat(self, connection: Connection, now: int) -> None:
        until = now + self.settings.lease_seconds
        connection.execute(
            text(
                "INSERT INTO replicas (name, started_at, seen_at, expires_at) "
                "VALUES (:name, :now, :now, :until) ON CONFLICT (name) DO UPDATE "
                "SET seen_at = :now, expires_at = :until"
            ),
            {"name": self.name, "now": now, "until": until},
        )
        connection.execute(
            text("UPDATE shard_leases SET expires_at = :until WHERE holder = :h"),
            {"until": until, "h": self.name},
        )

    def _read_held(self, connection: Connection) -> None:
        rows = connection.execute(
            text("SELECT shard, token FROM shard_leases WHERE holder = :h AND shards = :n"),
            {"h": self.name, "n": self.shards},
        ).all()
        self.held = {int(shard): int(token) for shard, token in rows}

    def fair_share(self, connection: Connection, now: int) -> int:
        live = connection.execute(
            text("SELECT COUNT(*) FROM replicas WHERE expires_at > :now"), {"now": now}
        ).scalar_one()
        return math.ceil(self.shards / max(int(live), 1))

    def acquire(self) -> dict[int, int]:
        """Renew what we hold and take free or expired shards up to our fair share."""
        with self._lock, write(self.engine) as connection:
            now = database_now(connection)
            if not self._joined:
                self._ensure_shards(connection, now)
            self._heartbeat(connection, now)
            self._read_held(connection)
            want = self.fair_share(connection, now) - len(self.held)
            if want > 0:
                self._take(connection, now, want)
                self._read_held(connection)
            self._joined = True
            return dict(self.held)

    def _take(self, connection: Connection, now: int, want: int) -> None:
        free = (
            "SELECT shard FROM shard_leases WHERE shards = :n "
            "AND (holder IS NULL OR expires_at < :now) ORDER BY shard LIMIT :want"
        )
        values = "holder = :h, acquired_at = :now, expires_at = :until"
        if is_postgres(connection):
            sql = (
                f"WITH free AS ({free} FOR UPDATE SKIP LOCKED) UPDATE shard_leases l "
                f"SET token = l.token + 1, {values} FROM free WHERE l.shard = free.shard"
            )
        else:  # the write transaction holds SQLite's lock: this UPDATE is atomic
            sql = f"UPDATE shard_leases SET token = token + 1, {values} WHERE shard IN ({free})"
        params = {"n": self.shards, "now": now, "want": want, "h": self.name}
        connection.execute(text(sql), {**params, "until": now + self.settings.lease_seconds})

    def renew(self) -> dict[int, int]:
        """Extend our leases; shards someone else took are dropped from `held`."""
        with self._lock, write(self.engine) as connection:
            self._heartbeat(connection, database_now(connection))
            self._read_held(connection)
            return dict(self.held)

    def release(self, shards: Collection[int] | None = None) -> None:
        """Give shards back at once (all by default), so others need not wait for expiry."""
        with self._lock, write(self.engine) as connection:
            chosen = list(self.held if shards is None else shards)
            if chosen:
                marks = ", ".join(str(int(s)) for s in chosen)
                connection.execute(
                    text(
                        "UPDATE shard_leases SET holder = NULL, expires_at = 0 "
                        f"WHERE holder = :h AND shard IN ({marks})"
                    ),
                    {"h": self.name},
                )
            self._read_held(connection)

    def rebalance(self) -> None:
        """Release the shards beyond our fair share (the highest numbers), after a cycle."""
        with self.engine.connect() as connection:
            fair = self.fair_share(connection, database_now(connection))
        extra = sorted(self.held)[fair:]
        if extra:
            self.release(extra)
            log_event(log, "shards released", replica=self.name, shards=extra)

    def leave(self) -> None:
        """Release everything and leave the member list (a clean shutdown)."""
        self.release()
        with write(self.engine) as connection:
            connection.execute(text("DELETE FROM replicas WHERE name = :n"), {"n": self.name})

    def due(self, slot: int) -> list[int]:
        """Held shards whose last finished cycle is older than `slot`."""
        if not self.held:
            return []
        with self.engine.connect() as connection:
            rows = connection.execute(
                text("SELECT shard, cycle_now FROM shard_leases WHERE holder = :h"),
                {"h": self.name},
            ).all()
        return sorted(
            int(s) for s, done in rows if int(s) in self.held and (done is None or done < slot)
        )

    @contextmanager
    def fenced(self, shards: Collection[int]) -> Iterator[None]:
        """Fence this thread's writes on `shards` and keep their leases renewed meanwhile."""
        tokens = {s: self.held[s] for s in shards}
        stop = threading.Event()
        renewer = threading.Thread(target=self._keep_renewed, args=(stop,), daemon=True)
        reset = _FENCE.set(_Fence(self.name, tokens))
        renewer.start()
        try:
            yield
        finally:
            _FENCE.reset(reset)
            stop.set()
            renewer.join()

    def _keep_renewed(self, stop: threading.Event) -> None:
        while not stop.wait(self.settings.renew_seconds):
            try:
                self.renew()
            except Exception:  # the store is briefly unreachable: the next round tries again
                log.exception("lease renewal failed")

    def begin_cycle(self, shards: list[int], slot: int) -> None:
        """Log that we start cycling `shards` for `slot` (call it under `fenced`)."""
        with write(self.engine) as connection:
            now = database_now(connection)
            for shard in shards:
                connection.execute(
                    text(
                        "INSERT INTO shard_cycles (shard, now, holder, token, started_at) "
                        "VALUES (:s, :slot, :h, :t, :now)"
                    ),
                    {"s": shard, "slot": slot, "h": self.name, "t": self.held[shard], "now": now},
                )

    def finish_cycle(self, shards: list[int], slot: int, cycle_id: int) -> None:
        """Mark `slot` done for `shards`, in one fenced transaction with the log entries."""
        marks = ", ".join(str(s) for s in shards)
        with write(self.engine) as connection:
            params = {"slot": slot, "h": self.name, "c": cycle_id, "now": database_now(connection)}
            connection.execute(
                text(
                    f"UPDATE shard_leases SET cycle_now = :slot WHERE holder = :h "
                    f"AND shard IN ({marks})"
                ),
                params,
            )
            connection.execute(
                text(
                    "UPDATE shard_cycles SET finished_at = :now, cycle_id = :c WHERE holder = :h "
                    f"AND now = :slot AND finished_at IS NULL AND shard IN ({marks})"
                ),
                params,
            )


def coordinated_cycle(
    engine: Engine, config: Config, coordinator: Coordinator, now: int | None = None
) -> CycleReport | None:
    """Run the cycle for the shards this replica holds that are due at slot `now`.

    `now` defaults to the latest slot of `schedule.cycle`; None is returned when nothing was due
    or a lease was lost mid-cycle (the new holder finishes that work).
    """
    from aftercast.cycle import run_cycle  # the cycle imports the config, which imports us

    coordinator.acquire()
    slot = latest_slot(config.schedule.cycle, time.time()) if now is None else now
    due = coordinator.due(slot)
    report = None
    if due:
        try:
            with coordinator.fenced(due):
                coordinator.begin_cycle(due, slot)
                series = None
                if len(due) < coordinator.shards:
                    with engine.connect() as connection:
                        series = series_in_shards(connection, due, coordinator.shards)
                report = run_cycle(engine, config, slot, series_ids=series)
                coordinator.finish_cycle(due, slot, report.cycle_id)
        except LeaseLost as exc:
            log_event(log, "shard lease lost", level=logging.WARNING, detail=str(exc))
            coordinator.renew()
            return None
        log_event(log, "shards cycled", replica=coordinator.name, shards=due, now=slot)
    coordinator.rebalance()
    return report
