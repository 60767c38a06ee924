"""Config sections of alerting: `channels:`, `routes:`, `delivery:` and `rules:`.

They are field types for the root `Config`, checked as the file loads: channel names are unique
and each channel's own `check` passes (the checks that involve secrets, with messages that never
quote the secret), every route names configured channels, rule names are unique. `channels` must
come before `routes` in `Config`, because the route check reads the channels validated before
it. What the rules and routes do with the cycle's findings lives in the `alerts` package.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, Field, ValidationInfo, field_validator, model_validator

from aftercast.settings.base import Strict
from aftercast.settings.channels import ChannelConfig, ChannelConfigBase

Severity = Literal["critical", "warning", "info"]
Detection = Literal[
    "coverage_low",
    "coverage_high",
    "accuracy_vs_baseline",
    "no_better_than_benchmark",
    "bias",
    "actuals_overdue",
    "forecasts_stalled",
]
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.:-]*")


class RuleConfig(Strict):
    """One `rules:` entry; `name` defaults to the detection, which replaces that default rule."""

    name: str
    detection: Detection
    enabled: bool = True
    severity: Severity | None = None  # None: the severity the detection gave the finding
    max_p_value: float | None = Field(None, gt=0, le=1)  # on the fleet-adjusted p-value
    min_points: int = Field(0, ge=0)
    min_statistic: float | None = Field(None, ge=0)  # on |statistic|
    raise_after: int = Field(1, ge=1)
    clear_after: int = Field(1, ge=1)
    remind_every_hours: float = Field(24.0, ge=0)  # 0: no reminders
    match: dict[str, str] = Field(default_factory=dict)  # series labels the rule applies to
    models: list[str] = Field(default_factory=list)  # model names or shell patterns
    horizons: list[str] = Field(default_factory=list)  # horizon buckets, e.g. "1", "2-7"
    labels: dict[str, str] = Field(default_factory=dict)  # added to the alert for routing

    @model_validator(mode="before")
    @classmethod
    def _name_from_detection(cls, raw: Any) -> Any:
        if isinstance(raw, dict) and "name" not in raw and "detection" in raw:
            return {**raw, "name": raw["detection"]}
        return raw

    @field_validator("name")
    @classmethod
    def _plain_name(cls, value: str) -> str:
        if not _NAME.fullmatch(value) or len(value) > 64:
            raise ValueError("a rule name is letters, digits and _ . : - (at most 64)")
        return value


class RouteConfig(Strict):
    """One `routes:` entry: alerts whose labels include `match` go to `channels`."""

    name: str | None = Field(None, min_length=1, max_length=200)
    match: dict[str, str] = Field(default_factory=dict)
    channels: list[str] = Field(min_length=1)


def check_unique_names(names: Sequence[str], section: str) -> None:
    """Raise ValueError naming the first entry of `section` whose name was used before."""
    seen: set[str] = set()
    for index, name in enumerate(names):
        if name in seen:
            raise ValueError(f"{section}[{index}]: name {name!r} is used twice")
        seen.add(name)


def check_rule_list(rules: list[RuleConfig]) -> list[RuleConfig]:
    """Validator for `rules:`: names are unique, so each alert's rule is unambiguous."""
    check_unique_names([rule.name for rule in rules], "rules")
    return rules


def check_routes(routes: Sequence[RouteConfig], channel_names: Sequence[str]) -> None:
    """Raise ValueError naming the first route that names a channel not configured."""
    known = set(channel_names)
    for index, route in enumerate(routes):
        for channel in route.channels:
            if channel not in known:
                listed = ", ".join(sorted(known)) or "none"
                raise ValueError(
                    f"routes[{index}] names channel {channel!r}, which is not configured "
                    f"(channels: {listed})"
                )


class DeliveryConfig(Strict):
    """How the outbox sends: attempts, backoff, the lease of a claim, and digest size."""

    max_attempts: int = Field(8, ge=1, le=100)
    backoff_seconds: float = Field(30.0, gt=0)  # first retry delay; doubles each attempt
    max_backoff_seconds: float = Field(6 * 3600.0, gt=0)
    lease_seconds: float = Field(300.0, ge=5)  # a claim lapses after this; must outlast a send
    batch_size: int = Field(100, ge=1, le=10_000)
    digest_max_alerts: int = Field(40, ge=1, le=10_000)
    charts_per_digest: int = Field(3, ge=0, le=20)


def _check_channels(channels: list[ChannelConfigBase]) -> list[ChannelConfigBase]:
    check_unique_names([channel.name for channel in channels], "channels")
    for channel in channels:
        channel.check()  # ValueError with a one-line, secret-free message
    return channels


def _check_route_channels(routes: list[RouteConfig], info: ValidationInfo) -> list[RouteConfig]:
    channels: list[Any] = info.data.get("channels") or []
    check_routes(routes, [c.name for c in channels])
    return routes


Channels = Annotated[list[ChannelConfig], AfterValidator(_check_channels)]
Routes = Annotated[list[RouteConfig], AfterValidator(_check_route_channels)]
Rules = Annotated[list[RuleConfig], AfterValidator(check_rule_list)]
