"""The alert lifecycle end to end: findings in, messages out of a real SMTP server on loopback.

What is checked is the alerting behaviour the design asks for (design.md, "alerts: rules ->
lifecycle with hysteresis, dedup, grouping, routing, snooze, recovery"): one message when an
alert is raised after K consecutive cycles, none while it merely stays raised, one when it
clears after J quiet cycles; reminders at their interval, none once acknowledged; raises held
back while snoozed. Messages are counted and read as an aiosmtpd server received them and as
the standard library's RFC 5322 parser reads them; every transition is read back from the store.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy import Engine

from aftercast.alerts.stage import apply_findings
from aftercast.alerts.store import set_attention
from aftercast.cli import main
from aftercast.config import Config
from aftercast.notify.deliver import deliver_due
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.servers import SmtpRecorder
from tests.test_alerts_support import (
    DAY,
    START,
    alerts,
    findings,
    mail_channel,
    outbox,
    seed,
    transitions,
)

NOW = START + 22 * DAY
FILE_CHANNEL = {"name": "local", "type": "file", "path": "unused.jsonl"}


@pytest.fixture
def smtp() -> Iterator[SmtpRecorder]:
    with SmtpRecorder() as server:
        yield server


def mail_config(url: str, port: int, **rule: Any) -> Config:
    return make_config(
        url,
        channels=[mail_channel(port)],
        rules=[{"detection": "coverage_low", "remind_every_hours": 0, **rule}],
    )


def store(config: Config, labels: dict[str, dict[str, str]] | None = None) -> Engine:
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, labels or {"store-17": {"team": "planning"}})
    return engine


def run(engine: Engine, config: Config, met: list[bool], start: int = NOW, step: int = DAY):
    """One alert stage and one delivery pass per entry of `met`, a cycle `step` apart."""
    flagged = findings(engine, [{"series": "store-17"}])
    for index, trips in enumerate(met):
        apply_findings(engine, config, flagged if trips else flagged.iloc[0:0], index, start)
        deliver_due(engine, config)
        start += step


def test_exactly_one_message_per_transition(store_url: str, smtp: SmtpRecorder) -> None:
    config = mail_config(store_url, smtp.port, raise_after=2, clear_after=2)
    engine = store(config)
    # met, met (raised), met, quiet, met (still raised), quiet, quiet (cleared)
    run(engine, config, [True, True, True, False, True, False, False])
    subjects = [m.message["Subject"] for m in smtp.messages]
    assert len(subjects) == 2, subjects
    assert subjects[0].startswith("[aftercast] CRITICAL store-17/shop-planner")
    assert subjects[1].startswith("[aftercast] CLEARED store-17/shop-planner")
    # The idempotency key travels in the mail (RFC 5322 header) and matches the outbox row.
    sent = outbox(engine)
    assert sorted(m.message["X-Aftercast-Notification-Id"] for m in smtp.messages) == sorted(
        sent["notification_id"]
    )
    assert sent["status"].tolist() == ["delivered", "delivered"]
    moves = transitions(engine)
    assert moves["event"].tolist() == ["opened", "raised", "cleared"]
    assert moves["actor"].unique().tolist() == ["cycle"]
    # Each transition keeps its time on the evaluation clock and the evidence behind it.
    assert moves["at"].tolist() == [NOW, NOW + DAY, NOW + 6 * DAY]
    assert '"coverage": 0.55' in moves["evidence"].iloc[1]
    assert len(alerts(engine)) == 1  # one fingerprint, one alert


def test_pending_alert_that_lapses_sends_nothing(store_url: str, smtp: SmtpRecorder) -> None:
    config = mail_config(store_url, smtp.port, raise_after=3, clear_after=1)
    engine = store(config)
    run(engine, config, [True, True, False])
    assert smtp.messages == []
    assert transitions(engine)["event"].tolist() == ["opened", "lapsed"]
    assert alerts(engine)["state"].tolist() == ["cleared"]


def test_raised_again_is_a_new_episode_of_the_same_alert(
    store_url: str, smtp: SmtpRecorder
) -> None:
    config = mail_config(store_url, smtp.port, raise_after=1, clear_after=1)
    engine = store(config)
    run(engine, config, [True, False, True])
    kinds = [m.message["Subject"].split()[1] for m in smtp.messages]
    assert kinds == ["CRITICAL", "CLEARED", "CRITICAL"]
    rows = alerts(engine)
    assert len(rows) == 1 and rows["episode"].tolist() == [2]
    assert transitions(engine)["event"].tolist() == ["raised", "cleared", "raised"]


def test_reminders_stop_once_acknowledged(
    store_url: str, smtp: SmtpRecorder, capsys: pytest.CaptureFixture[str], tmp_path: Any
) -> None:
    config = mail_config(store_url, smtp.port, remind_every_hours=12, raise_after=1, clear_after=1)
    engine = store(config)
    hours = 3600
    run(engine, config, [True, True, True], step=6 * hours)  # raised at 0 h, reminded at 12 h
    assert [m.message["Subject"].split()[1] for m in smtp.messages] == ["CRITICAL", "REMINDER"]
    path = tmp_path / "c.yaml"
    path.write_text(f"store:\n  url: {store_url}\n")
    alert_id = int(alerts(engine)["id"].iloc[0])
    assert main(["--config", str(path), "alerts", "ack", str(alert_id), "--by", "alice"]) == 0
    assert "acknowledged 1 of 1" in capsys.readouterr().out
    run(engine, config, [True, True, True, False], start=NOW + 18 * hours, step=12 * hours)
    # No reminder after the acknowledgement; the recovery is still told.
    subjects = [m.message["Subject"].split()[1] for m in smtp.messages]
    assert subjects == ["CRITICAL", "REMINDER", "CLEARED"]
    ack = transitions(engine).query("event == 'acknowledged'")
    assert ack["actor"].tolist() == ["alice"]
    assert ack[["from_state", "to_state"]].values.tolist() == [["raised", "acknowledged"]]


def test_snoozed_raise_waits_for_the_snooze_to_end(
    store_url: str, smtp: SmtpRecorder, tmp_path: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    config = mail_config(store_url, smtp.port, raise_after=2, clear_after=5)
    engine = store(config)
    wall = int(time.time())
    run(engine, config, [True], start=wall)  # pending
    path = tmp_path / "c.yaml"
    path.write_text(f"store:\n  url: {store_url}\n")
    alert_id = str(int(alerts(engine)["id"].iloc[0]))
    assert main(["--config", str(path), "alerts", "snooze", alert_id, "--until", "2d"]) == 0
    capsys.readouterr()
    run(engine, config, [True], start=wall + DAY)  # raised while snoozed: held back
    assert smtp.messages == []
    assert alerts(engine)["state"].tolist() == ["raised"]
    run(engine, config, [True], start=wall + 3 * DAY)  # snooze over: the raise goes out now
    assert [m.message["Subject"].split()[1] for m in smtp.messages] == ["CRITICAL"]
    assert main(["--config", str(path), "alerts", "history", alert_id, "--json"]) == 0
    history = json.loads(capsys.readouterr().out)
    assert [(h["event"], h["to_state"]) for h in history] == [
        ("opened", "pending"),
        ("snoozed", "pending"),
        ("raised", "raised"),
    ]
    assert history[1]["evidence"]["until"] > wall + DAY  # when the snooze was to end
    assert main(["--config", str(path), "alerts", "unsnooze", "--series", "store-17"]) == 0
    assert "unsnoozed 1 of 1" in capsys.readouterr().out
    assert alerts(engine)["snoozed_until"].isna().all()


def test_without_channels_alerts_are_tracked_and_nothing_is_queued(store_url: str) -> None:
    config = make_config(store_url)
    engine = store(config)
    report = apply_findings(engine, config, findings(engine, [{"series": "store-17"}]), 1, NOW)
    assert report.notifications == 0
    # Default rule coverage_low raises after 2 cycles (rules.DEFAULT_RULES).
    apply_findings(engine, config, findings(engine, [{"series": "store-17"}]), 2, NOW + DAY)
    assert alerts(engine)["state"].tolist() == ["raised"]
    assert outbox(engine).empty


def test_a_raise_without_channels_is_announced_once_a_channel_exists(store_url: str) -> None:
    rule = {"detection": "coverage_low", "raise_after": 1, "remind_every_hours": 0}
    quiet = make_config(store_url, rules=[rule])
    engine = store(quiet)
    flagged = findings(engine, [{"series": "store-17"}])
    apply_findings(engine, quiet, flagged, 1, NOW)
    assert alerts(engine)["state"].tolist() == ["raised"] and outbox(engine).empty
    told = quiet.model_copy(
        update={"channels": make_config(store_url, channels=[FILE_CHANNEL]).channels}
    )
    apply_findings(engine, told, flagged, 2, NOW + DAY)  # still raised; now there is a channel
    apply_findings(engine, told, flagged, 3, NOW + 2 * DAY)  # told already: quiet
    sent = outbox(engine)
    assert sent["kind"].tolist() == ["digest"] and sent["channel"].tolist() == ["local"]
    assert "store-17" in sent["payload"].iloc[0]


def test_rule_thresholds_narrow_what_detection_flags(store_url: str) -> None:
    config = make_config(
        store_url,
        rules=[
            {"detection": "coverage_low", "max_p_value": 0.01, "min_points": 30, "raise_after": 1},
            {"detection": "bias", "match": {"team": "ops"}, "raise_after": 1},
        ],
    )
    engine = store(config, {"a": {"team": "planning"}, "b": {"team": "planning"}, "c": {}})
    rows = [
        {"series": "a", "p_value": 0.001},  # meets every threshold
        {"series": "b", "p_value": 0.02},  # adjusted p above the rule's 0.01
        {"series": "c", "p_value": 0.001, "evidence": {"n": 12}},  # too few points
        {"series": "a", "detection": "bias", "statistic": 6.0},  # bias rule is for team ops
        {"series": "a", "horizon": "2-7", "flagged": False},  # detection did not flag it
    ]
    apply_findings(engine, config, findings(engine, rows), 1, NOW)
    raised = alerts(engine).query("state == 'raised'")
    assert raised["fingerprint"].str.split("|").str[0].tolist() == ["coverage_low"]
    assert raised["horizon"].tolist() == ["1"] and raised["p_value"].tolist() == [0.001]


def test_a_reminder_due_within_a_minute_of_the_cycle_goes_now(
    store_url: str, smtp: SmtpRecorder
) -> None:
    config = mail_config(store_url, smtp.port, remind_every_hours=1, raise_after=1)
    engine = store(config)
    hour = 3600
    run(engine, config, [True], start=NOW)  # raised: first message
    # The next cycle fires 30 s before the hour is up (scheduler jitter): the reminder goes now.
    run(engine, config, [True], start=NOW + hour - 30)
    # Two minutes short of the next hour is too early: that reminder waits for the next cycle.
    run(engine, config, [True], start=NOW + 2 * hour - 30 - 120)
    assert outbox(engine)["kind"].tolist() == ["digest", "reminder"]
    run(engine, config, [True], start=NOW + 2 * hour - 30)
    assert outbox(engine)["kind"].tolist() == ["digest", "reminder", "reminder"]
    assert len(smtp.messages) == 3


def test_a_snooze_ending_within_a_minute_of_the_cycle_ends_with_it(
    store_url: str, smtp: SmtpRecorder
) -> None:
    config = mail_config(store_url, smtp.port, raise_after=2)
    engine = store(config)
    hour = 3600
    run(engine, config, [True], start=NOW)  # pending
    alert_id = int(alerts(engine)["id"].iloc[0])
    assert set_attention(engine, [alert_id], "snooze", "alice", NOW, until=NOW + 3 * hour) == 1
    run(engine, config, [True], start=NOW + hour)  # raised while snoozed: held back
    # Two minutes before the snooze ends is too early: the raise still waits.
    run(engine, config, [True], start=NOW + 3 * hour - 120)
    assert alerts(engine)["state"].tolist() == ["raised"] and smtp.messages == []
    # The next cycle fires 30 s before the snooze ends (scheduler jitter): the raise goes now.
    run(engine, config, [True], start=NOW + 3 * hour - 30)
    assert [m.message["Subject"].split()[1] for m in smtp.messages] == ["CRITICAL"]
    assert outbox(engine)["kind"].tolist() == ["digest"]
