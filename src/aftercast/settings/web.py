"""Config sections of the running service: `schedule:`, `api:` and `web:`.

They live apart from the server and the daemon so that reading the config never imports a web
framework. With none of them given, `aftercast run` cycles every 15 minutes, delivers due
notifications every minute, serves on 127.0.0.1:8080 and refuses every write request (no token
is configured, so none can match).
"""

from __future__ import annotations

from pydantic import Field, SecretStr

from aftercast.settings.base import Strict
from aftercast.settings.schedule import Schedule


class ScheduleConfig(Strict):
    """When the daemon runs the monitoring cycle and the outbox delivery."""

    cycle: Schedule = Schedule(interval_seconds=900)
    delivery_interval_seconds: float = Field(60.0, gt=0)
    # A run that could not start on time (a long cycle, a laptop asleep) still runs if it is at
    # most this late; later ones are dropped, and coalescing turns a backlog into one run.
    misfire_grace_seconds: float = Field(300.0, gt=0)
    # SIGTERM waits this long for the step in progress; container runtimes kill at 30 s.
    shutdown_grace_seconds: float = Field(20.0, gt=0, le=28)


class ApiConfig(Strict):
    """Push and write endpoints: `Authorization: Bearer <token>` and a body size limit."""

    token: SecretStr | None = None  # normally "${AFTERCAST_API_TOKEN}"
    max_body_bytes: int = Field(10_000_000, ge=1_000)
    page_limit: int = Field(1_000, ge=10, le=100_000)  # the most rows one read page returns


class WebConfig(Strict):
    """Where the HTTP server listens and how alerts link back to it."""

    host: str = "127.0.0.1"
    port: int = Field(8080, ge=1, le=65_535)
    base_url: str | None = None  # e.g. https://aftercast.example.com, for links in alerts
    access_log: bool = False
