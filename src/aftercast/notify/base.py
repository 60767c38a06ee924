"""The contract between the alert outbox and the notification channels.

The outbox stores a `Notification` (as JSON, via `to_json`), hands it to a channel's `deliver`
and acts on the `DeliveryOutcome`: mark it delivered, try again later, or give up. A channel is
a class with a `type` name and a config model from `aftercast.settings.channels`; it implements
`_send` and inherits a
`deliver` that never raises, keeps every outcome detail on one line and scrubs the channel's
secrets out of it before anyone (log, outbox row, status page) can see it.
"""

from __future__ import annotations

import builtins
import dataclasses
import json
import logging
import math
from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal

from aftercast.settings.channels import ChannelConfigBase

log = logging.getLogger("aftercast.notify")

DETAIL_MAX_CHARS = 300


@dataclass(frozen=True)
class AlertLine:
    """One alert inside a notification."""

    series_id: str
    model: str
    horizon: str  # "1", "2-7" or "all"
    rule: str  # "coverage_low", "accuracy_vs_baseline", "bias", "actuals_overdue", ...
    state: str  # lifecycle state: "raised", "cleared", ...
    severity: str  # "critical" | "warning" | "info"
    opened_at: str  # ISO 8601 UTC
    summary: str  # one human sentence: what, how bad
    evidence: dict[str, Any] = field(default_factory=dict)
    labels: dict[str, str] = field(default_factory=dict)
    cleared_at: str | None = None  # ISO 8601 UTC, when a cleared alert cleared


@dataclass(frozen=True)
class ChartData:
    """Recent actuals against the forecast band, and the rolling coverage of that band."""

    series_id: str
    model: str
    level: float  # interval level in percent, e.g. 80
    times: list[str]
    actual: list[float | None]
    point: list[float | None]
    lower: list[float | None]
    upper: list[float | None]
    coverage_times: list[str] = field(default_factory=list)
    coverage: list[float | None] = field(default_factory=list)
    bucket: str = ""  # the alert's horizon bucket: "1", "2-7", "all" ("" from older rows)
    horizon: int | None = None  # the horizon drawn: the shortest of the bucket

    def horizon_words(self) -> str:
        """Which forecasts the chart shows, e.g. "horizons 2-7 (drawn: horizon 2)".

        >>> ChartData("s", "m", 80, [], [], [], [], [], bucket="2-7", horizon=2).horizon_words()
        'horizons 2-7 (drawn: horizon 2)'
        """
        drawn = f"horizon {self.horizon}" if self.horizon is not None else ""
        if self.bucket in ("", str(self.horizon)):
            return drawn
        named = "all horizons" if self.bucket == "all" else f"horizons {self.bucket}"
        return f"{named} (drawn: {drawn})" if drawn else named


@dataclass(frozen=True)
class Notification:
    """One message for one channel; `id` is the idempotency key receivers deduplicate by."""

    id: str
    kind: str  # "digest" | "reminder" | "cleared" | "test"
    route: str
    channel: str
    created_at: str  # ISO 8601 UTC
    alerts: list[AlertLine]
    more: int = 0  # alerts left out of the digest by the cap ("and N more")
    charts: list[ChartData] = field(default_factory=list)
    dashboard_url: str | None = None

    def to_json(self) -> str:
        """Serialise for the outbox; NaN and infinities become null so the text is strict JSON."""
        return json.dumps(jsonable(dataclasses.asdict(self)), allow_nan=False, sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> Notification:
        """Read back what `to_json` wrote; unknown keys (from a newer writer) are ignored."""
        raw = json.loads(text)
        raw["alerts"] = [_build(AlertLine, a) for a in raw.get("alerts", [])]
        raw["charts"] = [_build(ChartData, c) for c in raw.get("charts", [])]
        return _build(cls, raw)


@dataclass(frozen=True)
class Digest:
    """What the outbox enqueues: a notification and every alert it stands for (those left out
    by the cap included), so a delivery can be traced back to its alerts."""

    notification: Notification
    alert_ids: list[int]


def _build(cls: type, raw: dict[str, Any]) -> Any:
    # Rolling upgrades mean an older replica may read a row a newer one wrote.
    names = {f.name for f in dataclasses.fields(cls)}
    return cls(**{k: v for k, v in raw.items() if k in names})


def jsonable(value: Any) -> Any:
    """Make evidence values (numpy scalars, datetimes, NaN) representable as strict JSON."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [jsonable(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, int | str):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if hasattr(value, "item"):  # numpy scalar
        return jsonable(value.item())
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return str(value)


@dataclass(frozen=True)
class DeliveryOutcome:
    """What happened to one delivery attempt; `detail` is one line and never holds a secret."""

    status: Literal["delivered", "retry", "dead"]
    detail: str
    retry_after_seconds: float | None = None  # the receiver's own hint (HTTP Retry-After)

    @classmethod
    def delivered(cls, detail: str) -> DeliveryOutcome:
        return cls("delivered", detail)

    @classmethod
    def retry(cls, detail: str, after: float | None = None) -> DeliveryOutcome:
        return cls("retry", detail, after)

    @classmethod
    def dead(cls, detail: str) -> DeliveryOutcome:
        return cls("dead", detail)

    def given_up(self, attempts: int) -> DeliveryOutcome:
        """This retry as the dead end of the last allowed attempt, number `attempts`.

        >>> DeliveryOutcome.retry("HTTP 503").given_up(1).detail
        'gave up after 1 attempt: HTTP 503'
        """
        tries = "1 attempt" if attempts == 1 else f"{attempts} attempts"
        return DeliveryOutcome.dead(f"gave up after {tries}: {self.detail}")


class Channel(ABC):
    """A way to deliver notifications; subclasses set `type`, `config_model` and `_send`."""

    type: ClassVar[str]
    config_model: ClassVar[builtins.type[ChannelConfigBase]]  # `type` is taken just above

    def __init__(self, config: ChannelConfigBase) -> None:
        config.check()  # a config made in code, not read from the file, is checked here too
        self.config = config
        self.name = config.name

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}>"

    def deliver(
        self, notification: Notification, *, last_attempt: int | None = None
    ) -> DeliveryOutcome:
        """Try once to deliver; never raises, whatever the channel or the network does.

        `last_attempt` is this attempt's number when no other will follow: a retry is then
        logged as the message given up (dead), as the outbox records it. The outcome itself
        stays a retry, so the deliverer still knows the channel is failing.
        """
        try:
            outcome = self._send(notification)
        except Exception as exc:  # the outbox must always get an outcome, even from a bug
            outcome = DeliveryOutcome.retry(f"unexpected {type(exc).__name__}: {exc}")
        outcome = dataclasses.replace(outcome, detail=self._scrub(outcome.detail))
        shown = outcome
        if outcome.status == "retry" and last_attempt is not None:
            shown = outcome.given_up(last_attempt)
        level = logging.INFO if outcome.status == "delivered" else logging.WARNING
        log.log(
            level,
            "%s channel %r, notification %s: %s (%s)",
            self.type,
            self.name,
            notification.id,
            shown.status,
            shown.detail,
        )
        return outcome

    @abstractmethod
    def _send(self, notification: Notification) -> DeliveryOutcome:
        """Deliver once; may raise, `deliver` turns surprises into a retry."""

    def _scrub(self, detail: str) -> str:
        secrets = sorted(self.config.secret_values(), key=len, reverse=True)
        text = detail
        for secret in secrets:
            text = text.replace(secret, "***")
        text = " ".join(text.split())
        if len(text) > DETAIL_MAX_CHARS:
            text = text[: DETAIL_MAX_CHARS - 3] + "..."
        return text
