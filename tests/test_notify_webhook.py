"""The webhook channel against a real HTTP receiver on loopback.

Signatures are verified with the `standardwebhooks` package's own `Webhook.verify`; the body is
checked against the CloudEvents 1.0.2 specification (core spec: required attributes and naming
rule; JSON format spec: structured mode and its media type); time stamps against the RFC 3339
section 5.6 grammar; status handling against RFC 9110 status classes.
"""

from __future__ import annotations

import json
import logging
import re
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

import pytest
from pydantic import ValidationError
from standardwebhooks import Webhook

from aftercast.notify import WebhookChannel
from aftercast.notify.webhook import retry_after_seconds
from tests.servers import HttpRecorder, channel_of, free_port, sample_notification

SECRET = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw"  # "whsec_" + base64, the Standard Webhooks form
TOKEN = "tok-5f2c-never-shown"
# RFC 3339 section 5.6, date-time = full-date "T" full-time, with a mandatory offset.
RFC3339 = re.compile(r"^\d{4}-\d{2}-\d{2}[Tt]\d{2}:\d{2}:\d{2}(\.\d+)?([Zz]|[+-]\d{2}:\d{2})$")


HOOK: dict[str, Any] = {
    "name": "ops-hook",
    "type": "webhook",
    "secret": SECRET,
    "timeout_seconds": 5,
}


def hook(url: str, **changes: Any) -> WebhookChannel:
    return channel_of(WebhookChannel, {**HOOK, "url": url, **changes})


@pytest.fixture
def receiver() -> Iterator[HttpRecorder]:
    with HttpRecorder() as server:
        yield server


def test_one_signed_post_that_verifies_with_the_package(receiver: HttpRecorder) -> None:
    outcome = hook(receiver.url()).deliver(sample_notification())
    assert outcome.status == "delivered", outcome.detail
    assert len(receiver.requests) == 1
    request = receiver.requests[0]
    assert request.path == "/hook"
    # Standard Webhooks: the package's own verifier accepts id, timestamp and signature.
    payload = Webhook(SECRET).verify(request.body, request.headers)
    assert payload["id"] == "ntf-0001"
    assert request.headers["webhook-id"] == "ntf-0001"  # the idempotency key, stable on retry
    with pytest.raises(Exception, match="signature"):  # a tampered body must not verify
        Webhook(SECRET).verify(request.body.replace(b"store-17", b"store-18"), request.headers)


def test_body_is_a_structured_cloudevent(receiver: HttpRecorder) -> None:
    notification = sample_notification()
    hook(receiver.url()).deliver(notification)
    request = receiver.requests[0]
    # CloudEvents JSON format 3.1 / HTTP binding 3.2: structured mode media type.
    assert request.headers["content-type"].split(";")[0] == "application/cloudevents+json"
    event = json.loads(request.body)
    # Core spec, Required Attributes: id, source, specversion, type, non-empty strings.
    for name in ("id", "source", "specversion", "type"):
        assert isinstance(event[name], str) and event[name]
    assert event["specversion"] == "1.0"
    assert event["id"] == notification.id
    # Attribute Naming Convention: lower-case ASCII letters and digits only.
    for name in event:
        assert re.fullmatch(r"[a-z0-9]+", name), name
    assert RFC3339.match(event["time"])  # Optional attribute `time`: an RFC 3339 timestamp
    assert event["datacontenttype"] == "application/json"
    assert "data_base64" not in event  # JSON format 3.1: data and data_base64 are exclusive
    data = event["data"]
    assert [a["series_id"] for a in data["alerts"]] == ["store-17", "store-3"]
    assert data["more"] == 3 and data["dashboard_url"] == notification.dashboard_url
    assert "charts" not in data and "chart" not in request.body.decode()  # kept small


@pytest.mark.parametrize(
    ("status", "expected"),
    [
        (200, "delivered"),
        (204, "delivered"),
        (410, "dead"),
        (400, "dead"),
        (404, "dead"),
        (408, "retry"),
        (429, "retry"),
        (500, "retry"),
        (503, "retry"),
        (301, "dead"),
    ],
)
def test_status_classes(status: int, expected: str) -> None:
    # RFC 9110 15: 2xx success; 408 timeout and 429 (RFC 6585) ask for a later try; 5xx server
    # trouble; any other 4xx is the request itself being refused, which a retry will not fix.
    with HttpRecorder(default_status=status) as server:
        outcome = hook(server.url()).deliver(sample_notification())
        assert len(server.requests) == 1  # redirects are not followed
    assert outcome.status == expected
    assert str(status) in outcome.detail


def test_503_three_times_then_delivered_with_the_same_id() -> None:
    with HttpRecorder(script=[503, 503, 503], reply_headers={"Retry-After": "7"}) as server:
        channel = hook(server.url())
        outcomes = [channel.deliver(sample_notification()) for _ in range(4)]
    assert [o.status for o in outcomes] == ["retry", "retry", "retry", "delivered"]
    assert outcomes[0].retry_after_seconds == 7  # RFC 9110 10.2.3 delay-seconds
    assert {r.headers["webhook-id"] for r in server.requests} == {"ntf-0001"}
    for request in server.requests:  # every attempt is signed afresh and verifies
        Webhook(SECRET).verify(request.body, request.headers)


def test_receiver_hanging_past_the_timeout_is_a_retry() -> None:
    hang = 5.0
    with HttpRecorder(hang_seconds=hang) as server:
        started = time.monotonic()
        outcome = hook(server.url(), timeout_seconds=0.3).deliver(sample_notification())
        elapsed = time.monotonic() - started
    assert outcome.status == "retry" and "0.3s" in outcome.detail
    assert elapsed < hang  # the client gave up before the receiver would have answered


def test_nothing_listening_is_a_retry() -> None:
    port = free_port()
    outcome = hook(f"http://127.0.0.1:{port}/hook").deliver(sample_notification())
    assert outcome.status == "retry" and f"127.0.0.1:{port}" in outcome.detail


def test_secrets_stay_out_of_details_reprs_and_logs(caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.DEBUG)
    # A receiver that echoes what it got must not leak the secret or token into outbox rows.
    with HttpRecorder(default_status=400, reply_body=f"bad {SECRET} {TOKEN}") as server:
        channel = hook(server.url("/hook/" + TOKEN), headers={"authorization": f"Bearer {TOKEN}"})
        outcome = channel.deliver(sample_notification())
    assert server.requests[0].headers["authorization"] == f"Bearer {TOKEN}"
    assert outcome.status == "dead"
    bare_key = SECRET.removeprefix("whsec_")
    texts = [
        outcome.detail,
        repr(channel.config),
        str(channel.config),
        channel.config.model_dump_json(),
        *(r.getMessage() for r in caplog.records),
    ]
    assert len(texts) > 4
    for text in texts:
        assert SECRET not in text and bare_key not in text
        assert f"Bearer {TOKEN}" not in text
    assert TOKEN not in outcome.detail  # not even from the url path


def test_without_a_secret_nothing_is_signed(receiver: HttpRecorder) -> None:
    outcome = hook(receiver.url(), secret=None).deliver(sample_notification())
    assert outcome.status == "delivered"
    assert "webhook-signature" not in receiver.requests[0].headers
    assert receiver.requests[0].headers["webhook-id"] == "ntf-0001"


def test_config_errors_name_the_rule_not_the_value() -> None:
    for bad_secret in ("whsec_", "whsec_a"):  # empty, and a base64 length no key can have
        with pytest.raises(ValueError, match="secret must be") as error:
            hook("http://127.0.0.1:1/hook", secret=bad_secret)
        assert bad_secret not in str(error.value).replace("'whsec_'", "")
    with pytest.raises(ValueError, match="cannot be overridden") as clash:
        hook("http://127.0.0.1:1/hook", headers={"Content-Type": TOKEN})
    assert TOKEN not in str(clash.value)
    with pytest.raises(ValidationError) as typo:  # a mistyped key must not quote its value
        hook("http://127.0.0.1:1/hook", secrett=SECRET)
    assert SECRET not in str(typo.value)
    with pytest.raises(ValidationError):
        hook("ftp://127.0.0.1/hook")


def test_retry_after_http_date() -> None:
    now = datetime(2015, 10, 21, 7, 27, 0, tzinfo=UTC)
    # RFC 9110 5.6.7 IMF-fixdate, the example date of that section.
    assert retry_after_seconds("Wed, 21 Oct 2015 07:28:00 GMT", now=now) == 60
