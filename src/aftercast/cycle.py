"""One monitoring cycle, top to bottom in the order the data flows.

Each stage is one function in its own module, called here in order; nothing reaches back up the
pipeline. `run_cycle` is what `aftercast cycle` and the daemon's scheduled job call.
"""

from __future__ import annotations

import json
import logging
import time
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Engine, update

from aftercast.alerts.stage import update_alerts
from aftercast.benchmarks import make_benchmarks
from aftercast.config import Config
from aftercast.detect.run import detect
from aftercast.logs import cycle_scope, log_event
from aftercast.matching import match
from aftercast.notify.deliver import deliver_due
from aftercast.sources.pull import pull_all
from aftercast.store import schema
from aftercast.store.catalog import sync_series_entries
from aftercast.store.db import write
from aftercast.store.parallel import alongside
from aftercast.window_store import refresh_windows

log = logging.getLogger("aftercast.cycle")


@dataclass
class CycleReport:
    cycle_id: int
    now: int
    queued: int = 0
    pairs_scored: int = 0
    benchmarks: int = 0
    flagged: int = 0
    seconds: float = 0.0
    stages: dict[str, float] = field(default_factory=dict)
    alerts: dict[str, Any] = field(default_factory=dict)
    delivery: dict[str, Any] = field(default_factory=dict)

    def as_json(self) -> dict[str, Any]:
        return asdict(self)


def _open_cycle(engine: Engine, now: int) -> int:
    with write(engine) as connection:
        result = connection.execute(
            schema.cycles.insert().values(now=now, started_at=int(time.time()), stats="{}")
        )
        return int(result.inserted_primary_key[0])  # type: ignore[index]


def _close_cycle(engine: Engine, report: CycleReport) -> None:
    with write(engine) as connection:
        connection.execute(
            update(schema.cycles)
            .where(schema.cycles.c.id == report.cycle_id)
            .values(finished_at=int(time.time()), stats=json.dumps(report.as_json()))
        )


def apply_series_entries(engine: Engine, config: Config) -> None:
    """Apply the config's `series:` entries; each one that cannot be is a warning naming its key."""
    for line in sync_series_entries(engine, config):
        key, _, detail = line.partition(": ")
        log_event(log, "series entry not applied", logging.WARNING, key=key, detail=detail)


def run_cycle(
    engine: Engine,
    config: Config,
    now: int | None = None,
    series_ids: np.ndarray | None = None,
    touched: pd.DataFrame | None = None,
    fleet: bool = True,
) -> CycleReport:
    """Match and score what changed since the last cycle, as of `now` (default: the clock).

    `series_ids` limits benchmarks and matching to those series (None: all). With several
    replicas (`coordination`) each runs its shards with `fleet=False` (benchmarks and matching
    only), then one runs the stages that look at every series at once for the slot, with no
    series left to match and the (series_id, model_id) keys the shards `touched`.
    """
    now = int(time.time()) if now is None else now
    started = time.perf_counter()
    report = CycleReport(cycle_id=_open_cycle(engine, now), now=now)
    with cycle_scope(report.cycle_id):  # every warning on the way names this cycle
        _run_stages(engine, config, report, series_ids, touched, fleet)
    report.seconds = time.perf_counter() - started
    _close_cycle(engine, report)
    return report


def _run_stages(
    engine: Engine,
    config: Config,
    report: CycleReport,
    series_ids: np.ndarray | None,
    touched: pd.DataFrame | None,
    fleet: bool,
) -> None:
    now = report.now
    if fleet:
        mark = time.perf_counter()
        # Before the sources, so rows pulled now meet the series settings the config gives.
        apply_series_entries(engine, config)
        pull_all(engine, config, now, report.cycle_id)
        report.stages["sources"] = time.perf_counter() - mark

    mark = time.perf_counter()
    report.benchmarks = make_benchmarks(engine, config, now, series_ids).forecasts
    report.stages["benchmarks"] = time.perf_counter() - mark

    mark = time.perf_counter()
    matched = match(engine, now, series_ids=series_ids)
    report.queued, report.pairs_scored = matched.queued, matched.pairs_scored
    report.stages["match"] = time.perf_counter() - mark
    if not fleet:
        return

    def windows() -> float:
        started = time.perf_counter()
        refresh_windows(engine, config, now, matched.touched if touched is None else touched)
        return time.perf_counter() - started

    # Detection reads the pairs, not the window sums (those serve the readers), so on a store
    # with concurrent writers the two run side by side; alerts wait for both.
    with alongside(engine, windows) as windows_done:
        mark = time.perf_counter()
        report.flagged = detect(engine, config, now, report.cycle_id).flagged
        detected = time.perf_counter() - mark
        report.stages["windows"] = windows_done()
    report.stages["detect"] = detected

    mark = time.perf_counter()
    report.alerts = update_alerts(engine, config, report.cycle_id, now).as_json()
    report.stages["alerts"] = time.perf_counter() - mark

    mark = time.perf_counter()
    report.delivery = deliver_due(engine, config).as_json()
    report.stages["notify"] = time.perf_counter() - mark
