"""Three replica processes on one PostgreSQL database: shards, takeover after SIGKILL, outbox.

Each replica is a separate Python process doing what a daemon replica does: every fraction of a
second, `coordinated_cycle` for the slot the test has published, then an outbox delivery pass.
The test feeds the invented bakery scenario day by day, publishes each day's slot, and kills one
replica with SIGKILL in the middle of a cycle (commits are slowed down so a cycle lasts long
enough to be interrupted). The yardstick is outside the replicas: the same feed run by a plain
`run_cycle` in this process, whose pairs the replicas' store must equal, and the lease table's
own log, in which every (shard, slot) must be finished exactly once. Exactly-once sending is
checked at a loopback webhook receiver: every notification arrives once (by its webhook-id).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter
from collections.abc import Callable
from functools import partial
from pathlib import Path

import pandas as pd
import pytest
import yaml
from sqlalchemy import Engine, event, text

from aftercast.config import load_config
from aftercast.coordination import Coordinator, coordinated_cycle
from aftercast.store import leases
from aftercast.store.bulk import read_frame
from aftercast.store.db import make_engine, migrate, write
from tests.conftest import make_config
from tests.replay import assert_same_store, daily_steps, run_step, store_snapshot
from tests.servers import HttpRecorder, sample_notification

ROOT = Path(__file__).resolve().parents[1]
SHARDS = 6
LEASE_SECONDS = 2
REPLICAS = 3
SLOW_COMMIT_SECONDS = 0.15  # in the replicas only: stretches a cycle to a few seconds
NOTIFICATIONS = 30


def write_replica_config(folder: Path, url: str, hook: str) -> Path:
    path = folder / "replica.yaml"
    config = {
        "store": {"url": url},
        "coordination": {"shards": SHARDS, "lease_seconds": LEASE_SECONDS},
        "channels": [{"name": "hook", "type": "webhook", "url": hook, "timeout_seconds": 5}],
        "delivery": {"batch_size": 2, "lease_seconds": 30},
    }
    path.write_text(yaml.safe_dump(config), encoding="utf-8")
    return path


def replica_main(config_path: str, clock_path: str, name: str) -> None:
    """A replica: cycle the published slot and deliver due notifications until told to stop."""
    from aftercast.notify.deliver import deliver_due

    config = load_config(config_path)
    engine = make_engine(config.store.url)
    event.listen(engine, "commit", lambda _connection: time.sleep(SLOW_COMMIT_SECONDS))
    coordinator = Coordinator(engine, config.coordination, name)
    clock = Path(clock_path)
    while (published := clock.read_text().strip()) != "stop":
        if published:
            coordinated_cycle(engine, config, coordinator, int(published))
        else:  # before the first slot: stay a live member and settle on a fair share
            coordinator.acquire()
            coordinator.rebalance()
        deliver_due(engine, config)
        time.sleep(0.1)
    coordinator.leave()


def enqueue_notifications(engine: Engine) -> list[str]:
    from aftercast.notify.base import Digest
    from aftercast.notify.outbox import enqueue

    ids = [f"replica-test-{i:03d}" for i in range(NOTIFICATIONS)]
    digests = [Digest(sample_notification(notification_id=i, channel="hook"), []) for i in ids]
    with write(engine) as connection:
        enqueue(connection, digests, None, int(time.time()))
    return ids


def shard_log(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(connection, "SELECT * FROM shard_cycles")


def wait_until(
    condition: Callable[[], bool],
    what: str,
    seconds: float = 60.0,
    alive: Callable[[], object] = str,
) -> None:
    """Poll `condition`; `alive` raises if a replica that should be running has died."""
    deadline = time.monotonic() + seconds
    while not condition():
        alive()
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


def check_alive(processes: list[subprocess.Popen[bytes]], folder: Path, victim: str | None) -> None:
    for i, process in enumerate(processes):
        if process.poll() is not None and f"replica-{i}" != victim:
            output = (folder / f"replica-{i}.log").read_text(errors="replace")
            raise AssertionError(f"replica-{i} exited with {process.returncode}:\n{output[-3000:]}")


def all_sent(engine: Engine) -> bool:
    with engine.connect() as connection:
        statuses = read_frame(connection, "SELECT status FROM notification_outbox")["status"]
    return bool((statuses == "delivered").all())


def slot_done(engine: Engine, slot: int) -> bool:
    with engine.connect() as connection:
        done = connection.execute(
            text("SELECT COUNT(*) FROM shard_leases WHERE cycle_now >= :s"), {"s": slot}
        ).scalar_one()
    return done == SHARDS + 1  # every shard, then the fleet-wide stages


def shares_settled(engine: Engine) -> bool:
    """Every replica is a live member and holds its fair share (SHARDS / REPLICAS) of shards."""
    with engine.connect() as connection:
        now = leases.database_now(connection)
        if leases.live_members(connection, now) != REPLICAS:
            return False
        held = read_frame(
            connection,
            "SELECT holder, COUNT(*) AS n FROM shard_leases WHERE shard >= 0 AND expires_at > :now "
            "GROUP BY holder",
            {"now": now},
        )
    return len(held) == REPLICAS and bool((held["n"] == SHARDS // REPLICAS).all())


def start_replicas(folder: Path, config_path: Path, clock: Path) -> list[subprocess.Popen[bytes]]:
    env = {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]),
    }
    processes = []
    for i in range(REPLICAS):
        log = (folder / f"replica-{i}.log").open("wb")
        processes.append(
            subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "tests.test_replicas",
                    str(config_path),
                    str(clock),
                    f"replica-{i}",
                ],
                cwd=ROOT,
                env=env,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        )
    return processes


def kill_mid_cycle(engine: Engine, slot: int) -> str:
    """SIGKILL whichever replica starts a shard cycle for `slot` first; returns its name."""
    started: list[str] = []

    def someone_started() -> bool:
        log = shard_log(engine)
        running = log[(log["now"] == slot) & (log["shard"] >= 0) & log["finished_at"].isna()]
        started.extend(running["holder"].tolist())
        return bool(started)

    wait_until(someone_started, f"a shard cycle for slot {slot}")
    time.sleep(0.4)  # inside the cycle: it lasts several slowed-down commits
    return started[0]


@pytest.mark.postgres
def test_three_replicas_share_shards_survive_sigkill_and_send_once(
    pg_url: str, tmp_path: Path
) -> None:
    steps = daily_steps(tmp_path / "feed")
    engine = make_engine(pg_url)
    migrate(engine)
    config = make_config(pg_url)
    first_day = next(i for i, s in enumerate(steps) if s.kind == "forecasts")
    for step in steps[:first_day]:  # series and the history of actuals
        run_step(engine, config, step)
    days = steps[first_day:]
    with HttpRecorder(hang_seconds=0.02) as hook:
        sent = enqueue_notifications(engine)
        clock = tmp_path / "clock"
        clock.write_text("")
        config_path = write_replica_config(tmp_path, pg_url, hook.url())
        replicas = start_replicas(tmp_path, config_path, clock)
        names = [f"replica-{i}" for i in range(REPLICAS)]
        victim = None
        try:
            # Slow starters (imports on a loaded machine) would otherwise find every shard taken.
            alive = partial(check_alive, replicas, tmp_path, None)
            wait_until(partial(shares_settled, engine), "the replicas' fair shares", 60, alive)
            slots = [s.now for s in days if s.kind == "cycle"]
            for step in days:
                if step.kind != "cycle":
                    run_step(engine, config, step)
                    continue
                assert step.now is not None
                clock.write_text(str(step.now))
                if step.now == slots[2]:
                    victim = kill_mid_cycle(engine, step.now)
                    replicas[names.index(victim)].send_signal(signal.SIGKILL)
                    replicas[names.index(victim)].wait(10)
                alive = partial(check_alive, replicas, tmp_path, victim)
                wait_until(partial(slot_done, engine, step.now), f"slot {step.now}", 60, alive)
            wait_until(partial(all_sent, engine), "every notification", 30)
        finally:
            clock.write_text("stop")
            for process in replicas:
                try:
                    process.wait(20)
                except subprocess.TimeoutExpired:
                    process.kill()
    for i, process in enumerate(replicas):
        output = (tmp_path / f"replica-{i}.log").read_text(errors="replace")
        if names[i] != victim:
            assert process.returncode == 0 and "Traceback" not in output, output[-3000:]

    log = shard_log(engine)
    finished = log[log["finished_at"].notna()]
    # Every shard's cycle, and the fleet-wide stages (shard -1), finished once per slot.
    assert (finished.groupby(["shard", "now"]).size() == 1).all()
    assert len(finished) == (SHARDS + 1) * len(slots)
    log, finished = log[log["shard"] >= 0], finished[finished["shard"] >= 0]
    # The victim was killed inside a cycle; its shards were finished by others after expiry.
    cut = log[(log["holder"] == victim) & (log["now"] == slots[2]) & log["finished_at"].isna()]
    assert len(cut) > 0
    takers = finished[(finished["now"] == slots[2]) & finished["shard"].isin(cut["shard"])]
    assert len(takers) == len(cut) and victim not in set(takers["holder"])
    assert set(finished["holder"]) == set(names)  # everyone did a share of the work

    reference = make_engine(f"sqlite:///{tmp_path / 'plain.db'}")
    migrate(reference)
    # The same channel name, but a file: the reference sends nothing to the receiver.
    channel = {"name": "hook", "type": "file", "path": str(tmp_path / "plain.jsonl")}
    plain = make_config(str(reference.url), channels=[channel])
    enqueue_notifications(reference)
    for step in steps:
        run_step(reference, plain, step)
    assert_same_store(store_snapshot(engine), store_snapshot(reference))

    received = Counter(r.headers.get("webhook-id") for r in hook.requests)
    with engine.connect() as connection:
        stored = read_frame(connection, "SELECT notification_id, status FROM notification_outbox")
    assert set(sent) <= set(received) == set(stored["notification_id"])
    assert set(received.values()) == {1}  # each notification exactly once
    assert set(stored["status"]) == {"delivered"}
    engine.dispose()
    reference.dispose()


if __name__ == "__main__":
    replica_main(*sys.argv[1:4])
