"""The transactional outbox: written with the state change, claimed with leases, shared safely.

The claims are checked against the database's own guarantees: a rolled-back transaction leaves
nothing (SQL atomicity), and on PostgreSQL `FOR UPDATE SKIP LOCKED` passes over a row another
transaction holds locked instead of waiting for it (PostgreSQL documentation, SELECT, "The
Locking Clause"). Several deliverers running at once on one outbox send each notification
exactly once, to a real HTTP receiver on loopback.
"""

from __future__ import annotations

import threading
import time
from collections import Counter

import pytest
from sqlalchemy import Engine, text

from aftercast.alerts.stage import apply_findings
from aftercast.config import Config
from aftercast.notify.base import DeliveryOutcome
from aftercast.notify.deliver import deliver_due
from aftercast.notify.outbox import claim_due, finish, outbox_counts
from aftercast.store.db import make_engine, migrate, write
from tests.conftest import make_config
from tests.servers import HttpRecorder
from tests.test_alerts_support import DAY, START, alerts, findings, outbox, seed, transitions

NOW = START + 22 * DAY


def raised_store(url: str, hook_url: str = "http://127.0.0.1:9/hook") -> tuple[Engine, Config]:
    config = make_config(
        url,
        channels=[{"name": "ops-hook", "type": "webhook", "url": hook_url}],
        rules=[{"detection": "coverage_low", "raise_after": 1, "remind_every_hours": 0}],
    )
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, {f"s{i}": {} for i in range(20)}, days=3)
    return engine, config


REFUSE_OUTBOX = {
    "sqlite": [
        "CREATE TRIGGER refuse BEFORE INSERT ON notification_outbox "
        "BEGIN SELECT RAISE(ABORT, 'outbox refused'); END"
    ],
    "postgresql": [
        "CREATE FUNCTION refuse() RETURNS trigger AS $$ BEGIN RAISE EXCEPTION 'outbox refused'; "
        "END $$ LANGUAGE plpgsql",
        "CREATE TRIGGER refuse BEFORE INSERT ON notification_outbox "
        "FOR EACH ROW EXECUTE FUNCTION refuse()",
    ],
}


def test_state_change_and_its_notification_commit_together(store_url: str) -> None:
    engine, config = raised_store(store_url)
    with write(engine) as connection:  # the database itself refuses the outbox write
        for statement in REFUSE_OUTBOX[engine.dialect.name]:
            connection.execute(text(statement))
    # The driver's own error: the bulk path writes through the raw DB-API connection.
    with pytest.raises(Exception, match="outbox refused"):
        apply_findings(engine, config, findings(engine, [{"series": "s1"}]), 1, NOW)
    # Atomicity: without its notification the state change did not happen either.
    assert alerts(engine).empty and transitions(engine).empty and outbox(engine).empty
    with write(engine) as connection:
        on_table = " ON notification_outbox" if engine.dialect.name == "postgresql" else ""
        connection.execute(text("DROP TRIGGER refuse" + on_table))
    apply_findings(engine, config, findings(engine, [{"series": "s1"}]), 1, NOW)
    assert len(alerts(engine)) == 1 and len(outbox(engine)) == 1


def test_each_raise_has_exactly_one_notification_per_channel(store_url: str) -> None:
    engine, config = raised_store(store_url)
    flagged = findings(engine, [{"series": f"s{i}"} for i in range(5)])
    apply_findings(engine, config, flagged, 1, NOW)
    apply_findings(engine, config, flagged, 2, NOW + DAY)  # still raised, no reminders: quiet
    rows = outbox(engine)
    assert len(rows) == 1 and int(rows["alert_count"].iloc[0]) == 5
    with engine.connect() as connection:
        linked = connection.execute(text("SELECT alert_id FROM outbox_alerts")).scalars().all()
    assert sorted(linked) == sorted(alerts(engine)["id"].tolist())


def test_a_lapsed_lease_passes_the_claim_on(store_url: str) -> None:
    engine, config = raised_store(store_url)
    apply_findings(engine, config, findings(engine, [{"series": "s1"}]), 1, NOW)
    clock = int(time.time())
    first = claim_due(engine, "replica-a", clock, 10, lease_seconds=60)
    assert len(first) == 1
    assert claim_due(engine, "replica-b", clock + 59, 10, lease_seconds=60) == []
    second = claim_due(engine, "replica-b", clock + 60, 10, lease_seconds=60)
    assert [c.id for c in second] == [first[0].id] and second[0].attempts == 2
    delivered = DeliveryOutcome.delivered("ok")
    # Replica a comes back too late: its outcome must not overwrite b's claim.
    assert finish(engine, first[0], delivered, "replica-a", clock + 61, config.delivery) == ""
    assert finish(engine, second[0], delivered, "replica-b", clock + 61, config.delivery) == (
        "delivered"
    )


def test_skip_locked_passes_over_a_row_another_replica_holds(pg_url: str) -> None:
    engine, config = raised_store(pg_url)
    for step in range(3):  # three cycles, one more alert raised each: three notifications
        rows = [{"series": f"s{i}"} for i in range(step + 1)]
        apply_findings(engine, config, findings(engine, rows), step, NOW + step)
    ids = outbox(engine)["id"].tolist()
    holder = engine.connect()
    transaction = holder.begin()
    holder.execute(
        text("SELECT id FROM notification_outbox WHERE id = :i FOR UPDATE"), {"i": ids[0]}
    )
    got: list[int] = []
    claimer = threading.Thread(
        target=lambda: got.extend(
            c.id for c in claim_due(engine, "replica-b", int(time.time()), 10, 60)
        )
    )
    claimer.start()
    claimer.join(timeout=20)
    try:
        assert not claimer.is_alive(), "the claim waited for the locked row"
        assert got == ids[1:]
    finally:
        transaction.rollback()
        holder.close()


def test_concurrent_deliverers_send_each_notification_once(store_url: str) -> None:
    with HttpRecorder() as server:
        engine, config = raised_store(store_url, server.url())
        for step in range(12):  # one more alert raised each cycle, none cleared
            rows = [{"series": f"s{i}"} for i in range(step + 1)]
            apply_findings(engine, config, findings(engine, rows), step, NOW + step)
        workers = [
            threading.Thread(target=deliver_due, args=(engine, config), kwargs={"worker": f"w{i}"})
            for i in range(4)
        ]
        for worker in workers:
            worker.start()
        for worker in workers:
            worker.join(timeout=120)
        sent = Counter(r.headers["webhook-id"] for r in server.requests)
    assert len(sent) == 12 and set(sent.values()) == {1}
    assert set(outbox(engine)["status"]) == {"delivered"}
    with engine.connect() as connection:
        counts = outbox_counts(connection)
    assert counts == {"pending": 0, "retrying": 0, "delivered": 12, "dead": 0}


def test_a_batch_outliving_its_lease_is_not_sent_twice(store_url: str) -> None:
    """Each message's lease is renewed before its send, so one slow send cannot hand the rest
    of the batch to another deliverer while the first still means to send it."""
    clock: dict[str, int] = {}  # replica a's clock; b runs with its own `now`
    b_reports = []

    def during_send(number: int) -> None:
        start = clock["start"]
        if number == 1:  # a's first send took 40 s
            clock["a"] = start + 40
        elif number == 2:  # 70 s after a claimed its batch (lease 60 s), b looks for work
            clock["a"] = start + 70
            b_reports.append(deliver_due(engine, config, now=start + 70, worker="replica-b"))

    with HttpRecorder(on_request=during_send) as server:
        engine, config = raised_store(store_url, server.url())
        config = config.model_copy(
            update={"delivery": config.delivery.model_copy(update={"lease_seconds": 60})}
        )
        for step in range(3):  # three notifications, all due
            rows = [{"series": f"s{i}"} for i in range(step + 1)]
            apply_findings(engine, config, findings(engine, rows), step, NOW + step)
        clock["start"] = clock["a"] = int(outbox(engine)["due_at"].max())  # all due from here
        report = deliver_due(engine, config, now=lambda: clock["a"], worker="replica-a")
        sent = Counter(r.headers["webhook-id"] for r in server.requests)
    # b found only the third free: the second was renewed at 40 s until 100 s when a sent it.
    assert [r.delivered for r in b_reports] == [1]
    assert (report.delivered, report.lost) == (2, 1)
    assert len(sent) == 3 and set(sent.values()) == {1}
    assert set(outbox(engine)["status"]) == {"delivered"}
