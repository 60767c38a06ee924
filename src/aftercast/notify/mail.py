"""The email channel: one SMTP message per notification, text and HTML, charts inline.

The message is multipart/alternative: a plain-text part, then a multipart/related part holding
the HTML and one PNG per chart, referenced by Content-ID. `Message-ID` and
`X-Aftercast-Notification-Id` carry the idempotency key, so a retried message can be recognised
as a repeat. SMTP replies are sorted the way RFC 5321 means them: 4xx and any network trouble
(refused, reset, timed out) are worth retrying, 5xx is a permanent no, except a refused login
(535), which is the channel's configuration and no fault of the message: it is retried.
Security is "starttls" by default, so a password never crosses the network in clear unless the
config says so. The module is called `mail`, not `email`, so that it can never shadow the
standard library package.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import smtplib
import ssl
from email.message import EmailMessage
from email.utils import formatdate, parseaddr

from aftercast.notify.base import Channel, DeliveryOutcome, Notification
from aftercast.notify.charts import render_band_chart
from aftercast.notify.render import (
    chart_content_id,
    render_html,
    render_subject,
    render_text,
    safe_token,
)
from aftercast.settings.channels import EmailChannelConfig

log = logging.getLogger("aftercast.notify")


def build_message(n: Notification, config: EmailChannelConfig, pngs: list[bytes]) -> EmailMessage:
    """The MIME message for `n`; `pngs[i]` is the drawing of `n.charts[i]`."""
    domain = parseaddr(config.sender)[1].rpartition("@")[2] or "aftercast.invalid"
    message = EmailMessage()
    message["Subject"] = render_subject(n, prefix=config.subject_prefix)
    message["From"] = config.sender
    message["To"] = ", ".join(config.to)
    message["Date"] = formatdate(usegmt=True)
    message["Message-ID"] = f"<{safe_token(n.id)}@{domain}>"
    message["X-Aftercast-Notification-Id"] = " ".join(n.id.split())
    message["Auto-Submitted"] = "auto-generated"  # RFC 3834: no out-of-office replies, please
    message.set_content(render_text(n))
    message.add_alternative(render_html(n, inline_charts=bool(pngs)), subtype="html")
    html_part = message.get_body(preferencelist=("html",))
    assert html_part is not None  # we have just added it
    for index, png in enumerate(pngs):
        html_part.add_related(
            png,
            maintype="image",
            subtype="png",
            cid=f"<{chart_content_id(n, index)}>",
            disposition="inline",
            filename=f"chart{index}.png",
        )
    return message


class EmailChannel(Channel):
    """Sends each notification as one email over SMTP."""

    type = "email"
    config_model = EmailChannelConfig

    def __init__(self, config: EmailChannelConfig) -> None:
        super().__init__(config)
        self.email = config

    def _send(self, notification: Notification) -> DeliveryOutcome:
        drawable, pngs = _draw_charts(notification)
        message = build_message(drawable, self.email, pngs)
        try:
            refused = self._transmit(message)
        except (smtplib.SMTPException, OSError) as exc:
            return _classify(exc, self.email)
        where = f"{self.email.host}:{self.email.smtp_port}"
        if refused:
            names = ", ".join(f"{rcpt} ({code})" for rcpt, (code, _) in refused.items())
            return DeliveryOutcome.delivered(f"accepted by {where}, but it refused {names}")
        return DeliveryOutcome.delivered(f"accepted by {where} for {len(self.email.to)} recipients")

    def _transmit(self, message: EmailMessage) -> dict[str, tuple[int, bytes]]:
        cfg = self.email
        context = ssl.create_default_context(cafile=cfg.ca_file)
        smtp: smtplib.SMTP
        if cfg.security == "ssl":
            smtp = smtplib.SMTP_SSL(
                cfg.host, cfg.smtp_port, timeout=cfg.timeout_seconds, context=context
            )
        else:
            smtp = smtplib.SMTP(cfg.host, cfg.smtp_port, timeout=cfg.timeout_seconds)
        try:
            if cfg.security == "starttls":
                smtp.starttls(context=context)
            if cfg.username:
                secret = cfg.password.get_secret_value() if cfg.password else ""
                smtp.login(cfg.username, secret)
            envelope_to = [parseaddr(a)[1] for a in cfg.to]
            return smtp.send_message(message, parseaddr(cfg.sender)[1], envelope_to)
        finally:
            # Once the server has the message a failed QUIT must not turn into a resend.
            with contextlib.suppress(smtplib.SMTPException, OSError):
                smtp.quit()
            smtp.close()


def _draw_charts(n: Notification) -> tuple[Notification, list[bytes]]:
    """Draw every chart; a chart that cannot be drawn is left out rather than losing the mail."""
    kept, pngs = [], []
    for chart in n.charts:
        try:
            pngs.append(render_band_chart(chart))
            kept.append(chart)
        except (ValueError, TypeError) as exc:
            log.warning("chart for %s/%s left out: %s", chart.series_id, chart.model, exc)
    return dataclasses.replace(n, charts=kept), pngs


def _reply(code: int, text: bytes | str) -> str:
    words = text.decode("utf-8", "replace") if isinstance(text, bytes) else text
    return f"{code} {words}"


def _classify(exc: smtplib.SMTPException | OSError, cfg: EmailChannelConfig) -> DeliveryOutcome:
    """RFC 5321 reply classes: 4xx transient (retry), 5xx permanent (dead)."""
    where = f"{cfg.host}:{cfg.smtp_port}"
    timed_out = isinstance(exc.__context__, TimeoutError)  # smtplib wraps read timeouts
    if isinstance(exc, TimeoutError) or timed_out:
        return DeliveryOutcome.retry(f"{where} did not answer within {cfg.timeout_seconds:g}s")
    if isinstance(exc, smtplib.SMTPAuthenticationError):
        # The login, not the message, was refused: every message of this channel would fail
        # the same way until its username or password is fixed, so each is kept for a retry
        # (the deliverer holds the channel's other messages back) instead of given up at once.
        reply = _reply(exc.smtp_code, exc.smtp_error)
        return DeliveryOutcome.retry(
            f"{where} refused the login of {cfg.username!r} ({reply}): check the channel's "
            "username and password"
        )
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        codes = [code for code, _ in exc.recipients.values()]
        replies = "; ".join(f"{r}: {_reply(c, t)}" for r, (c, t) in exc.recipients.items())
        if all(400 <= code < 500 for code in codes):
            return DeliveryOutcome.retry(f"{where} deferred every recipient: {replies}")
        return DeliveryOutcome.dead(f"{where} refused every recipient: {replies}")
    if isinstance(exc, smtplib.SMTPResponseException):
        reply = _reply(exc.smtp_code, exc.smtp_error)
        if 500 <= exc.smtp_code < 600:
            return DeliveryOutcome.dead(f"{where} rejected the message permanently: {reply}")
        return DeliveryOutcome.retry(f"{where} answered {reply}")
    if isinstance(exc, smtplib.SMTPNotSupportedError):
        return DeliveryOutcome.dead(f"{where} does not support what the config asks: {exc}")
    if isinstance(exc, smtplib.SMTPServerDisconnected):
        return DeliveryOutcome.retry(f"{where} closed the connection: {exc}")
    if isinstance(exc, ssl.SSLCertVerificationError):
        return DeliveryOutcome.dead(
            f"TLS certificate of {where} not trusted ({exc.verify_message}); set ca_file"
        )
    if isinstance(exc, ConnectionRefusedError):
        return DeliveryOutcome.retry(f"connection refused by {where}: is the SMTP server up?")
    return DeliveryOutcome.retry(f"cannot talk to {where}: {type(exc).__name__}: {exc}")
