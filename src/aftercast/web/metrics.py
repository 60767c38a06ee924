"""Prometheus metrics at `/metrics`, every name prefixed `aftercast_`.

Two kinds. What this process did is counted as it happens: cycles and their duration, pairs
scored, rows ingested, rejected (by reason) and unchanged, per kind and by push or source, and
source pulls by outcome. What the store knows is read at scrape time by a collector, so it is
right whichever replica or cron job did the work: each source's lag since its last successful
pull and its failures in a row, the last cycle's time and duration, alerts by state and
notifications by outcome. A store that cannot be read turns `aftercast_store_up` to 0 instead of
failing the scrape. The registry is per application, so tests can build as many as they like.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Iterator
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram
from prometheus_client.core import GaugeMetricFamily, Metric
from prometheus_client.exposition import choose_encoder
from prometheus_client.registry import Collector
from sqlalchemy import Engine, inspect, text

from aftercast.sources.base import SourceResult

log = logging.getLogger("aftercast.web")
CYCLE_BUCKETS = (0.5, 1, 2.5, 5, 10, 30, 60, 120, 300, 600, 1800)


class StoreCollector(Collector):
    """Gauges read from the store at each scrape (cheap, indexed queries only)."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine

    def _sources(self, connection: Any, now: float) -> Iterator[Metric]:
        lag = GaugeMetricFamily(
            "aftercast_source_lag_seconds",
            "Seconds since the source's last successful pull (since its first try if none).",
            labels=["source"],
        )
        failures = GaugeMetricFamily(
            "aftercast_source_consecutive_failures",
            "Pulls of the source that failed in a row (0: the last pull worked).",
            labels=["source"],
        )
        rows = connection.execute(
            text(
                "SELECT s.name, s.last_success_at, s.last_attempt_at, s.consecutive_failures, "
                "(SELECT MIN(r.started_at) FROM source_runs r WHERE r.source = s.name) "
                "FROM source_state s"
            )
        )
        for name, success, attempt, failed, first in rows:
            since = success if success is not None else (first or attempt)
            if since is not None:
                lag.add_metric([name], max(0.0, now - since))
            failures.add_metric([name], failed or 0)
        yield lag
        yield failures

    def _cycles(self, connection: Any) -> Iterator[Metric]:
        row = connection.execute(
            text(
                "SELECT started_at, finished_at FROM cycles WHERE finished_at IS NOT NULL "
                "ORDER BY id DESC LIMIT 1"
            )
        ).first()
        if row is not None:
            yield GaugeMetricFamily(
                "aftercast_last_cycle_finished_timestamp_seconds",
                "When the last finished monitoring cycle ended (any process), epoch seconds.",
                value=row[1],
            )

    def _alerts(self, connection: Any) -> Iterator[Metric]:
        family = GaugeMetricFamily(
            "aftercast_alerts", "Alerts in the store by lifecycle state.", labels=["state"]
        )
        for state, count in connection.execute(
            text("SELECT state, COUNT(*) FROM alerts GROUP BY state")
        ):
            family.add_metric([str(state)], count)
        yield family

    def _notifications(self, connection: Any) -> Iterator[Metric]:
        family = GaugeMetricFamily(
            "aftercast_notifications",
            "Notifications in the outbox by outcome: pending, retrying (pending after a failed "
            "attempt), delivered, dead.",
            labels=["outcome"],
        )
        rows = connection.execute(
            text(
                "SELECT status, COUNT(*), SUM(CASE WHEN attempts > 0 THEN 1 ELSE 0 END) "
                "FROM notification_outbox GROUP BY status"
            )
        ).all()
        counts = {"pending": 0, "retrying": 0, "delivered": 0, "dead": 0}
        for status, count, tried in rows:
            counts[str(status)] = int(count)
            if status == "pending":
                counts["retrying"] = int(tried or 0)
        for outcome, count in counts.items():
            family.add_metric([outcome], count)
        yield family

    def collect(self) -> Iterator[Metric]:
        up = GaugeMetricFamily("aftercast_store_up", "1 when the store answered this scrape.")
        parts = {
            "source_state": lambda c: self._sources(c, time.time()),
            "cycles": self._cycles,
            "alerts": self._alerts,
            "notification_outbox": self._notifications,
        }
        metrics: list[Metric] = []
        try:
            with self.engine.connect() as connection:
                tables = set(inspect(connection).get_table_names())
        except Exception:  # a scrape must answer even when the store does not
            up.add_metric([], 0)
            yield up
            return
        for table, part in parts.items():
            if table not in tables:
                continue
            try:  # each part on its own connection: one failing query spoils nothing else
                with self.engine.connect() as connection:
                    metrics.extend(part(connection))
            except Exception:
                log.warning("metrics from table %s could not be read", table, exc_info=True)
        up.add_metric([], 1)
        yield up
        yield from metrics


class Metrics:
    """The instruments of one process, on their own registry."""

    def __init__(self, engine: Engine | None = None) -> None:
        self.registry = CollectorRegistry()
        r = self.registry
        self.cycle_seconds = Histogram(
            "aftercast_cycle_duration_seconds",
            "Wall time of monitoring cycles run here.",
            buckets=CYCLE_BUCKETS,
            registry=r,
        )
        self.cycles = Counter(
            "aftercast_cycles", "Monitoring cycles run here, by outcome.", ["outcome"], registry=r
        )
        self.stage_seconds = Gauge(
            "aftercast_cycle_stage_seconds",
            "Seconds each stage took in the last cycle run here.",
            ["stage"],
            registry=r,
        )
        self.pairs = Counter(
            "aftercast_pairs_scored", "Forecast-actual pairs scored by cycles run here.", registry=r
        )
        self.rows = Counter(
            "aftercast_rows_ingested",
            "Rows stored (new or revised), by kind and way in.",
            ["kind", "via"],
            registry=r,
        )
        self.rejected = Counter(
            "aftercast_rows_rejected",
            "Rows quarantined, by kind, way in and reason.",
            ["kind", "via", "reason"],
            registry=r,
        )
        self.unchanged = Counter(
            "aftercast_rows_unchanged",
            "Rows that repeated what was stored, by kind and way in.",
            ["kind", "via"],
            registry=r,
        )
        self.pulls = Counter(
            "aftercast_source_pulls",
            "Source pulls run here, by source and outcome.",
            ["source", "outcome"],
            registry=r,
        )
        if engine is not None:
            r.register(StoreCollector(engine))

    def record_ingest(self, kind: str, via: str, counts: dict[str, Any]) -> None:
        """Count one ingest report (the `ingest --json` object)."""
        self.rows.labels(kind, via).inc(int(counts["accepted"]) + int(counts["revised"]))
        self.unchanged.labels(kind, via).inc(int(counts["unchanged"]))
        for reason, count in counts["rejected_reasons"].items():
            self.rejected.labels(kind, via, reason).inc(count)

    def record_source(self, result: SourceResult) -> None:
        self.pulls.labels(result.name, "ok" if result.ok else "failed").inc()
        self.record_ingest(result.kind, "source", result.as_json())

    def record_cycle(
        self, seconds: float, ok: bool, pairs: int = 0, stages: dict[str, float] | None = None
    ) -> None:
        self.cycle_seconds.observe(seconds)
        self.cycles.labels("ok" if ok else "failed").inc()
        self.pairs.inc(pairs)
        for stage, spent in (stages or {}).items():
            self.stage_seconds.labels(stage).set(spent)

    def exposition(self, accept: str | None) -> tuple[bytes, str]:
        """The metrics text in the format the scraper asked for (OpenMetrics or Prometheus)."""
        encoder, content_type = choose_encoder(accept or "")
        return encoder(self.registry), content_type
