"""How alerts read where an analyst sees them: the listing, the API rows and the messages.

Alerts go through the real alert stage on a real store into the outbox; the queued messages are
rendered as the email and file channels render them. The findings are invented input (the
frame the detect stage hands over), not check values.
"""

from __future__ import annotations

from sqlalchemy import Engine

from aftercast.alerts.listing import alert_rows
from aftercast.alerts.stage import apply_findings
from aftercast.alerts.wording import summary_line
from aftercast.config import Config
from aftercast.notify.base import AlertLine, Notification
from aftercast.notify.render import render_html, render_subject, render_text
from aftercast.periods import to_iso
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.servers import free_port
from tests.test_alerts_support import DAY, START, findings, mail_channel, outbox, seed

NOW = START + 22 * DAY
RAW, ADJUSTED = 2.5e-5, 3.1e-3  # one coverage test's p-value and its fleet-adjusted value


def store(url: str, **rule: object) -> tuple[Engine, Config]:
    config = make_config(
        url,
        channels=[{"name": "local", "type": "file", "path": "unused.jsonl"}],
        rules=[{"detection": "coverage_low", "raise_after": 1, "clear_after": 1, **rule}],
    )
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, {"store-17": {}}, days=7)
    return engine, config


# The `window` evidence as the detect stage writes it (detect.findings._window_evidence).
WINDOW_28_DAYS = {
    "name": "recent",
    "start": "2024-04-25T00:00:00Z",
    "end": "2024-05-23T00:00:00Z",
    "targets": 28,
}
WINDOW_60_POINTS = {"name": "recent", "points": 60, "end": "2024-05-23T00:00:00Z", "targets": 60}


def coverage_finding(
    engine: Engine, flagged: bool = True, window: dict[str, object] | None = None
) -> object:
    evidence = {
        "coverage": 0.55,
        "level": 80,
        "pairs": 40,
        "statistic": -3.2,
        "p_value": RAW,
        "p_adjusted": ADJUSTED,
        "suggested_fix": "widen the 80% intervals' half-width by a factor of 1.9",
        "window": window or WINDOW_28_DAYS,
    }
    # The findings frame's p_value is the adjusted one (alerts.findings.cycle_findings).
    row = {"series": "store-17", "p_value": ADJUSTED, "flagged": flagged, "evidence": evidence}
    return findings(engine, [row])


def messages(engine: Engine) -> list[Notification]:
    return [Notification.from_json(text) for text in outbox(engine)["payload"]]


def test_adjusted_p_is_named_so_in_messages_listing_and_api_rows(sqlite_url: str) -> None:
    engine, config = store(sqlite_url)
    apply_findings(engine, config, coverage_finding(engine), 1, NOW)
    (message,) = messages(engine)
    text = render_text(message)
    assert "(adjusted p = 0.0031)" in text  # the sentence quotes the adjusted value as such
    assert "adjusted p 0.0031" in text and "raw p 2.50e-05" in text
    assert "(p = " not in text and "p value" not in text
    with engine.connect() as connection:
        (row,) = alert_rows(connection)
    assert row["p_adjusted"] == ADJUSTED and "p_value" not in row
    assert row["evidence"]["p_value"] == RAW and row["evidence"]["p_adjusted"] == ADJUSTED
    assert "adjusted p = 0.0031" in row["summary"]


def test_subject_names_the_alert_with_the_smallest_adjusted_p() -> None:
    def line(series: str, raw: float, adjusted: float) -> AlertLine:
        evidence = {"p_value": raw, "p_adjusted": adjusted}
        return AlertLine(series, "m", "1", "bias", "raised", "warning", "2024-05-01T00:00:00Z",
                         "s", evidence)  # fmt: skip

    # Two-level FDR can adjust a smaller raw p-value to a larger adjusted one (another family).
    alerts = [line("small-raw", 1e-7, 0.04), line("small-adjusted", 1e-5, 0.002)]
    n = Notification("ntf", "digest", "r", "c", "2024-05-01T00:00:00Z", alerts)
    assert "small-adjusted/m" in render_subject(n) and "small-raw" not in render_subject(n)


def test_the_evidence_window_reads_as_words(sqlite_url: str) -> None:
    engine, config = store(sqlite_url)
    apply_findings(engine, config, coverage_finding(engine), 1, NOW)
    text = render_text(messages(engine)[0])
    assert "Window: targets of the last 28 days (2024-04-25T00:00:00Z to 2024-05-23T00:00:00Z)" in (
        text
    )
    assert "recent" not in text.replace("recent forecasts", "") and "'name'" not in text
    engine, config = store(sqlite_url.replace(".db", "-points.db"))
    apply_findings(engine, config, coverage_finding(engine, window=WINDOW_60_POINTS), 1, NOW)
    message = messages(engine)[0]
    assert "Window: the 60 latest targets (up to 2024-05-23T00:00:00Z)" in render_text(message)
    assert "window: the 60 latest targets" in render_html(message)


def test_a_cleared_message_says_when_and_suggests_no_fix(sqlite_url: str) -> None:
    engine, config = store(sqlite_url)
    apply_findings(engine, config, coverage_finding(engine), 1, NOW)
    apply_findings(engine, config, coverage_finding(engine, flagged=False), 2, NOW + DAY)
    raised, cleared = messages(engine)
    assert (raised.kind, cleared.kind) == ("digest", "cleared")
    assert "Suggested fix: widen" in render_text(raised)  # the raise still carries it
    text, html = render_text(cleared), render_html(cleared)
    when = to_iso(NOW + DAY)  # the cycle that found it recovered
    assert f"Cleared: {when} (open since {to_iso(NOW)})" in text
    assert f"cleared {when}" in html
    assert "Suggested fix" not in text and "Suggested fix" not in html and "widen" not in text
    assert cleared.alerts[0].cleared_at == when and raised.alerts[0].cleared_at is None


def test_the_digest_chart_caption_names_the_horizon_it_shows(sqlite_url: str) -> None:
    config = make_config(
        sqlite_url,
        channels=[mail_channel(free_port())],  # only email draws charts; nothing is sent here
        rules=[{"detection": "coverage_low", "raise_after": 1}],
    )
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, {"store-17": {}}, days=21)  # forecasts one day ahead: horizon 1
    rows = [{"series": "store-17", "horizon": "1"}, {"series": "store-17", "horizon": "all"}]
    apply_findings(engine, config, findings(engine, rows), 1, NOW)
    (message,) = messages(engine)
    assert sorted((c.bucket, c.horizon) for c in message.charts) == [("1", 1), ("all", 1)]
    html = render_html(message, inline_charts=True)
    assert "store-17 / shop-planner, horizon 1: actuals against the 80% band" in html
    assert "store-17 / shop-planner, all horizons (drawn: horizon 1): actuals" in html


def test_a_p_value_that_underflowed_is_not_printed_as_zero() -> None:
    """scipy's exact binomial tail underflows to 0.0 for extreme counts (here 0 hits of 2,000 at
    95%: 0.05**2000 is far below the smallest double); the message must not claim p = 0."""
    from scipy.stats import binomtest

    p = binomtest(0, 2000, 0.95).pvalue
    assert p == 0.0  # scipy.stats.binomtest, the test aftercast's coverage check uses
    sentence = summary_line("coverage_low", {"coverage": 0.0, "level": 95}, None, p, 2000)
    assert sentence.endswith("(adjusted p < 1e-300).") and "p = 0" not in sentence
    evidence = {"p_value": p, "p_adjusted": p}
    alert = AlertLine("s", "m", "1", "coverage_low", "raised", "critical",
                      "2024-05-01T00:00:00Z", sentence, evidence)  # fmt: skip
    text = render_text(Notification("ntf", "digest", "r", "c", "2024-05-01T00:00:00Z", [alert]))
    assert "adjusted p < 1e-300" in text and "raw p < 1e-300" in text
