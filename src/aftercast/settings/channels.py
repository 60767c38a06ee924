"""Config models of the notification channels: the entries of `channels:`, one per type.

Each model narrows `type` to its own literal, so `ChannelConfig` can tell them apart. Checks
that involve a secret (a password without a user name, a malformed signing secret, a header
aftercast sets itself) run in `check`, not in a pydantic validator, because a pydantic error
would quote the value it rejects; `check` raises a one-line message that never does. The
channels that send (SMTP, HTTP, a file) live in the `notify` package; adding a type is a model
here, a module there and one line in its `CHANNELS`. Models holding these configs should set
`hide_input_in_errors=True` too: pydantic takes that setting from the outermost model, and a
mistyped key's error would otherwise quote its value.
"""

from __future__ import annotations

import base64
import binascii
from email.utils import parseaddr
from typing import Annotated, Literal
from urllib.parse import urlsplit

from pydantic import BaseModel, ConfigDict, Field, SecretStr, field_validator

SUBJECT_PREFIX = "[aftercast]"
DEFAULT_PORTS = {"none": 25, "starttls": 587, "ssl": 465}
# Headers the webhook channel writes itself; configured headers may not override them.
OWN_HEADERS = frozenset(
    {"content-type", "content-length", "webhook-id", "webhook-timestamp", "webhook-signature"}
)
WEBHOOK_SECRET_PREFIX = "whsec_"


class ChannelConfigBase(BaseModel):
    """Fields every channel config has; each channel narrows `type` to its own Literal."""

    # A mistyped key ("pasword:") fails as extra, and its error must not quote the value.
    model_config = ConfigDict(extra="forbid", frozen=True, hide_input_in_errors=True)

    name: str = Field(min_length=1)
    type: str

    def secret_values(self) -> list[str]:
        """Every secret this config holds, so outcome details can be scrubbed of them."""
        found: list[str] = []
        for value in self.__dict__.values():
            items = value.values() if isinstance(value, dict) else [value]
            found.extend(v.get_secret_value() for v in items if isinstance(v, SecretStr))
        return [s for s in found if s]

    def check(self) -> None:
        """Raise ValueError, naming the channel but no secret, when the config cannot work."""


class EmailChannelConfig(ChannelConfigBase):
    """An SMTP server and who gets the mail; `port` defaults by `security` (25, 587, 465)."""

    type: Literal["email"] = "email"
    host: str = Field(min_length=1)
    port: int | None = Field(default=None, ge=1, le=65535)
    security: Literal["none", "starttls", "ssl"] = "starttls"
    sender: str
    to: list[str] = Field(min_length=1)
    username: str | None = None
    password: SecretStr | None = None
    timeout_seconds: float = Field(default=10.0, gt=0)
    ca_file: str | None = None  # extra CA bundle to trust, e.g. a company relay's own CA
    subject_prefix: str = SUBJECT_PREFIX

    @field_validator("sender")
    @classmethod
    def _sender_is_address(cls, value: str) -> str:
        return _check_address(value)

    @field_validator("to")
    @classmethod
    def _recipients_are_addresses(cls, value: list[str]) -> list[str]:
        return [_check_address(v) for v in value]

    @property
    def smtp_port(self) -> int:
        return self.port if self.port is not None else DEFAULT_PORTS[self.security]

    def check(self) -> None:
        if self.password is not None and not self.username:
            raise ValueError(f"channel {self.name!r}: password is set but username is not")


def _check_address(value: str) -> str:
    address = parseaddr(value)[1]
    if "@" not in address or any(c.isspace() for c in address):
        raise ValueError(f"not an email address: {value!r}")
    return value


class WebhookChannelConfig(ChannelConfigBase):
    """Where to POST, the signing secret ("whsec_" + base64) and any extra headers."""

    type: Literal["webhook"] = "webhook"
    url: str
    secret: SecretStr | None = None
    timeout_seconds: float = Field(default=10.0, gt=0)
    headers: dict[str, SecretStr] = Field(default_factory=dict)  # may hold tokens: never shown
    ca_file: str | None = None

    @field_validator("url")
    @classmethod
    def _url_is_http(cls, value: str) -> str:
        parts = urlsplit(value)
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise ValueError("url must be an http:// or https:// address with a host")
        return value

    def secret_values(self) -> list[str]:
        found = super().secret_values()
        # The bare base64 key is as secret as the prefixed form, and the credential of an
        # "Authorization: Bearer <token>" header as secret as the whole value.
        found += [
            s.removeprefix(WEBHOOK_SECRET_PREFIX)
            for s in found
            if s.startswith(WEBHOOK_SECRET_PREFIX)
        ]
        found += [s.split()[-1] for s in found if len(s.split()) > 1]
        return found

    def check(self) -> None:
        clashes = sorted(k for k in self.headers if k.lower() in OWN_HEADERS)
        if clashes:
            raise ValueError(
                f"channel {self.name!r}: headers set by aftercast cannot be overridden: {clashes}"
            )
        if self.secret is not None and not signing_key(self.secret.get_secret_value()):
            raise ValueError(f"channel {self.name!r}: secret must be 'whsec_' followed by base64")


def signing_key(secret: str) -> bytes:
    """The key a "whsec_" secret stands for, read as Standard Webhooks reads it; b"" if none."""
    try:
        # Unpadded base64 is allowed: extra padding is ignored by the decoder.
        return base64.b64decode(secret.removeprefix(WEBHOOK_SECRET_PREFIX) + "==")
    except (binascii.Error, ValueError):
        return b""


class FileChannelConfig(ChannelConfigBase):
    """The JSON Lines file to append to; folders are created as needed."""

    type: Literal["file"] = "file"
    path: str


ChannelConfig = Annotated[
    EmailChannelConfig | WebhookChannelConfig | FileChannelConfig, Field(discriminator="type")
]
