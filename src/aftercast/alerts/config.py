"""Config sections of alerting: `channels:`, `routes:`, `delivery:` and `rules:`.

They are field types for the root `Config`, checked as the file loads: channel names are unique
and each channel can be built (its secret checks run here, with messages that never quote the
secret), every route names configured channels, rule names are unique. `channels` must come
before `routes` in `Config`, because the route check reads the channels validated before it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Annotated, Any, Union

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, ValidationInfo

from aftercast.alerts.routing import RouteConfig, check_routes
from aftercast.alerts.rules import RuleConfig, check_rule_list, check_unique_names
from aftercast.notify import CHANNEL_CONFIG_TYPES, ChannelConfigBase, build_channel

if TYPE_CHECKING:
    ChannelEntry = ChannelConfigBase
else:  # a discriminated union over the registered channel types, read by pydantic
    ChannelEntry = Annotated[Union[CHANNEL_CONFIG_TYPES], Field(discriminator="type")]  # noqa: UP007


class DeliveryConfig(BaseModel):
    """How the outbox sends: attempts, backoff, the lease of a claim, and digest size."""

    model_config = ConfigDict(extra="forbid", frozen=True)

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
        build_channel(channel)  # ValueError with a one-line, secret-free message
    return channels


def _check_route_channels(routes: list[RouteConfig], info: ValidationInfo) -> list[RouteConfig]:
    channels: list[Any] = info.data.get("channels") or []
    check_routes(routes, [c.name for c in channels])
    return routes


Channels = Annotated[list[ChannelEntry], AfterValidator(_check_channels)]
Routes = Annotated[list[RouteConfig], AfterValidator(_check_route_channels)]
Rules = Annotated[list[RuleConfig], AfterValidator(check_rule_list)]
