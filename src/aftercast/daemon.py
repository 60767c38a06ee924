"""`aftercast run`: the scheduler and the HTTP server in one process.

APScheduler 3 (a background scheduler with a small thread pool) runs each source's pull on its
own schedule, the monitoring cycle on `schedule.cycle` and the outbox delivery every
`schedule.delivery_interval_seconds`. Every job has `max_instances=1` and coalescing, and a run
more than `misfire_grace_seconds` late is dropped, so a long cycle or a sleeping laptop never
stacks runs. uvicorn serves the FastAPI application in the main thread. SIGTERM or SIGINT stops
the server from taking requests, lets the job in progress finish its step (pulls stop between
sources and files) and exits 0; a job still running after `shutdown_grace_seconds` is abandoned
- every stage commits in transactions, so the next run redoes what it had not committed. Each
event is one JSON log line carrying the cycle id.

On PostgreSQL, where several replicas may share the store, the cycle job is coordinated
(`aftercast.coordination`): every `coordination.renew_seconds` it renews this replica's shard
leases and cycles the shards it holds for the latest slot of `schedule.cycle` that they have not
finished; the fleet-wide stages run once per slot on whichever replica finishes last. On a clean
stop the replica hands its shards back at once. SQLite serves one process, so it cycles plainly.
"""

from __future__ import annotations

import logging
import os
import signal
import socket
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from typing import Any

import uvicorn
from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.interval import IntervalTrigger
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.coordination import Coordinator, coordinated_cycle
from aftercast.cycle import CycleReport, run_cycle
from aftercast.errors import AftercastError, SchemaOutdatedError
from aftercast.logs import configure_logging, cycle_scope, log_event
from aftercast.settings.sources import SourceSettings
from aftercast.sources import pull
from aftercast.store.db import check_current, make_engine, migrate, schema_revisions
from aftercast.web.app import create_app
from aftercast.web.metrics import Metrics

log = logging.getLogger("aftercast.daemon")


class Jobs:
    """The scheduled work, with a count of jobs in progress so shutdown can wait for them."""

    def __init__(
        self,
        engine: Engine,
        config: Config,
        metrics: Metrics,
        coordinator: Coordinator | None = None,
    ) -> None:
        self.engine, self.config, self.metrics = engine, config, metrics
        self.coordinator = coordinator
        self.stop = threading.Event()
        self._running = 0
        self._idle = threading.Condition()

    @contextmanager
    def _step(self) -> Iterator[bool]:
        with self._idle:
            if self.stop.is_set():
                yield False
                return
            self._running += 1
        try:
            yield True
        finally:
            with self._idle:
                self._running -= 1
                self._idle.notify_all()

    def wait_idle(self, seconds: float) -> bool:
        """Wait up to `seconds` for running jobs to finish; True when none is left."""
        deadline = time.monotonic() + seconds
        with self._idle:
            while self._running:
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                self._idle.wait(left)
        return True

    def cycle(self) -> None:
        with self._step() as go:
            if not go:
                return
            started = time.perf_counter()
            try:
                reports = self._cycle_reports()
            except Exception:
                self.metrics.record_cycle(time.perf_counter() - started, ok=False)
                log.exception("cycle failed")
                return
            for report in reports:
                self.metrics.record_cycle(report.seconds, True, report.pairs_scored, report.stages)
                with cycle_scope(report.cycle_id):
                    log_event(log, "cycle finished", **report.as_json())

    def _cycle_reports(self) -> list[CycleReport]:
        """A plain cycle, or this replica's due shards and its turn at the fleet-wide stages."""
        if self.coordinator is None:
            return [run_cycle(self.engine, self.config)]
        turn = coordinated_cycle(self.engine, self.config, self.coordinator)
        return [r for r in (turn.shard_report, turn.fleet_report) if r is not None]

    def leave(self) -> None:
        """Hand this replica's shards back so the others need not wait for the leases to expire."""
        if self.coordinator is None:
            return
        try:
            self.coordinator.leave()
        except Exception:  # the store is gone: the leases expire on their own
            log.exception("could not release the shard leases")

    def source(self, settings: SourceSettings) -> None:
        with self._step() as go:
            if not go:
                return
            try:
                pull.pull_source(self.engine, self.config, settings)
            except Exception:  # the store itself failed; the next run tries again
                log.exception("source pull not recorded", extra={"source": settings.name})

    def deliver(self, deliver_due: Callable[..., Any]) -> None:
        with self._step() as go:
            if not go:
                return
            try:
                deliver_due(self.engine, self.config)
            except Exception:
                log.exception("delivery failed")


def outbox_deliverer() -> Callable[..., Any] | None:
    """The outbox's `deliver_due(engine, config, now)`, when this version has an outbox."""
    try:
        from aftercast.notify.deliver import deliver_due
    except ImportError:
        return None
    return deliver_due


def build_scheduler(jobs: Jobs, config: Config) -> BackgroundScheduler:
    """A scheduler with the cycle, every source and the outbox delivery (when there is one)."""
    scheduler = BackgroundScheduler(
        executors={"default": ThreadPoolExecutor(max_workers=4)},
        job_defaults={
            "coalesce": True,
            "max_instances": 1,
            "misfire_grace_time": int(config.schedule.misfire_grace_seconds),
        },
        timezone=UTC,
    )
    first = datetime.now(UTC)
    cycle = config.schedule.cycle
    if jobs.coordinator is None:
        trigger, starts_now = cycle.trigger(), bool(cycle.interval_seconds)
    else:  # look for due shards often; a slot is cycled once across the replicas
        trigger = IntervalTrigger(seconds=config.coordination.renew_seconds, timezone=UTC)
        starts_now = True
    scheduler.add_job(
        jobs.cycle,
        trigger,
        id="cycle",
        name="monitoring cycle",
        next_run_time=first if starts_now else None,
    )
    for settings in config.sources:
        scheduler.add_job(
            jobs.source,
            settings.schedule.trigger(),
            args=[settings],
            id=f"source:{settings.name}",
            name=f"pull {settings.name}",
            next_run_time=first if settings.schedule.interval_seconds else None,
        )
    deliver_due = outbox_deliverer()
    if deliver_due is not None:
        scheduler.add_job(
            jobs.deliver,
            "interval",
            args=[deliver_due],
            id="delivery",
            seconds=config.schedule.delivery_interval_seconds,
            name="outbox delivery",
        )
    return scheduler


class _Server(uvicorn.Server):
    """uvicorn, but the daemon owns SIGTERM and SIGINT (uvicorn would re-raise them on exit)."""

    def __init__(self, config: uvicorn.Config, on_signal: Callable[[int], None]) -> None:
        super().__init__(config)
        self._on_signal = on_signal

    @contextmanager
    def capture_signals(self) -> Iterator[None]:
        if threading.current_thread() is not threading.main_thread():
            yield
            return

        def handle(signum: int, _frame: Any) -> None:
            self.should_exit = True
            self._on_signal(signum)

        previous = {sig: signal.signal(sig, handle) for sig in (signal.SIGTERM, signal.SIGINT)}
        try:
            yield
        finally:
            for sig, handler in previous.items():
                signal.signal(sig, handler)


def open_store(config: Config) -> Engine:
    """The store, created when it has no schema yet (a trial); an old schema is refused.

    Upgrading is left to `aftercast init`, so several replicas never migrate at once.
    """
    engine = make_engine(config.store.url, config.store.echo)
    try:
        check_current(engine)
    except SchemaOutdatedError:
        current, _ = schema_revisions(engine)
        if current is not None:
            raise
        log_event(log, "store created", revision=migrate(engine))
    return engine


def replica_coordinator(engine: Engine, config: Config) -> Coordinator | None:
    """This replica's shard leases where several replicas can share the store (PostgreSQL)."""
    if engine.dialect.name != "postgresql":
        return None
    return Coordinator(engine, config.coordination)


def check_address(host: str, port: int) -> None:
    """Fail with one line, before anything starts, when the address cannot be listened on."""
    try:
        with socket.create_server((host, port)):
            pass
    except OSError as exc:
        raise AftercastError(
            f"web.host/web.port {host}:{port}: cannot listen ({str(exc.strerror).split(' (')[0]}); "
            "choose another with --host/--port"
        ) from None


def run_daemon(config: Config, host: str | None = None, port: int | None = None) -> int:
    """Run until SIGTERM or SIGINT; returns the exit code (0)."""
    host, port = host or config.web.host, port or config.web.port
    check_address(host, port)
    configure_logging()
    engine = open_store(config)
    metrics = Metrics(engine)
    pull.add_listener(metrics.record_source)
    coordinator = replica_coordinator(engine, config)
    jobs = Jobs(engine, config, metrics, coordinator)
    scheduler = build_scheduler(jobs, config)
    app = create_app(engine, config, metrics=metrics, scheduler=scheduler)
    settings = uvicorn.Config(
        app,
        host=host,
        port=port,
        lifespan="off",
        log_config=None,
        access_log=config.web.access_log,
        timeout_graceful_shutdown=5,
    )

    def on_signal(signum: int) -> None:
        jobs.stop.set()
        log_event(log, "stopping", signal=signal.Signals(signum).name)

    server = _Server(settings, on_signal)
    scheduler.start()
    log_event(
        log,
        "daemon started",
        host=settings.host,
        port=settings.port,
        sources=[s.name for s in config.sources],
        jobs=[j.id for j in scheduler.get_jobs()],
        replica=coordinator.name if coordinator else None,
    )
    try:
        server.run()
    finally:
        jobs.stop.set()
        scheduler.shutdown(wait=False)
        pull.remove_listener(metrics.record_source)
    finished = jobs.wait_idle(config.schedule.shutdown_grace_seconds)
    if finished:
        jobs.leave()
    log_event(log, "daemon stopped", clean=finished)
    if not finished:
        # A job is still inside a stage: leave now; its open transaction rolls back.
        logging.shutdown()
        sys.stdout.flush()
        os._exit(0)
    engine.dispose()
    return 0
