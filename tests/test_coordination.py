"""Shard leases on both stores: exclusive acquisition, fair shares, expiry, fencing, slots.

Exclusivity is checked by counting holders in the lease table itself after concurrent
acquisitions; the shard hash against scipy's chi-square goodness-of-fit test and against a run
in another interpreter with a different PYTHONHASHSEED (Python's own `hash` of text changes
with it, ours must not); cron slots against times worked out by hand with the standard library.
Lease expiry is on the database's clock with one-second resolution, so the waits are seconds.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sqlalchemy import Engine, text

from aftercast.config import Config
from aftercast.coordination import (
    CoordinationConfig,
    Coordinator,
    LeaseLost,
    coordinated_cycle,
    latest_slot,
    series_in_shards,
    shard_of,
)
from aftercast.errors import AftercastError
from aftercast.ingest import ingest_path
from aftercast.scenario import series_ids
from aftercast.settings.schedule import Schedule
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate, write
from aftercast.store.leases import FLEET
from tests.conftest import make_config
from tests.replay import Step, assert_same_store, daily_steps, run_step, store_snapshot

QUICK = CoordinationConfig(shards=6, lease_seconds=2)


def holders(engine: Engine) -> dict[int, str | None]:
    with engine.connect() as connection:
        rows = connection.execute(
            text("SELECT shard, holder FROM shard_leases WHERE shard >= 0")
        ).all()
    return {int(s): h for s, h in rows}


def steps_at(steps: list[Step]) -> list[int]:
    return [s.now for s in steps if s.now is not None]


def wait_for_expiry(seconds: int = QUICK.lease_seconds) -> None:
    # Expiry is compared in whole seconds of the database clock: one more second is certain.
    time.sleep(seconds + 1.2)


def test_shard_hash_is_uniform() -> None:
    keys = series_ids(24_000)
    counts = np.bincount(shard_of(keys, 16), minlength=16)
    # Chi-square goodness of fit against equal shares (scipy.stats.chisquare); alpha 1e-3.
    assert stats.chisquare(counts).pvalue > 1e-3
    assert shard_of(keys, 1).max() == 0


def test_shard_hash_is_stable_across_processes() -> None:
    keys = series_ids(50)
    script = (
        "from aftercast.coordination import shard_of; from aftercast.scenario import series_ids; "
        "print(list(shard_of(series_ids(50), 16)), hash('shop-001/rye'))"
    )
    outputs = []
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        done = subprocess.run(
            [sys.executable, "-c", script], env=env, capture_output=True, text=True, check=True
        )
        outputs.append(done.stdout.split("] "))
    # Python's string hash depends on the seed (PEP 456); the shard hash does not.
    assert outputs[0][1] != outputs[1][1]
    assert outputs[0][0] == outputs[1][0] == str(list(shard_of(keys, 16)))[:-1]


def test_two_replicas_split_the_shards(engine: Engine) -> None:
    first, second = Coordinator(engine, QUICK, "a"), Coordinator(engine, QUICK, "b")
    assert len(first.acquire()) == 6  # alone, it takes everything
    assert second.acquire() == {}  # all held: nothing to take until the first rebalances
    first.rebalance()
    assert len(second.acquire()) == 3
    owned = holders(engine)
    assert sorted(str(h) for h in owned.values()) == ["a"] * 3 + ["b"] * 3
    assert set(first.held).isdisjoint(second.held)


def test_concurrent_acquisition_never_double_books(engine: Engine) -> None:
    replicas = [
        Coordinator(engine, CoordinationConfig(shards=12, lease_seconds=30), f"r{i}")
        for i in range(3)
    ]
    for replica in replicas:  # all three are members before anyone takes a shard
        replica.renew()
    barrier = threading.Barrier(len(replicas))
    errors: list[BaseException] = []

    def grab(replica: Coordinator) -> None:
        try:
            barrier.wait()
            replica.acquire()
        except BaseException as exc:  # reported below; a thread cannot fail the test itself
            errors.append(exc)

    threads = [threading.Thread(target=grab, args=(r,)) for r in replicas]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert not errors
    taken = [s for r in replicas for s in r.held]
    assert len(taken) == len(set(taken)) == 12
    assert all(len(r.held) == 4 for r in replicas)
    assert {s: h for s, h in holders(engine).items()} == {
        s: r.name for r in replicas for s in r.held
    }


def test_expired_lease_is_taken_over_and_the_old_holder_is_fenced(engine: Engine) -> None:
    old, new = Coordinator(engine, QUICK, "old"), Coordinator(engine, QUICK, "new")
    old.acquire()
    tokens = dict(old.held)
    with old.fenced(list(old.held)), write(engine) as connection:
        connection.execute(text("INSERT INTO models (name) VALUES ('written-while-held')"))
    wait_for_expiry()
    taken = new.acquire()
    assert sorted(taken) == list(range(6))
    assert all(taken[s] == tokens[s] + 1 for s in taken)  # each acquisition bumps the token
    with pytest.raises(LeaseLost), old.fenced(list(tokens)), write(engine) as connection:
        connection.execute(text("INSERT INTO models (name) VALUES ('written-after-loss')"))
    with engine.connect() as connection:
        names = connection.execute(text("SELECT name FROM models")).scalars().all()
    assert names == ["written-while-held"]
    assert old.renew() == {}


def test_renewal_keeps_a_lease_past_its_first_expiry(engine: Engine) -> None:
    holder, rival = Coordinator(engine, QUICK, "holder"), Coordinator(engine, QUICK, "rival")
    holder.acquire()
    with holder.fenced(list(holder.held)):  # renews every lease_seconds / 3 meanwhile
        wait_for_expiry()
        assert rival.acquire() == {}
    assert len(holder.renew()) == 6


def test_leaving_hands_shards_over_at_once(engine: Engine) -> None:
    first, second = Coordinator(engine, QUICK, "first"), Coordinator(engine, QUICK, "second")
    first.acquire()
    first.leave()
    assert len(second.acquire()) == 6


def test_a_different_shard_count_is_refused_while_in_use(engine: Engine) -> None:
    Coordinator(engine, QUICK, "six").acquire()
    with pytest.raises(AftercastError, match="coordination.shards"):
        Coordinator(engine, CoordinationConfig(shards=8, lease_seconds=2), "eight").acquire()


def test_series_in_shards_partitions_the_series(
    engine: Engine, config: Config, tmp_path: Path
) -> None:
    keys = series_ids(40)
    pd.DataFrame({"series_id": keys}).to_csv(tmp_path / "series.csv", index=False)
    ingest_path(engine, config, "series", tmp_path / "series.csv")
    with engine.connect() as connection:
        parts = [series_in_shards(connection, [s], 4) for s in range(4)]
        everything = series_in_shards(connection, range(4), 4)
    assert sum(len(p) for p in parts) == 40 == len(np.unique(np.concatenate(parts)))
    assert sorted(everything) == sorted(np.concatenate(parts))


def test_interval_slots_are_aligned_to_the_epoch() -> None:
    quarter = Schedule(interval_seconds=900)
    clock = datetime(2026, 6, 3, 12, 14, 59, tzinfo=UTC).timestamp()
    assert latest_slot(quarter, clock) == datetime(2026, 6, 3, 12, 0, tzinfo=UTC).timestamp()
    assert latest_slot(quarter, clock + 1) == clock + 1  # 12:15:00 is itself a slot


def test_cron_slots_are_the_latest_fire_time() -> None:
    daily = Schedule(cron="30 6 * * *")
    at = datetime(2026, 6, 3, 6, 29, tzinfo=UTC).timestamp()
    # Worked out by hand: the 06:30 run of the day before, then the same day's once it passed.
    assert latest_slot(daily, at) == datetime(2026, 6, 2, 6, 30, tzinfo=UTC).timestamp()
    assert latest_slot(daily, at + 60) == datetime(2026, 6, 3, 6, 30, tzinfo=UTC).timestamp()
    monthly = Schedule(cron="0 0 1 * *")
    mid_june = datetime(2026, 6, 17, tzinfo=UTC).timestamp()
    assert latest_slot(monthly, mid_june) == datetime(2026, 6, 1, tzinfo=UTC).timestamp()


def test_one_coordinated_replica_equals_plain_cycles(config: Config, tmp_path: Path) -> None:
    """Two replicas taking turns shard by shard end with the store a plain run gives.

    The fleet-wide stages (windows, detection, alerts) run once per slot, after every shard.
    """
    steps = daily_steps(tmp_path / "feed")
    coordinated = make_engine(config.store.url)
    migrate(coordinated)
    plain_url = f"sqlite:///{tmp_path / 'plain.db'}"
    plain = make_engine(plain_url)
    migrate(plain)
    plain_config = make_config(plain_url)
    replicas = [Coordinator(coordinated, QUICK, "left"), Coordinator(coordinated, QUICK, "right")]
    for step in steps:
        run_step(plain, plain_config, step)
        if step.kind != "cycle":
            run_step(coordinated, config, step)
            continue
        assert step.now is not None
        for replica in replicas + replicas:  # the second round: the shards released meanwhile
            coordinated_cycle(coordinated, config, replica, step.now)
        with coordinated.connect() as connection:
            done = (
                connection.execute(text("SELECT cycle_now FROM shard_leases WHERE shard >= 0"))
                .scalars()
                .all()
            )
        assert set(done) == {step.now}
    assert_same_store(store_snapshot(coordinated), store_snapshot(plain))
    with coordinated.connect() as connection:
        log = read_frame(connection, "SELECT id, shard, now, finished_at FROM shard_cycles")
    assert log["finished_at"].notna().all()
    assert (log.groupby(["shard", "now"]).size() == 1).all()  # each shard and the fleet once
    assert len(log) == (QUICK.shards + 1) * len(steps_at(steps))
    fleet = log[log["shard"] == FLEET].set_index("now")["id"]
    last_shard = log[log["shard"] >= 0].groupby("now")["id"].max()
    assert (fleet > last_shard.reindex(fleet.index)).all()  # the fleet after every shard
    coordinated.dispose()
    plain.dispose()
