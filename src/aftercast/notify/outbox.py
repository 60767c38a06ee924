"""The transactional outbox: notifications stored with the state change, sent later, never lost.

The alert stage calls `enqueue` inside the same transaction that records the transitions, so a
notification exists exactly when its state change does. A deliverer then `claim_due`s rows in a
short transaction: on PostgreSQL with `SELECT ... FOR UPDATE SKIP LOCKED`, so replicas claiming at
the same moment take different rows, and on both stores by writing a lease (`claimed_by`,
`claimed_until`), so a row stays claimed after that transaction ends; each row's lease is
renewed right before it is sent, so a long batch cannot outlive its claim. The attempt is
counted at claim time: a notification that crashes its sender is still given up after
`max_attempts`. The send happens outside any transaction, and `finish` records the outcome
only if the claim is still ours. A deliverer killed between send and `finish` leaves the row
claimed until the lease lapses; another deliverer then sends it again with the same id, which
receivers drop. So a crash can repeat a message, never lose one.
"""

from __future__ import annotations

import math
import random
from collections.abc import Collection, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Engine, case, func, select, update

from aftercast.errors import AftercastError
from aftercast.notify.base import DeliveryOutcome, Digest
from aftercast.settings.alerts import DeliveryConfig
from aftercast.store.bulk import allocate_ids, insert_frame, read_frame
from aftercast.store.db import write
from aftercast.store.schema_alerts import notification_outbox, outbox_alerts

PENDING, DELIVERED, DEAD = "pending", "delivered", "dead"
JITTER = 0.2  # each delay is drawn from +/-20% of its nominal value, so retries spread out


@dataclass(frozen=True)
class Claim:
    """A notification this deliverer has leased and should now send."""

    id: int
    notification_id: str
    channel: str
    payload: str
    attempts: int  # including this one


def enqueue(
    connection: Connection, digests: Sequence[Digest], cycle_id: int | None, now: int
) -> int:
    """Store `digests` as due now, with the alerts each carries; in the caller's transaction."""
    if not digests:
        return 0
    ids = allocate_ids(connection, notification_outbox, len(digests))
    rows = pd.DataFrame(
        {
            "id": ids,
            "notification_id": [d.notification.id for d in digests],
            "channel": [d.notification.channel for d in digests],
            "route": [d.notification.route for d in digests],
            "kind": [d.notification.kind for d in digests],
            "alert_count": [len(d.alert_ids) for d in digests],
            "payload": [d.notification.to_json() for d in digests],
            "status": PENDING,
            "attempts": 0,
            "created_at": now,
            "due_at": now,
            "detail": "",
            "cycle_id": cycle_id,
        }
    )
    insert_frame(connection, notification_outbox, rows)
    links = pd.DataFrame(
        {
            "outbox_id": np.repeat(ids, [len(d.alert_ids) for d in digests]),
            "alert_id": [a for d in digests for a in d.alert_ids],
        }
    ).drop_duplicates()
    insert_frame(connection, outbox_alerts, links)
    return len(digests)


def claim_due(
    engine: Engine,
    worker: str,
    now: int,
    limit: int,
    lease_seconds: float,
    skip_channels: Collection[str] = (),
) -> list[Claim]:
    """Lease up to `limit` due notifications for `worker`, oldest due first."""
    t = notification_outbox
    free = (t.c.claimed_until.is_(None)) | (t.c.claimed_until <= now)
    query = select(t.c.id).where(t.c.status == PENDING, t.c.due_at <= now, free)
    if skip_channels:
        query = query.where(t.c.channel.not_in(list(skip_channels)))
    query = query.order_by(t.c.due_at, t.c.id).limit(limit).with_for_update(skip_locked=True)
    with write(engine) as connection:
        ids = [int(i) for i in connection.execute(query).scalars()]
        if not ids:
            return []
        connection.execute(
            update(t)
            .where(t.c.id.in_(ids))
            .values(
                claimed_by=worker,
                claimed_until=now + math.ceil(lease_seconds),
                attempts=t.c.attempts + 1,
                last_attempt_at=now,
            )
        )
        rows = connection.execute(
            select(t.c.id, t.c.notification_id, t.c.channel, t.c.payload, t.c.attempts)
            .where(t.c.id.in_(ids))
            .order_by(t.c.due_at, t.c.id)
        ).all()
    return [Claim(int(r[0]), str(r[1]), str(r[2]), str(r[3]), int(r[4])) for r in rows]


def renew(engine: Engine, claim: Claim, worker: str, now: int, lease_seconds: float) -> bool:
    """Extend the lease of `claim` from `now`, just before sending it; False if it is not ours.

    A batch is claimed at once but sent one by one, so the last of a slow batch could outlive
    the lease it was claimed with, be claimed by another deliverer and go out twice. Renewed
    right before its own send, each message is leased for the full `lease_seconds` of that
    send; one that another deliverer took meanwhile is left to it.
    """
    t = notification_outbox
    with write(engine) as connection:
        done = connection.execute(
            update(t)
            .where(t.c.id == claim.id, t.c.claimed_by == worker, t.c.status == PENDING)
            .values(claimed_until=now + math.ceil(lease_seconds))
        )
    return bool(done.rowcount)


def retry_delay(
    attempt: int,
    delivery: DeliveryConfig,
    hint: float | None = None,
    rng: random.Random | None = None,
) -> float:
    """Seconds until the next try after failed attempt number `attempt` (1 = the first send).

    Nominal delay backoff_seconds * 2 ** (attempt - 1), drawn within +/-20% (jitter) so that
    many notifications failing together do not retry together; at least the receiver's own
    Retry-After hint; at most max_backoff_seconds.

    >>> retry_delay(3, DeliveryConfig(backoff_seconds=30), rng=random.Random(0)) // 10
    13.0
    """
    draw = (rng or random).uniform(1 - JITTER, 1 + JITTER)
    delay = delivery.backoff_seconds * 2.0 ** (attempt - 1) * draw
    if hint is not None:
        delay = max(delay, hint)
    return min(delay, delivery.max_backoff_seconds)


def finish(
    engine: Engine,
    claim: Claim,
    outcome: DeliveryOutcome,
    worker: str,
    now: int,
    delivery: DeliveryConfig,
    rng: random.Random | None = None,
) -> str:
    """Record the outcome of sending `claim`; returns the row's new status ("" if not ours)."""
    t = notification_outbox
    values: dict[str, object] = {"claimed_by": None, "claimed_until": None}
    if outcome.status == "delivered":
        values.update(status=DELIVERED, delivered_at=now, detail=outcome.detail)
    elif outcome.status == "dead":
        values.update(status=DEAD, detail=outcome.detail)
    elif claim.attempts >= delivery.max_attempts:
        values.update(status=DEAD, detail=outcome.given_up(claim.attempts).detail)
    else:
        delay = retry_delay(claim.attempts, delivery, outcome.retry_after_seconds, rng)
        values.update(status=PENDING, due_at=now + math.ceil(delay), detail=outcome.detail)
    with write(engine) as connection:
        done = connection.execute(
            update(t)
            .where(t.c.id == claim.id, t.c.claimed_by == worker, t.c.status == PENDING)
            .values(**values)
        )
    return str(values["status"]) if done.rowcount else ""


def release(engine: Engine, claims: Sequence[Claim], worker: str) -> None:
    """Give claims back unsent (their channel is failing this pass); the attempt is not counted."""
    if not claims:
        return
    t = notification_outbox
    with write(engine) as connection:
        connection.execute(
            update(t)
            .where(t.c.id.in_([c.id for c in claims]), t.c.claimed_by == worker)
            .values(claimed_by=None, claimed_until=None, attempts=t.c.attempts - 1)
        )


def requeue_dead(
    engine: Engine, notification_ids: Sequence[str] | None, actor: str, now: int
) -> list[str]:
    """Put dead notifications back in the queue, due at `now` with a fresh count of attempts.

    `notification_ids` names them (their idempotency keys, as `alerts notifications` lists
    them); None takes every dead one. Naming one that is not dead is a user error. Returns the
    keys re-queued. A re-sent message keeps its key, so a receiver that got it after all drops it.
    """
    t = notification_outbox
    with write(engine) as connection:
        query = select(t.c.notification_id, t.c.status)
        if notification_ids is None:
            query = query.where(t.c.status == DEAD)
        else:
            query = query.where(t.c.notification_id.in_(list(notification_ids)))
        found = dict(connection.execute(query).tuples().all())
        for key in notification_ids or ():
            if key not in found:
                raise AftercastError(
                    f"no notification {key!r}; `aftercast alerts notifications` lists them"
                )
            if found[key] != DEAD:
                raise AftercastError(f"notification {key!r} is {found[key]}, not dead")
        chosen = sorted(found)
        if chosen:
            connection.execute(
                update(t)
                .where(t.c.notification_id.in_(chosen), t.c.status == DEAD)
                .values(
                    status=PENDING,
                    attempts=0,
                    due_at=now,
                    claimed_by=None,
                    claimed_until=None,
                    detail=f"re-queued by {actor}",
                )
            )
    return chosen


def outbox_counts(connection: Connection) -> dict[str, int]:
    """Notifications by status, with `retrying` = pending ones that have failed at least once."""
    t = notification_outbox
    tried = func.sum(case((t.c.attempts > 0, 1), else_=0))
    counts = {PENDING: 0, "retrying": 0, DELIVERED: 0, DEAD: 0}
    query = select(t.c.status, func.count(), tried).group_by(t.c.status)
    for status, count, failed in connection.execute(query):
        counts[str(status)] = int(count)
        if status == PENDING:
            counts["retrying"] = int(failed or 0)
    return counts


def notification_listing(
    connection: Connection, statuses: Sequence[str] = (PENDING, DEAD), limit: int = 50
) -> pd.DataFrame:
    """Latest notifications in `statuses`: what waits, retries or was given up on, and why.

    `due_at` (the next attempt) is null once a notification is delivered or dead: neither is
    ever tried again, whatever time the row kept from its last retry.
    """
    marks = ", ".join(f":s{i}" for i in range(len(statuses)))
    return read_frame(
        connection,
        "SELECT id, notification_id, channel, route, kind, alert_count, status, attempts, "
        f"created_at, CASE WHEN status = '{PENDING}' THEN due_at END AS due_at, "
        "last_attempt_at, delivered_at, detail FROM notification_outbox "
        f"WHERE status IN ({marks}) ORDER BY id DESC LIMIT :n",
        {**{f"s{i}": s for i, s in enumerate(statuses)}, "n": limit},
    )
