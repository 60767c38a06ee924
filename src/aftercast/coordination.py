"""Several replicas on one store: series split into shards, each shard's cycle run by one replica.

A series belongs to shard `SipHash(series key) mod shards`, the same on every replica and across
restarts. A replica holds shards through leases (`store.leases`: holder, expiry on the
database's clock, fencing token): it takes its fair share (shards / live replicas) of those that
are free or expired, renews them while it works and releases what exceeds its share afterwards.
A shard is cycled once per scheduled slot: its lease row records the slot its last cycle
finished. The stages that look at the whole fleet at once (windows, false-discovery control
across all series, alerts, delivery) run once per slot, by whichever replica takes the FLEET
lease after every shard has finished that slot. While a shard cycle runs, every write transaction of
its thread first checks that our leases still carry our tokens, locking those rows on
PostgreSQL until commit: a replica that stalled past its lease and lost a shard has its next
write refused, never applied on top of the new holder's. A replica killed mid-cycle simply
stops renewing; when its leases expire another replica takes the shards and, their slot not
being marked done, cycles them. Each stage commits in its own transactions, so the new holder
finishes the work and redoes none of what was committed.
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
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine, event

from aftercast.config import Config, CoordinationConfig
from aftercast.logs import log_event
from aftercast.store import leases
from aftercast.store.bulk import read_frame
from aftercast.store.db import write

if TYPE_CHECKING:
    from aftercast.cycle import CycleReport
    from aftercast.settings.schedule import Schedule

log = logging.getLogger("aftercast.coordination")

# SipHash-2-4 key (16 bytes) of the shard hash; changing it would move every series.
SHARD_HASH_KEY = "aftercast shards"


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
    stored = leases.held_by(connection, fence.holder, lock=True)
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
        self.fleet_token: int | None = None
        self._lock = threading.Lock()
        self._joined = False
        _install_fence(engine)

    @property
    def shards(self) -> int:
        return self.settings.shards

    def _sync(self, connection: Connection) -> dict[int, int]:
        tokens = leases.held_by(connection, self.name)
        self.fleet_token = tokens.pop(leases.FLEET, None)
        self.held = tokens
        return dict(tokens)

    def _renewed(self, connection: Connection) -> int:
        now = leases.database_now(connection)
        leases.heartbeat(connection, self.name, now, now + self.settings.lease_seconds)
        self._sync(connection)
        return now

    def _fair_share(self, connection: Connection, now: int) -> int:
        return math.ceil(self.shards / max(leases.live_members(connection, now), 1))

    def acquire(self) -> dict[int, int]:
        """Renew what we hold and take free or expired shards up to our fair share."""
        with self._lock, write(self.engine) as connection:
            if not self._joined:
                leases.ensure_shards(connection, self.shards, leases.database_now(connection))
                self._joined = True
            now = self._renewed(connection)
            want = self._fair_share(connection, now) - len(self.held)
            if want > 0:
                until = now + self.settings.lease_seconds
                leases.take_free(connection, self.name, now, until, want)
            return self._sync(connection)

    def renew(self) -> dict[int, int]:
        """Extend our leases; shards someone else took are dropped from `held`."""
        with self._lock, write(self.engine) as connection:
            self._renewed(connection)
            return dict(self.held)

    def release(self, shards: Collection[int] | None = None) -> None:
        """Give shards back at once (all by default), so others need not wait for expiry."""
        with self._lock, write(self.engine) as connection:
            everything = [*self.held, leases.FLEET]
            leases.release(connection, self.name, list(everything if shards is None else shards))
            self._sync(connection)

    def rebalance(self) -> None:
        """Release the shards beyond our fair share (the highest numbers), after a cycle."""
        with self.engine.connect() as connection:
            fair = self._fair_share(connection, leases.database_now(connection))
        extra = sorted(self.held)[fair:]
        if extra:
            self.release(extra)
            log_event(log, "shards released", replica=self.name, shards=extra)

    def leave(self) -> None:
        """Release everything and leave the member list (a clean shutdown)."""
        self.release()
        with write(self.engine) as connection:
            leases.leave(connection, self.name)

    def due(self, slot: int) -> list[int]:
        """Held shards whose last finished cycle is older than `slot`."""
        with self.engine.connect() as connection:
            marks = leases.cycle_marks(connection)
        mine = marks[(marks["holder"] == self.name) & marks["shard"].isin(list(self.held))]
        late = mine["cycle_now"].isna() | (mine["cycle_now"] < slot)
        return sorted(int(s) for s in mine.loc[late, "shard"])

    def fleet_turn(self, slot: int) -> bool:
        """Whether this replica runs the fleet-wide stages for `slot` (once all shards did theirs).

        One replica per slot gets True: the one that takes the FLEET lease first.
        """
        with self._lock, write(self.engine) as connection:
            now = leases.database_now(connection)
            marks = leases.cycle_marks(connection).set_index("shard")["cycle_now"]
            if (marks.fillna(-1) < slot).drop(leases.FLEET).any() or marks[leases.FLEET] >= slot:
                return False
            if self.fleet_token is None:
                until = now + self.settings.lease_seconds
                leases.take_free(connection, self.name, now, until, 1, fleet=True)
                self._sync(connection)
            return self.fleet_token is not None

    def _tokens(self, shards: Collection[int]) -> dict[int, int]:
        tokens = dict(self.held)
        if self.fleet_token is not None:
            tokens[leases.FLEET] = self.fleet_token
        return {s: tokens[s] for s in shards}

    @contextmanager
    def fenced(self, shards: Collection[int]) -> Iterator[None]:
        """Fence this thread's writes on `shards` and keep their leases renewed meanwhile."""
        tokens = self._tokens(shards)
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
        tokens = self._tokens(shards)
        with write(self.engine) as connection:
            now = leases.database_now(connection)
            leases.record_start(connection, self.name, tokens, slot, now)

    def finish_cycle(self, shards: list[int], slot: int, cycle_id: int | None) -> None:
        """Mark `slot` done for `shards`, in one fenced transaction with the log entries."""
        with write(self.engine) as connection:
            now = leases.database_now(connection)
            leases.record_finish(connection, self.name, shards, slot, cycle_id, now)


@dataclass
class ReplicaCycle:
    """What one `coordinated_cycle` call did: the shards it cycled and whether it ran the fleet."""

    slot: int
    shards: list[int] = field(default_factory=list)
    shard_report: CycleReport | None = None  # benchmarks and matching of those shards
    fleet_report: CycleReport | None = None  # the fleet-wide stages, when it was our turn
    lost: str | None = None  # why it stopped early: a lease taken over meanwhile

    def as_json(self) -> dict[str, Any]:
        reports = {"shard_report": self.shard_report, "fleet_report": self.fleet_report}
        return {
            "slot": self.slot,
            "shards": self.shards,
            "lost": self.lost,
            **{k: r.as_json() if r else None for k, r in reports.items()},
        }


def coordinated_cycle(
    engine: Engine, config: Config, coordinator: Coordinator, now: int | None = None
) -> ReplicaCycle:
    """One replica's turn: cycle its shards due at slot `now`, then the fleet if it is last.

    `now` defaults to the latest slot of `schedule.cycle`. Shards run benchmarks and matching
    for their series; once every shard has finished the slot, exactly one replica runs the
    stages that look at every series at once (sources, windows, detection, alerts, delivery).
    Call it every `coordination.renew_seconds` or so: it does nothing when nothing is due.
    """
    coordinator.acquire()
    slot = latest_slot(config.schedule.cycle, time.time()) if now is None else now
    done = ReplicaCycle(slot)
    try:
        _cycle_shards(engine, config, coordinator, done)
        if coordinator.fleet_turn(slot):
            _cycle_fleet(engine, config, coordinator, done)
    except LeaseLost as exc:
        log_event(log, "shard lease lost", level=logging.WARNING, detail=str(exc))
        done.lost = str(exc)
        coordinator.renew()
        return done
    coordinator.rebalance()
    return done


def _cycle_shards(
    engine: Engine, config: Config, coordinator: Coordinator, done: ReplicaCycle
) -> None:
    from aftercast.cycle import run_cycle  # the cycle imports the config, which imports us

    due = coordinator.due(done.slot)
    if not due:
        return
    with coordinator.fenced(due):
        coordinator.begin_cycle(due, done.slot)
        series = None
        if len(due) < coordinator.shards:
            with engine.connect() as connection:
                series = series_in_shards(connection, due, coordinator.shards)
        report = run_cycle(engine, config, done.slot, series_ids=series, fleet=False)
        coordinator.finish_cycle(due, done.slot, report.cycle_id)
    done.shards, done.shard_report = due, report
    log_event(log, "shards cycled", replica=coordinator.name, shards=due, now=done.slot)


def _cycle_fleet(
    engine: Engine, config: Config, coordinator: Coordinator, done: ReplicaCycle
) -> None:
    from aftercast.cycle import run_cycle

    fleet = [leases.FLEET]
    with coordinator.fenced(fleet):
        coordinator.begin_cycle(fleet, done.slot)
        with engine.connect() as connection:
            touched = leases.keys_scored_at(connection, done.slot)
        nothing = np.empty(0, dtype=np.int64)  # every shard has matched already
        report = run_cycle(engine, config, done.slot, series_ids=nothing, touched=touched)
        coordinator.finish_cycle(fleet, done.slot, report.cycle_id)
    coordinator.release(fleet)
    done.fleet_report = report
