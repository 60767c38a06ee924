"""The contract every pulled source keeps: settings, a schedule, and batches of raw rows.

A source type is one module with a pydantic settings model (`type: Literal[...]` so the config
can tell them apart) and a `Source` subclass whose `batches` yields what it found as `Batch`es:
chunks of raw rows for the ingest path, plus what to remember once they are stored (a file's
content hash, a query's new watermark). The source never writes rows itself, so counts and
rejection reasons are those of `ingest --json`, and a source that fails half-way leaves its
watermark where it was. `Schedule` is the one vocabulary for "when": every N seconds or a cron
line, for sources and for the daemon's cycle alike.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any, ClassVar, Literal, Protocol

from pydantic import BaseModel, ConfigDict, Field, model_validator

from aftercast.sources.files import Chunk

Kind = Literal["forecasts", "actuals", "series"]
SOURCE_NAME = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Schedule(_Strict):
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


class SourceSettings(_Strict):
    """Keys every source has; each type adds its own and a `type` literal."""

    type: str
    name: str = Field(pattern=SOURCE_NAME)
    kind: Kind
    schedule: Schedule = Schedule(interval_seconds=300)


class SourceState(Protocol):
    """What a source may remember between pulls (kept in the store, per source name)."""

    def watermark(self) -> Any: ...

    def set_watermark(self, value: Any) -> None: ...

    def seen_hashes(self, hashes: list[str]) -> set[str]: ...

    def record_file(self, digest: str, path: str, outcome: str, detail: str | None) -> None: ...


def _nothing(*_args: Any) -> None:
    return None


@dataclass
class Batch:
    """Raw rows from one place (a file, a query, a response), and what to do once stored.

    `succeeded` runs after the rows are committed (record the file, advance the watermark);
    `failed(reason)` runs when the batch could not be read as a whole.
    """

    label: str
    chunks: Iterator[Chunk]
    digest: str | None = None
    succeeded: Callable[[], None] = _nothing
    failed: Callable[[str], None] = _nothing


class SourceError(Exception):
    """A pull failed as a whole (unreachable server, bad query); the message is one line."""

    def __init__(self, message: str, attempts: int = 1) -> None:
        super().__init__(message)
        self.attempts = attempts


@dataclass
class SourceResult:
    """What one pull of one source did, for the log, the metrics and the run log."""

    name: str
    type: str
    kind: str
    ok: bool = True
    batches: int = 0
    batches_failed: int = 0
    accepted: int = 0
    rejected: int = 0
    unchanged: int = 0
    revised: int = 0
    attempts: int = 0
    seconds: float = 0.0
    error: str | None = None
    rejected_reasons: dict[str, int] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)  # per-batch failures, first few

    def as_json(self) -> dict[str, Any]:
        from dataclasses import asdict

        return asdict(self)


class Source(ABC):
    """One configured source; `batches` is called once per pull."""

    settings_type: ClassVar[type[SourceSettings]]

    def __init__(self, settings: SourceSettings, chunk_rows: int) -> None:
        self.settings = settings
        self.chunk_rows = chunk_rows
        self.attempts = 1  # tries the last pull took (a retrying source sets it)

    @abstractmethod
    def batches(self, state: SourceState) -> Iterator[Batch]:
        """Yield the new rows as batches; raise SourceError when the source cannot be read."""
