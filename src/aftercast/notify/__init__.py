"""Notification channels: how a rendered alert digest leaves aftercast.

`base` holds the contract (`Notification` in, `DeliveryOutcome` out, `Channel.deliver` never
raises); each other module is one channel, configured by its model in
`aftercast.settings.channels`. The registry below is the only place that lists the channels:
adding one is its config model, one new file here and one line in `CHANNELS`. `build_channel`
turns a validated config into its channel.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from pydantic import ConfigDict, TypeAdapter

from aftercast.notify.base import AlertLine, Channel, ChartData, DeliveryOutcome, Notification
from aftercast.notify.files import FileChannel
from aftercast.notify.mail import EmailChannel
from aftercast.notify.webhook import WebhookChannel
from aftercast.settings.channels import ChannelConfig, ChannelConfigBase

CHANNELS: dict[str, type[Channel]] = {
    cls.type: cls
    for cls in (
        EmailChannel,
        WebhookChannel,
        FileChannel,
    )
}
CHANNEL_CONFIG_TYPES: tuple[type[ChannelConfigBase], ...] = tuple(
    cls.config_model for cls in CHANNELS.values()
)
_config_adapter: TypeAdapter[ChannelConfigBase] = TypeAdapter(
    ChannelConfig, config=ConfigDict(hide_input_in_errors=True)
)


def parse_channel_config(raw: Mapping[str, Any]) -> ChannelConfigBase:
    """Validate one `channels:` entry into the config model its `type` names."""
    return _config_adapter.validate_python(dict(raw))


def build_channel(config: ChannelConfigBase) -> Channel:
    """The channel for a validated config, chosen by its `type`."""
    try:
        cls = CHANNELS[config.type]
    except KeyError:
        raise ValueError(
            f"channel {config.name!r}: unknown type {config.type!r}; known: {sorted(CHANNELS)}"
        ) from None
    return cls(config)


__all__ = [
    "CHANNELS",
    "CHANNEL_CONFIG_TYPES",
    "AlertLine",
    "Channel",
    "ChartData",
    "DeliveryOutcome",
    "EmailChannel",
    "FileChannel",
    "Notification",
    "WebhookChannel",
    "build_channel",
    "parse_channel_config",
]
