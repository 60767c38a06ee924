"""`Schedule`: the one vocabulary for "when", for pulled sources and the daemon's cycle alike.

Every N seconds or a cron line. A bad cron line fails as the config loads, naming the key; the
cron parser is APScheduler's, imported only when a cron line or a trigger is asked for, so
reading a config of intervals imports no scheduler.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from pydantic import Field, model_validator

from aftercast.settings.base import Strict


class Schedule(Strict):
    """When something runs: `interval_seconds: 300` or `cron: "0 6 * * *"` (in `timezone`).

    A bare number is read as interval seconds and a bare string as a cron line, so
    `schedule: 300` and `schedule: "*/15 * * * *"` both work.
    """

    interval_seconds: float | None = Field(None, gt=0)
    cron: str | None = None
    timezone: str = "UTC"

    @model_validator(mode="before")
    @classmethod
    def _shorthand(cls, value: Any) -> Any:
        if isinstance(value, bool):
            return value  # let validation reject it with the usual message
        if isinstance(value, int | float):
            return {"interval_seconds": value}
        if isinstance(value, str):
            return {"cron": value}
        return value

    @model_validator(mode="after")
    def _one_kind(self) -> Schedule:
        if (self.interval_seconds is None) == (self.cron is None):
            raise ValueError("give exactly one of 'interval_seconds' or 'cron'")
        if self.cron is not None:
            self.trigger()  # a bad cron line fails at start-up, naming the key
        return self

    def trigger(self) -> Any:
        """The APScheduler 3 trigger for this schedule."""
        from apscheduler.triggers.cron import CronTrigger
        from apscheduler.triggers.interval import IntervalTrigger

        if self.cron is not None:
            try:
                return CronTrigger.from_crontab(self.cron, timezone=self.timezone)
            except (ValueError, LookupError) as exc:
                raise ValueError(f"cron {self.cron!r} is not a 5-field cron line: {exc}") from None
        assert self.interval_seconds is not None
        return IntervalTrigger(seconds=self.interval_seconds, timezone="UTC")

    def is_due(self, last_attempt: int | None, now: int) -> bool:
        """Whether a run is due at `now` given the last attempt (None: never run).

        An attempt recorded after `now` (a replay with `--now` in the past) counts as never, so
        replays pull their sources as a live run would.
        """
        if last_attempt is None or last_attempt > now:
            return True
        if self.interval_seconds is not None:
            return now - last_attempt >= self.interval_seconds
        # The first fire time strictly after the last attempt.
        after = datetime.fromtimestamp(last_attempt + 1, UTC)
        following = self.trigger().get_next_fire_time(None, after)
        return following is not None and following.timestamp() <= now
