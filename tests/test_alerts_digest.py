"""Grouping and routing: per route and cycle, one digest per channel, capped with "and N more".

Received through real servers on loopback: mail as aiosmtpd got it, read with the standard
library's RFC 5322 / MIME parser; the webhook's CloudEvent (CloudEvents 1.0 JSON format) as an
http.server receiver got it, its signature checked with `standardwebhooks`' own verifier; the
HTML checked with the standard library's HTML tokenizer; PNG parts by the PNG signature (PNG
specification, section 5.2).
"""

from __future__ import annotations

import json
from email.message import EmailMessage
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import quote

from standardwebhooks import Webhook

from aftercast.alerts.stage import apply_findings
from aftercast.notify.deliver import deliver_due
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.servers import NASTY_SERIES_ID, HttpRecorder, SmtpRecorder
from tests.test_alerts_support import DAY, START, findings, mail_channel, outbox, seed

SECRET = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw"
NOW = START + 22 * DAY
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def channels(smtp: SmtpRecorder, hook: HttpRecorder, folder: Path) -> list[dict[str, object]]:
    return [
        mail_channel(smtp.port, "planning-mail", to=["planning@example.test"]),
        {"name": "ops-hook", "type": "webhook", "url": hook.url(), "secret": SECRET},
        {"name": "everything", "type": "file", "path": str(folder / "alerts.jsonl")},
    ]


def _body(message: EmailMessage, subtype: str) -> str:
    """The text of the message's `subtype` (plain or html) part; fails if it has none."""
    part = message.get_body(preferencelist=(subtype,))
    assert part is not None, f"no text/{subtype} part"
    return str(part.get_content())


def test_three_hundred_series_fifty_alerts_three_messages(tmp_path: Path) -> None:
    keys = [f"shop-{i:03d}" for i in range(300)]
    labels = {k: {"team": "planning" if i < 200 else "ops"} for i, k in enumerate(keys)}
    planning, ops = keys[:45], keys[200:205]
    with SmtpRecorder() as smtp, HttpRecorder() as hook:
        config = make_config(
            f"sqlite:///{tmp_path / 'a.db'}",
            channels=channels(smtp, hook, tmp_path),
            routes=[
                {"match": {"team": "planning"}, "channels": ["planning-mail"]},
                {"match": {"team": "ops"}, "channels": ["ops-hook"]},
                {"name": "audit", "channels": ["everything"]},  # no match: every alert
            ],
            rules=[{"detection": "coverage_low", "raise_after": 1}],
            delivery={"digest_max_alerts": 40, "charts_per_digest": 3},
            web={"base_url": "http://aftercast.example.test"},
        )
        engine = make_engine(config.store.url)
        migrate(engine)
        seed(engine, config, labels, days=14)
        rows = [{"series": k, "severity": "warning", "p_value": 0.01} for k in planning + ops]
        rows[7] = {"series": planning[7], "severity": "critical", "p_value": 1e-6}  # the worst
        report = apply_findings(engine, config, findings(engine, rows), 1, NOW)
        assert (report.raised, report.notifications) == (50, 3)
        assert deliver_due(engine, config).delivered == 3
        assert len(smtp.messages) == 1 and len(hook.requests) == 1

    mail = smtp.messages[0].message
    # Subject for triage: severity first, the count, then the worst alert.
    assert mail["Subject"].startswith(f"[aftercast] CRITICAL 45 alerts - worst: {planning[7]}/")
    text = _body(mail, "plain")
    assert text.count("Where: ") == 40
    assert "... and 5 more alerts not shown here." in text
    assert text.index(planning[7]) < text.index(planning[0])  # worst first
    images = [p for p in mail.walk() if p.get_content_type() == "image/png"]
    assert len(images) == 3 and all(p.get_content().startswith(PNG_SIGNATURE) for p in images)

    request = hook.requests[0]
    event = Webhook(SECRET).verify(request.body, request.headers)
    assert event["type"] == "org.aftercast.alert.digest"
    assert sorted(a["series_id"] for a in event["data"]["alerts"]) == ops
    assert {a["labels"]["team"] for a in event["data"]["alerts"]} == {"ops"}
    assert event["data"]["dashboard_url"] == "http://aftercast.example.test/"  # several series

    lines = (tmp_path / "alerts.jsonl").read_text().splitlines()
    assert len(lines) == 1
    audit = json.loads(lines[0])["data"]
    assert (len(audit["alerts"]), audit["more"], audit["route"]) == (40, 10, "audit")
    links = outbox(engine)[["channel", "alert_count"]].values.tolist()
    assert sorted(links) == [["everything", 50], ["ops-hook", 5], ["planning-mail", 45]]


class _Tags(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def test_markup_in_a_series_id_is_escaped_in_the_html(tmp_path: Path) -> None:
    with SmtpRecorder() as smtp, HttpRecorder() as hook:
        config = make_config(
            f"sqlite:///{tmp_path / 'a.db'}",
            channels=channels(smtp, hook, tmp_path)[:1],
            rules=[{"detection": "coverage_low", "raise_after": 1}],
            web={"base_url": "http://aftercast.example.test/"},
        )
        engine = make_engine(config.store.url)
        migrate(engine)
        seed(engine, config, {NASTY_SERIES_ID: {"team": "<b>planning</b>"}}, days=7)
        apply_findings(engine, config, findings(engine, [{"series": NASTY_SERIES_ID}]), 1, NOW)
        deliver_due(engine, config)
    html = _body(smtp.messages[0].message, "html")
    parser = _Tags()
    parser.feed(html)
    # HTML tokenizer: the markup arrived as text, never as elements.
    assert "script" not in parser.tags and "b" not in parser.tags
    assert NASTY_SERIES_ID in "".join(parser.text)
    assert "&lt;script&gt;" in html
    # One series: the link goes to its page, the id percent-encoded (RFC 3986 section 2.1).
    page = "http://aftercast.example.test/series/" + quote(NASTY_SERIES_ID, safe="")
    text = _body(smtp.messages[0].message, "plain")
    assert f"Dashboard: {page}" in text
