"""Two `aftercast run` processes on one PostgreSQL store coordinate their cycles through leases.

Each process runs its own APScheduler (its jobs are in memory, never shared) and the cycle job
takes shard leases in the store. The yardstick is the store's own lease tables read from here:
every shard and the fleet-wide stages finish the slot exactly once, the two replicas settle on
equal shares, and a clean stop (SIGTERM, what a container stop sends) hands every lease back.
"""

from __future__ import annotations

import signal
import time
from collections.abc import Callable
from pathlib import Path

import pandas as pd
import pytest
import yaml
from sqlalchemy import Engine

from aftercast.coordination import latest_slot
from aftercast.daemon import Jobs, build_scheduler, replica_coordinator
from aftercast.settings.schedule import Schedule
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate
from aftercast.web.metrics import Metrics
from tests.conftest import make_config
from tests.test_daemon import STOP_SECONDS, _start, _stop

SHARDS = 4
DAY = 86400  # one slot a day: the slot cannot roll over while the test runs (but at midnight)


def wait_for(condition: Callable[[], bool], what: str, seconds: float = 60) -> None:
    deadline = time.monotonic() + seconds
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.2)


def leases_now(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(connection, "SELECT shard, holder, cycle_now FROM shard_leases")


def test_the_cycle_job_is_coordinated_on_postgresql_only(pg_url: str, sqlite_url: str) -> None:
    shared = make_config(pg_url, coordination={"shards": SHARDS, "lease_seconds": 6})
    alone = make_config(sqlite_url)
    for config, expected in ((shared, True), (alone, False)):
        engine = make_engine(config.store.url)
        coordinator = replica_coordinator(engine, config)
        assert (coordinator is not None) is expected
        scheduler = build_scheduler(Jobs(engine, config, Metrics(), coordinator), config)
        scheduler.start(paused=True)
        try:
            trigger = scheduler.get_job("cycle").trigger
            if expected:
                # The job looks for due shards every renew interval (lease / 3), not once a slot.
                assert trigger.interval.total_seconds() == 2
            else:
                assert trigger.interval.total_seconds() == alone.schedule.cycle.interval_seconds
        finally:
            scheduler.shutdown(wait=False)
            engine.dispose()


@pytest.mark.postgres
def test_two_daemons_cycle_each_shard_once_and_hand_back_on_stop(
    pg_url: str, tmp_path: Path
) -> None:
    engine = make_engine(pg_url)
    migrate(engine)  # `aftercast init`, run once before the replicas start
    config = {
        "store": {"url": pg_url},
        "schedule": {"cycle": DAY},
        "coordination": {"shards": SHARDS, "lease_seconds": 3},
    }
    path = tmp_path / "replica.yaml"
    path.write_text(yaml.safe_dump(config), encoding="utf-8")
    first, _ = _start(tmp_path, "--config", str(path))
    second, _ = _start(tmp_path, "--config", str(path))
    slot = latest_slot(Schedule.model_validate(DAY), time.time())
    try:

        def settled() -> bool:
            leases = leases_now(engine)
            shards = leases[leases["shard"] >= 0]
            done = (leases["cycle_now"].fillna(-1) >= slot).all()
            counts = shards["holder"].value_counts()
            return bool(done and len(counts) == 2 and (counts == SHARDS // 2).all())

        wait_for(settled, "every shard cycled and the shares split between the two replicas")
    finally:
        results = [_stop(process, signal.SIGTERM) for process in (first, second)]
    for code, spent, lines in results:
        assert code == 0 and spent < STOP_SECONDS
        assert lines[-1]["event"] == "daemon stopped" and lines[-1]["clean"] is True
    with engine.connect() as connection:
        log = read_frame(connection, "SELECT shard, now, holder, finished_at FROM shard_cycles")
        members = read_frame(connection, "SELECT * FROM replicas")
    at_slot = log[log["now"] == slot]
    assert at_slot["finished_at"].notna().all()
    # Every shard and the fleet-wide stages (shard -1) ran the slot exactly once, fleet-wide.
    assert sorted(at_slot["shard"]) == [-1, *range(SHARDS)]
    names = {lines[0]["replica"] for _, _, lines in results}
    assert len(names) == 2 and set(at_slot["holder"]) <= names
    # A clean stop releases every lease and leaves the member list: no one waits for expiry.
    assert leases_now(engine)["holder"].isna().all() and members.empty
    engine.dispose()
