"""Notification channels: how a rendered alert digest leaves aftercast.

`base` holds the contract (`Notification` in, `DeliveryOutcome` out, `Channel.deliver` never
raises); each other module is one channel with its own pydantic config model. The registry
below is the only place that lists them: adding a channel is one new file and one line in
`CHANNELS`. The config module builds its discriminated union from `CHANNEL_CONFIG_TYPES` (each
model's `type` field is the discriminator) and turns each entry into a channel with
`build_channel`, which also runs the checks that involve secrets (they live in the channel
constructors because a pydantic error would quote the secret it rejects). Models holding these
configs should set `hide_input_in_errors=True` too: pydantic takes that setting from the
outermost model, and a mistyped key's error would otherwise quote its value.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Annotated, Any, Union

from pydantic import ConfigDict, Field, TypeAdapter

from aftercast.notify.base import (
    AlertLine,
    Channel,
    ChannelConfigBase,
    ChartData,
    DeliveryOutcome,
    Notification,
)
from aftercast.notify.files import FileChannel, FileChannelConfig
from aftercast.notify.mail import EmailChannel, EmailChannelConfig
from aftercast.notify.webhook import WebhookChannel, WebhookChannelConfig

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
# Union over a runtime tuple: pydantic reads it, type checkers see ChannelConfigBase.
_config_adapter: TypeAdapter[Any] = TypeAdapter(
    Annotated[Union[CHANNEL_CONFIG_TYPES], Field(discriminator="type")],  # type: ignore[arg-type]  # noqa: UP007
    config=ConfigDict(hide_input_in_errors=True),
)


def parse_channel_config(raw: Mapping[str, Any]) -> ChannelConfigBase:
    """Validate one `channels:` entry into the config model its `type` names."""
    config: ChannelConfigBase = _config_adapter.validate_python(dict(raw))
    return config


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
    "ChannelConfigBase",
    "ChartData",
    "DeliveryOutcome",
    "EmailChannel",
    "EmailChannelConfig",
    "FileChannel",
    "FileChannelConfig",
    "Notification",
    "WebhookChannel",
    "WebhookChannelConfig",
    "build_channel",
    "parse_channel_config",
]
