"""The email channel against a real aiosmtpd server on loopback, and the subject it writes.

MIME structure is checked with the standard library's RFC 5322 / MIME parser, the HTML with
the standard library's HTML tokenizer, the PNG with Pillow, and reply handling against the
reply classes of RFC 5321 (4.2.1: 4yz transient, 5yz permanent).
"""

from __future__ import annotations

import dataclasses
import io
import logging
import socket
from collections.abc import Iterator
from email.message import EmailMessage
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import pytest
from PIL import Image

from aftercast.notify import EmailChannel, parse_channel_config
from aftercast.notify.render import render_subject
from aftercast.settings.channels import EmailChannelConfig
from tests.servers import (
    LOOPBACK,
    NASTY_SERIES_ID,
    SmtpRecorder,
    channel_of,
    mismatched_chart,
    sample_notification,
    self_signed_certificate,
    server_tls_context,
)

# aiosmtpd warns when AUTH is allowed without STARTTLS: intended here, on loopback only.
pytestmark = pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS")

PASSWORD = "pw-Zq81-never-shown"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C / ISO 15948), section 5.2


MAIL: dict[str, Any] = {
    "name": "oncall-mail",
    "type": "email",
    "host": LOOPBACK,
    "security": "none",
    "sender": "aftercast@example.test",
    "to": ["oncall@example.test"],
    "timeout_seconds": 5,
}


def mail_channel(port: int, **changes: Any) -> EmailChannel:
    return channel_of(EmailChannel, {**MAIL, "port": port, **changes})


@pytest.fixture
def smtp() -> Iterator[SmtpRecorder]:
    with SmtpRecorder() as server:
        yield server


class TagCollector(HTMLParser):
    """Start tags as the stdlib HTML tokenizer sees them, and the text between them."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parts(message: EmailMessage) -> dict[str, list[EmailMessage]]:
    found: dict[str, list[EmailMessage]] = {}
    for part in message.walk():
        assert isinstance(part, EmailMessage)
        found.setdefault(part.get_content_type(), []).append(part)
    return found


def test_one_message_per_deliver_call(smtp: SmtpRecorder) -> None:
    channel = mail_channel(smtp.port)
    first = channel.deliver(sample_notification(notification_id="a"))
    assert first.status == "delivered", first.detail
    assert len(smtp.messages) == 1
    second = channel.deliver(sample_notification(notification_id="b"))
    assert second.status == "delivered"
    assert len(smtp.messages) == 2  # the brief's contract: one message per call, never a batch
    assert smtp.messages[0].rcpt_tos == ["oncall@example.test"]


def test_mime_structure_text_html_and_inline_png(smtp: SmtpRecorder) -> None:
    channel = mail_channel(smtp.port)
    assert channel.deliver(sample_notification(charts=2)).status == "delivered"
    message = smtp.messages[0].message
    # RFC 2046 5.1.4: alternatives in increasing richness; RFC 2387: related parts with the HTML.
    assert message.get_content_type() == "multipart/alternative"
    found = parts(message)
    assert len(found["text/plain"]) == 1 and len(found["text/html"]) == 1
    assert len(found["multipart/related"]) == 1
    text = found["text/plain"][0].get_content()
    assert "store-17 / shop-planner" in text and "widen the interval" in text
    html = TagCollector()
    html.feed(found["text/html"][0].get_content())
    sources = [attrs["src"] for tag, attrs in html.tags if tag == "img"]
    images = found["image/png"]
    assert len(images) == 2
    for image in images:
        content_id = str(image["Content-ID"]).strip("<>")
        assert f"cid:{content_id}" in sources  # RFC 2392: cid: URL names the Content-ID
        png = image.get_content()
        assert png.startswith(PNG_SIGNATURE)
        with Image.open(io.BytesIO(png)) as decoded:  # Pillow checks chunk CRCs in verify()
            decoded.verify()
        with Image.open(io.BytesIO(png)) as decoded:
            assert decoded.format == "PNG" and min(decoded.size) > 100


def test_html_part_escapes_user_data(smtp: SmtpRecorder) -> None:
    channel = mail_channel(smtp.port)
    channel.deliver(sample_notification(series_id=NASTY_SERIES_ID))
    found = parts(smtp.messages[0].message)
    html_source = found["text/html"][0].get_content()
    assert "<script>" not in html_source
    collector = TagCollector()
    collector.feed(html_source)
    assert "script" not in {tag for tag, _ in collector.tags}  # stdlib tokenizer: no script tag
    assert any(NASTY_SERIES_ID in chunk for chunk in collector.text)  # shown, as text
    assert NASTY_SERIES_ID in found["text/plain"][0].get_content()  # plain text stays literal


def test_headers_carry_idempotency_key_and_triage_subject(smtp: SmtpRecorder) -> None:
    channel = mail_channel(smtp.port)
    notification = sample_notification(notification_id="digest:oncall:2024-05-01T06")
    channel.deliver(notification)
    message = smtp.messages[0].message
    assert message["X-Aftercast-Notification-Id"] == notification.id
    message_id = message["Message-ID"]
    assert not message_id.defects  # stdlib RFC 5322 msg-id parser found nothing wrong
    assert message_id.startswith("<digest-oncall-2024-05-01T06@")
    subject = str(message["Subject"])
    assert subject == render_subject(notification)
    # Severity, count (2 shown + 3 more) and the worst series lead, for a phone's first line.
    assert subject.startswith("[aftercast] CRITICAL 5 alerts")
    assert "store-17/shop-planner h1 coverage 55% (80% band)" in subject


def test_subject_for_other_kinds() -> None:
    single = sample_notification(more=0)
    one = sample_notification(alerts=single.alerts[:1], more=0)
    assert render_subject(one).startswith("[aftercast] CRITICAL store-17/shop-planner h1 coverage")
    reminder = render_subject(sample_notification(kind="reminder"))
    assert reminder.startswith("[aftercast] REMINDER CRITICAL 5 open alerts")
    assert render_subject(sample_notification(kind="cleared")).startswith("[aftercast] CLEARED")
    nasty = render_subject(sample_notification(series_id="a\r\nBcc: x@evil.test"))
    assert "\n" not in nasty and "\r" not in nasty  # RFC 5322 2.2: no line breaks in a header


@pytest.mark.parametrize(
    ("reply", "status"),
    [("451 4.3.0 Try again later", "retry"), ("554 5.7.1 Message rejected", "dead")],
)
def test_reply_class_decides_retry_or_dead(reply: str, status: str) -> None:
    # RFC 5321 4.2.1: 4yz transient negative completion, 5yz permanent negative completion.
    with SmtpRecorder(data_reply=reply) as server:
        outcome = mail_channel(server.port).deliver(sample_notification())
    assert outcome.status == status
    assert reply.split()[0] in outcome.detail


def test_dead_server_is_a_retry_with_a_clear_detail() -> None:
    server = SmtpRecorder().start()
    port = server.port
    server.stop()  # nothing listens there any more
    outcome = mail_channel(port).deliver(sample_notification())
    assert outcome.status == "retry"
    assert "refused" in outcome.detail and str(port) in outcome.detail


def test_silent_server_times_out_as_retry() -> None:
    # A socket that listens but never accepts: the TCP handshake completes, no greeting comes.
    with socket.socket() as silent:
        silent.bind((LOOPBACK, 0))
        silent.listen(1)
        outcome = mail_channel(silent.getsockname()[1], timeout_seconds=0.3).deliver(
            sample_notification(charts=0)
        )
    assert outcome.status == "retry" and "0.3s" in outcome.detail


def test_login_over_plain_loopback_and_secrets_stay_hidden(
    caplog: pytest.LogCaptureFixture,
) -> None:
    # aiosmtpd's auth_require_tls=False allows AUTH without TLS, for loopback tests only.
    caplog.set_level(logging.DEBUG)
    with SmtpRecorder(logins={"alert-bot": PASSWORD}) as server:
        good = mail_channel(server.port, username="alert-bot", password=PASSWORD)
        assert good.deliver(sample_notification()).status == "delivered"
        assert server.messages[0].login == "alert-bot"
        bad = mail_channel(server.port, username="alert-bot", password=PASSWORD + "-wrong")
        refused = bad.deliver(sample_notification())
    # RFC 4954: 535 bad credentials; the channel's config is at fault, not the message.
    assert refused.status == "retry" and "535" in refused.detail
    assert "refused the login of 'alert-bot'" in refused.detail and "password" in refused.detail
    for channel in (good, bad):
        assert PASSWORD not in repr(channel.config) and PASSWORD not in str(channel.config)
        assert PASSWORD not in channel.config.model_dump_json()
    assert caplog.records
    for record in caplog.records:
        assert PASSWORD not in record.getMessage()


def test_secret_in_a_server_reply_is_scrubbed_from_the_detail() -> None:
    # A server that quotes what it was sent must not leak the password into outbox rows.
    with SmtpRecorder(logins={"u": PASSWORD}, data_reply=f"554 5.7.1 no thanks {PASSWORD}") as srv:
        outcome = mail_channel(srv.port, username="u", password=PASSWORD).deliver(
            sample_notification(charts=0)
        )
    assert outcome.status == "dead" and "554" in outcome.detail
    assert PASSWORD not in outcome.detail


@pytest.fixture(scope="module")
def certificate(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    made = self_signed_certificate(tmp_path_factory.mktemp("tls"))
    if made is None:
        pytest.skip("openssl tool not found: cannot make a test certificate")
    return made


@pytest.mark.parametrize("security", ["starttls", "ssl"])
def test_tls_with_a_trusted_self_signed_certificate(
    security: str, certificate: tuple[Path, Path]
) -> None:
    cert, key = certificate
    context = server_tls_context(cert, key)
    tls: dict[str, Any] = (
        {"starttls": context} if security == "starttls" else {"implicit_tls": context}
    )
    with SmtpRecorder(logins={"alert-bot": PASSWORD}, **tls) as server:
        channel = mail_channel(
            server.port,
            security=security,
            ca_file=str(cert),
            username="alert-bot",
            password=PASSWORD,
        )
        outcome = channel.deliver(sample_notification())
        untrusted = mail_channel(server.port, security=security).deliver(sample_notification())
    assert outcome.status == "delivered", outcome.detail
    assert server.messages[0].over_tls and server.messages[0].login == "alert-bot"
    # Python's ssl module verifies against the system store: a self-signed cert fails there.
    assert untrusted.status == "dead" and "ca_file" in untrusted.detail


def test_chart_that_cannot_be_drawn_is_left_out_not_the_mail(smtp: SmtpRecorder) -> None:
    broken = mismatched_chart()
    base = sample_notification(charts=1)
    notification = dataclasses.replace(base, charts=[broken, *base.charts])
    assert mail_channel(smtp.port).deliver(notification).status == "delivered"
    found = parts(smtp.messages[0].message)
    assert len(found["image/png"]) == 1
    html = found["text/html"][0].get_content()
    content_id = str(found["image/png"][0]["Content-ID"]).strip("<>")
    assert html.count("cid:") == 1 and f"cid:{content_id}" in html  # no dangling reference


def test_config_defaults_and_validation() -> None:
    config = EmailChannelConfig(
        name="m", host="smtp.example.test", sender="a@example.test", to=["b@example.test"]
    )
    assert config.security == "starttls" and config.smtp_port == 587  # RFC 6409 submission port
    assert config.timeout_seconds == 10
    with pytest.raises(ValueError):
        EmailChannelConfig(name="m", host="h", sender="a@example.test", to=["not an address"])
    with pytest.raises(ValueError):
        EmailChannelConfig(name="m", host="h", sender="a@example.test", to=[])
    with pytest.raises(ValueError):  # extra="forbid": a typo is an error, not ignored
        parse_channel_config(
            {
                "name": "m",
                "type": "email",
                "host": "h",
                "sender": "a@b.test",
                "to": ["c@d.test"],
                "tls": True,
            }
        )
