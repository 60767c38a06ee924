"""The webhook channel: an HTTP POST of one CloudEvent, signed the Standard Webhooks way.

The body is the CloudEvents 1.0 structured-mode event from `render_event_json` (content type
`application/cloudevents+json`). When a secret is configured, the `standardwebhooks` package
signs `webhook-id.webhook-timestamp.body`; the id is the notification id, so a receiver can drop
repeats, and the timestamp is taken at each attempt because receivers refuse old ones. Replies:
2xx delivered; 408, 429, 5xx, network errors and timeouts retry (honouring Retry-After); any
other status is a permanent refusal. Redirects are not followed: a POST that moved is a config
error, and following it could hand the payload to a host nobody configured.
"""

from __future__ import annotations

from datetime import UTC, datetime
from email.utils import parsedate_to_datetime
from urllib.parse import urlsplit

import requests
from standardwebhooks import Webhook

import aftercast
from aftercast.notify.base import Channel, DeliveryOutcome, Notification
from aftercast.notify.render import render_event_json
from aftercast.settings.channels import WebhookChannelConfig

CONTENT_TYPE = "application/cloudevents+json"
RETRY_STATUSES = frozenset({408, 425, 429})
BODY_EXCERPT_CHARS = 120


class WebhookChannel(Channel):
    """POSTs each notification as a signed CloudEvent."""

    type = "webhook"
    config_model = WebhookChannelConfig

    def __init__(self, config: WebhookChannelConfig) -> None:
        super().__init__(config)
        self.webhook = config
        self.signer = _signer(config)
        parts = urlsplit(config.url)
        # Only the host goes into details: paths of hook URLs often embed tokens.
        self.where = f"{parts.hostname}:{parts.port or (443 if parts.scheme == 'https' else 80)}"

    def signed_headers(self, notification: Notification, body: str) -> dict[str, str]:
        """The Standard Webhooks headers plus the configured ones, for this attempt."""
        now = datetime.now(UTC)
        headers = {k: v.get_secret_value() for k, v in self.webhook.headers.items()}
        headers.update(
            {
                "content-type": CONTENT_TYPE,
                "user-agent": f"aftercast/{aftercast.__version__}",
                "webhook-id": notification.id,
                "webhook-timestamp": str(int(now.timestamp())),
            }
        )
        if self.signer is not None:
            headers["webhook-signature"] = self.signer.sign(notification.id, now, body)
        return headers

    def _send(self, notification: Notification) -> DeliveryOutcome:
        body = render_event_json(notification)
        timeout = self.webhook.timeout_seconds
        try:
            response = requests.post(
                self.webhook.url,
                data=body.encode("utf-8"),
                headers=self.signed_headers(notification, body),
                timeout=(timeout, timeout),
                allow_redirects=False,
                verify=self.webhook.ca_file or True,
            )
        except requests.Timeout:
            return DeliveryOutcome.retry(f"{self.where} did not answer within {timeout:g}s")
        except requests.exceptions.SSLError:
            return DeliveryOutcome.dead(f"TLS certificate of {self.where} not trusted; set ca_file")
        except requests.ConnectionError:
            return DeliveryOutcome.retry(f"cannot connect to {self.where}")
        except requests.RequestException as exc:
            return DeliveryOutcome.dead(f"request to {self.where} failed: {type(exc).__name__}")
        return self._judge(response)

    def _judge(self, response: requests.Response) -> DeliveryOutcome:
        status = f"HTTP {response.status_code} {response.reason or ''}".strip()
        if 200 <= response.status_code < 300:
            return DeliveryOutcome.delivered(f"{self.where} answered {status}")
        said = " ".join(response.text[:BODY_EXCERPT_CHARS].split())
        detail = f"{self.where} answered {status}" + (f": {said}" if said else "")
        if response.status_code in RETRY_STATUSES or response.status_code >= 500:
            after = retry_after_seconds(response.headers.get("retry-after"))
            return DeliveryOutcome.retry(detail, after)
        if 300 <= response.status_code < 400:
            return DeliveryOutcome.dead(f"{detail}; redirects are not followed, fix the url")
        return DeliveryOutcome.dead(detail)


def _signer(config: WebhookChannelConfig) -> Webhook | None:
    if config.secret is None:
        return None
    try:
        return Webhook(config.secret.get_secret_value())
    except Exception:  # binascii.Error, EmptyWebhookSecretError, ...
        raise ValueError(
            f"channel {config.name!r}: secret must be 'whsec_' followed by base64"
        ) from None


def retry_after_seconds(value: str | None, now: datetime | None = None) -> float | None:
    """Seconds from an HTTP Retry-After header (RFC 9110 10.2.3: delay-seconds or an HTTP-date).

    >>> retry_after_seconds("120"), retry_after_seconds(None), retry_after_seconds("soon")
    (120.0, None, None)
    """
    if not value:
        return None
    text = value.strip()
    if text.isdigit():
        return float(text)
    try:
        moment = parsedate_to_datetime(text)
    except (TypeError, ValueError):
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return max(0.0, (moment - (now or datetime.now(UTC))).total_seconds())
