"""Pulling sources: each due source read in turn, its batches ingested, its outcome kept.

`pull_all` is the first stage of a monitoring cycle and `pull_source` what the daemon schedules
per source. A source that fails - unreachable, timing out, a bad query, even an unexpected bug -
is logged, counted and remembered (`source_state`), and the next source is pulled all the same.
Within a pull, a file that cannot be read is that batch's failure, not the source's. A source
already being pulled in this process (the daemon's own schedule and a cycle meeting), or on
PostgreSQL by another replica (an advisory lock per source), is skipped rather than read twice
at once. Listeners (the daemon's metrics) hear of every result.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING

from sqlalchemy import Engine

from aftercast.errors import InputFileError
from aftercast.ingest import ingest_chunks
from aftercast.logs import current_cycle_id, cycle_scope, log_event
from aftercast.settings.sources import SourceSettings
from aftercast.sources.base import Batch, SourceError, SourceResult
from aftercast.sources.state import (
    StoredState,
    begin_pull,
    finish_pull,
    last_attempts,
    store_claim,
)

if TYPE_CHECKING:
    from aftercast.config import Config

log = logging.getLogger("aftercast.sources")
Listener = Callable[[SourceResult], None]
_listeners: list[Listener] = []
_busy: set[str] = set()
_busy_lock = threading.Lock()
PROBLEMS_KEPT = 5


def add_listener(listener: Listener) -> None:
    """Call `listener(result)` after every pull in this process (APScheduler's idiom)."""
    _listeners.append(listener)


def remove_listener(listener: Listener) -> None:
    if listener in _listeners:
        _listeners.remove(listener)


def _claim(name: str) -> bool:
    with _busy_lock:
        if name in _busy:
            return False
        _busy.add(name)
        return True


def _release(name: str) -> None:
    with _busy_lock:
        _busy.discard(name)


def _ingest_batch(
    engine: Engine, config: Config, name: str, kind: str, batch: Batch, result: SourceResult
) -> None:
    label = f"{name}:{batch.label}"
    try:
        report = ingest_chunks(engine, config, kind, label, batch.chunks, batch.digest)
    except InputFileError as exc:
        log_event(
            log, "batch not read", logging.WARNING, source=name, batch=batch.label, error=str(exc)
        )
        result.batches_failed += 1
        if len(result.problems) < PROBLEMS_KEPT:
            result.problems.append(str(exc))
        batch.failed(str(exc))
        return
    result.batches += 1
    result.accepted += report.accepted
    result.rejected += report.rejected
    result.unchanged += report.unchanged
    result.revised += report.revised
    for reason, count in report.rejected_reasons.items():
        result.rejected_reasons[reason] = result.rejected_reasons.get(reason, 0) + count
    batch.succeeded()


def _read(engine: Engine, config: Config, settings: SourceSettings, result: SourceResult) -> None:
    from aftercast.sources import build_source

    source = build_source(settings, config.ingest.chunk_rows)
    try:
        for batch in source.batches(StoredState(engine, settings.name)):
            _ingest_batch(engine, config, settings.name, settings.kind, batch, result)
        result.attempts = source.attempts
    except SourceError as exc:
        result.ok, result.error, result.attempts = False, str(exc), exc.attempts
    except Exception as exc:  # a bug or a store error: still never stop the other sources
        log.exception("source pull crashed", extra={"source": settings.name})
        result.ok, result.error = False, f"{type(exc).__name__}: {exc}".splitlines()[0]
        result.attempts = source.attempts


def pull_source(
    engine: Engine,
    config: Config,
    settings: SourceSettings,
    now: int | None = None,
    cycle_id: int | None = None,
) -> SourceResult | None:
    """Pull one source now; None when this process, or another replica, is already pulling it."""
    if not _claim(settings.name):
        return None
    cycle_id = current_cycle_id() if cycle_id is None else cycle_id
    try:
        with store_claim(engine, settings.name) as mine, cycle_scope(cycle_id):
            if not mine:
                return None
            started = int(time.time()) if now is None else now
            clock = time.perf_counter()
            begin_pull(engine, settings, started)
            result = SourceResult(settings.name, settings.type, settings.kind)
            _read(engine, config, settings, result)
            result.seconds = time.perf_counter() - clock
            run_id = finish_pull(engine, result, started, cycle_id)
            level = logging.INFO if result.ok else logging.WARNING
            log_event(
                log,
                "source pulled" if result.ok else "source failed",
                level,
                run_id=run_id,
                source=settings.name,
                **result.as_json(),
            )
    finally:
        _release(settings.name)
    for listener in list(_listeners):
        listener(result)
    return result


def pull_all(
    engine: Engine,
    config: Config,
    now: int | None = None,
    cycle_id: int | None = None,
    stop: threading.Event | None = None,
) -> list[SourceResult]:
    """Pull every configured source that is due at `now` by its schedule, one after another."""
    if not config.sources:
        return []
    now = int(time.time()) if now is None else now
    tried = last_attempts(engine)
    results: list[SourceResult] = []
    for settings in config.sources:
        if stop is not None and stop.is_set():
            break  # shutting down: the rest wait for the next start
        if not settings.schedule.is_due(tried.get(settings.name), now):
            continue
        try:
            result = pull_source(engine, config, settings, now, cycle_id)
        except Exception:  # e.g. the store went away while recording the outcome
            log.exception("source pull not recorded", extra={"source": settings.name})
            continue
        if result is not None:
            results.append(result)
    return results
