"""The deliverer: sends what the outbox holds due, through the configured channels.

`deliver_due` is what the `notify` stage of a cycle and the daemon's delivery job call. It
claims due notifications in batches, sends each through its channel (channels never raise: a
dead SMTP server is an outcome, not an exception, so a cycle always finishes) and records the
outcome: delivered, retry later with exponential backoff and jitter, or dead after
`delivery.max_attempts`. Once a channel asks for a retry, the rest of its claimed notifications
are handed back unsent for this pass instead of hammering a server that is down.
"""

from __future__ import annotations

import logging
import os
import random
import socket
import time
import uuid
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.logs import log_event
from aftercast.notify import Channel, DeliveryOutcome, Notification, build_channel
from aftercast.notify.outbox import (
    DEAD,
    DELIVERED,
    PENDING,
    Claim,
    claim_due,
    finish,
    release,
    renew,
)

log = logging.getLogger("aftercast.notify")


@dataclass
class DeliveryReport:
    """What one delivery pass did; `failures` holds one line per failed attempt."""

    attempted: int = 0
    delivered: int = 0
    retrying: int = 0
    dead: int = 0
    lost: int = 0  # claims another deliverer took over before this one sent them
    failures: list[str] = field(default_factory=list)

    def as_json(self) -> dict[str, Any]:
        return asdict(self)


def worker_name() -> str:
    """Who holds a claim: host, process and a random part, unique across replicas."""
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


def build_channels(config: Config) -> dict[str, Channel]:
    return {entry.name: build_channel(entry) for entry in config.channels}


def deliver_due(
    engine: Engine,
    config: Config,
    now: int | Callable[[], int] | None = None,
    *,
    worker: str | None = None,
    channels: Mapping[str, Channel] | None = None,
    rng: random.Random | None = None,
) -> DeliveryReport:
    """Send every notification due at `now` (default: the clock, read at each step).

    `now` may also be a function giving the time (a test's own clock); it is read at every
    claim, lease renewal and outcome.
    """
    delivery = config.delivery
    worker = worker or worker_name()
    channels = build_channels(config) if channels is None else channels
    clock = _clock(now)
    report = DeliveryReport()
    failing: set[str] = set()
    while True:
        claims = claim_due(
            engine, worker, clock(), delivery.batch_size, delivery.lease_seconds, failing
        )
        held_back = []
        for claim in claims:
            if claim.channel in failing:
                held_back.append(claim)
                continue
            if not renew(engine, claim, worker, clock(), delivery.lease_seconds):
                report.lost += 1  # its lease lapsed and another deliverer took it over
                continue
            outcome = _send(channels, claim, delivery.max_attempts)
            status = finish(engine, claim, outcome, worker, clock(), delivery, rng)
            _count(report, claim, outcome, status)
            if outcome.status == "retry":
                failing.add(claim.channel)
        release(engine, held_back, worker)
        if len(claims) < delivery.batch_size:
            break
    if report.attempted:
        log_event(log, "notifications delivered", **report.as_json())
    return report


def _clock(now: int | Callable[[], int] | None) -> Callable[[], int]:
    if callable(now):
        return now
    if now is not None:
        fixed = now
        return lambda: fixed
    return lambda: int(time.time())


def _send(channels: Mapping[str, Channel], claim: Claim, max_attempts: int) -> DeliveryOutcome:
    channel = channels.get(claim.channel)
    if channel is None:
        return DeliveryOutcome.dead(f"channel {claim.channel!r} is no longer configured")
    last = claim.attempts if claim.attempts >= max_attempts else None
    return channel.deliver(Notification.from_json(claim.payload), last_attempt=last)


def _count(report: DeliveryReport, claim: Claim, outcome: DeliveryOutcome, status: str) -> None:
    report.attempted += 1
    if status == DELIVERED:
        report.delivered += 1
        return
    if status == PENDING:
        report.retrying += 1
    elif status == DEAD:
        report.dead += 1
    report.failures.append(
        f"{claim.channel}: notification {claim.notification_id} attempt {claim.attempts}: "
        f"{status or 'claim lost'}: {outcome.detail}"
    )
