"""Delivery from the outbox through real receivers on loopback, retries, crashes and secrets.

Signatures are verified with the `standardwebhooks` package's own `Webhook.verify`; the retry
schedule is checked against the config contract (`delivery.backoff_seconds`: the first retry
delay, doubling each attempt; the +/-20% jitter is ours, jittered exponential backoff being
common practice); the crash test kills a real deliverer process with SIGKILL (POSIX signal 9,
which it cannot catch) while the receiver holds its request open.
"""

from __future__ import annotations

import io
import json
import logging
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from sqlalchemy import Engine
from standardwebhooks import Webhook

from aftercast.alerts.stage import apply_findings
from aftercast.cli import main
from aftercast.config import Config, load_config
from aftercast.logs import configure_logging
from aftercast.notify.deliver import deliver_due
from aftercast.periods import to_iso
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.servers import LOOPBACK, HttpRecorder, SmtpRecorder, free_port
from tests.test_alerts_support import DAY, START, findings, mail_channel, outbox, seed

SECRET = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw"  # "whsec_" + base64, the Standard Webhooks form
NOW = START + 22 * DAY
ROOT = Path(__file__).resolve().parents[1]


def hook(url: str) -> dict[str, Any]:
    return {"name": "ops-hook", "type": "webhook", "url": url, "secret": SECRET}


def queue_one(url: str, channels: list[dict[str, Any]], **delivery: Any) -> tuple[Engine, Config]:
    """A store with one raised alert whose notification waits in the outbox."""
    config = make_config(
        url,
        channels=channels,
        delivery=delivery,
        rules=[{"detection": "coverage_low", "raise_after": 1, "remind_every_hours": 0}],
    )
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, {"store-17": {"team": "planning"}}, days=7)
    apply_findings(engine, config, findings(engine, [{"series": "store-17"}]), 1, NOW)
    return engine, config


@pytest.fixture
def receiver() -> Iterator[HttpRecorder]:
    with HttpRecorder(script=[503, 503, 503]) as server:
        yield server


def test_refused_three_times_then_accepted_arrives_exactly_once(
    store_url: str, receiver: HttpRecorder
) -> None:
    engine, config = queue_one(store_url, [hook(receiver.url())], backoff_seconds=30)
    clock = int(time.time())
    delays = []
    for _ in range(3):
        report = deliver_due(engine, config, now=clock)
        assert report.retrying == 1 and "503" in report.failures[0]
        row = outbox(engine).iloc[0]
        delays.append(int(row["due_at"]) - clock)
        assert deliver_due(engine, config, now=int(row["due_at"]) - 1).attempted == 0  # not yet
        clock = int(row["due_at"])
    # Contract: the first retry after backoff_seconds, doubling each attempt (+/-20% jitter).
    for attempt, delay in enumerate(delays):
        nominal = 30 * 2**attempt
        assert 0.8 * nominal <= delay <= 1.2 * nominal + 1, (attempt, delays)
    assert deliver_due(engine, config, now=clock).delivered == 1
    assert deliver_due(engine, config, now=clock + 10 * DAY).attempted == 0  # never again
    statuses = [r.headers for r in receiver.requests]
    assert len(statuses) == 4
    ids = {h["webhook-id"] for h in statuses}
    assert len(ids) == 1  # the same idempotency key on every attempt
    for request in receiver.requests:  # every attempt is signed, and verifies
        Webhook(SECRET).verify(request.body, request.headers)
    row = outbox(engine).iloc[0]
    assert (row["status"], int(row["attempts"])) == ("delivered", 4)
    assert row["notification_id"] == ids.pop()


def channel_log(caplog: pytest.LogCaptureFixture) -> list[str]:
    return [m for r in caplog.records if "channel 'ops-hook'" in (m := r.getMessage())]


def test_refused_for_good_is_dead_after_max_attempts_and_shows(
    store_url: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level(logging.INFO)
    with HttpRecorder(default_status=500) as server:
        engine, config = queue_one(store_url, [hook(server.url())], max_attempts=3)
        clock = int(time.time())
        for _ in range(5):
            deliver_due(engine, config, now=clock)
            clock += 10 * DAY
        assert len(server.requests) == 3
    row = outbox(engine).iloc[0]
    assert row["status"] == "dead" and "gave up after 3 attempts" in row["detail"]
    # The channel's own log line says what the outbox did: two retries, then given up.
    lines = channel_log(caplog)
    assert [line.split(": ", 1)[1].split(" (")[0] for line in lines] == ["retry", "retry", "dead"]
    assert "dead (gave up after 3 attempts: " in lines[2] and "HTTP 500" in lines[2]
    path = tmp_path / "c.yaml"
    path.write_text(f"store:\n  url: {store_url}\n")
    assert main(["--config", str(path), "alerts", "notifications"]) == 0
    out = capsys.readouterr().out
    assert "dead" in out and "gave up after 3 attempts" in out and "1 dead" in out
    # A dead message is never tried again: no "next" time, though the row keeps its last due_at.
    assert row["due_at"] is not None and "next" not in out
    assert f"given up {to_iso(int(row['last_attempt_at']))}" in out
    assert main(["--config", str(path), "alerts", "notifications", "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert [(n["status"], n["attempts"], n["due_at"]) for n in listed] == [("dead", 3, None)]


def test_one_allowed_attempt_is_given_up_in_the_singular(
    store_url: str, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO)
    with HttpRecorder(default_status=503) as server:
        engine, config = queue_one(store_url, [hook(server.url())], max_attempts=1)
        assert deliver_due(engine, config, now=int(time.time())).dead == 1
    detail = str(outbox(engine).iloc[0]["detail"])
    assert detail.startswith("gave up after 1 attempt: ") and "HTTP 503" in detail
    [line] = channel_log(caplog)
    assert line.endswith(f"dead ({detail})") and "retry" not in line


def test_a_dead_notification_retried_by_hand_goes_out_with_its_id(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "c.yaml"
    path.write_text(f"store:\n  url: {store_url}\n")
    with HttpRecorder(default_status=404) as server:  # a wrong URL: dead at once
        engine, config = queue_one(store_url, [hook(server.url())], max_attempts=3)
        deliver_due(engine, config)
        key = str(outbox(engine)["notification_id"].iloc[0])
        assert outbox(engine)["status"].tolist() == ["dead"]
        capsys.readouterr()
        assert main(["--config", str(path), "alerts", "notifications"]) == 0
        assert "outbox retry" in capsys.readouterr().out  # the listing says how
        server.default_status = 200  # the cause is fixed
        assert main(["--config", str(path), "outbox", "retry", key, "--by", "ana"]) == 0
        assert f"re-queued 1 dead notification(s), due now: {key}" in capsys.readouterr().out
        row = outbox(engine).iloc[0]
        assert (row["status"], int(row["attempts"]), row["detail"]) == (
            "pending",
            0,
            "re-queued by ana",
        )
        assert deliver_due(engine, config).delivered == 1
        assert [r.headers["webhook-id"] for r in server.requests] == [key, key]
    assert outbox(engine)["status"].tolist() == ["delivered"]
    assert main(["--config", str(path), "outbox", "retry", "--all-dead"]) == 0
    assert "no dead notifications" in capsys.readouterr().out
    for wrong in (["ntf_nope"], [key], []):  # unknown, not dead, nothing named
        assert main(["--config", str(path), "outbox", "retry", *wrong]) != 0
        seen = capsys.readouterr()
        assert len((seen.out + seen.err).strip().splitlines()) == 1


def test_permanent_refusal_is_dead_at_once(store_url: str) -> None:
    # RFC 9110 15.5: a 4xx other than 408/429 says the request itself is wrong; retrying won't help.
    with HttpRecorder(default_status=404) as server:
        engine, config = queue_one(store_url, [hook(server.url())])
        report = deliver_due(engine, config)
        assert (report.dead, len(server.requests)) == (1, 1)


def test_dead_smtp_server_is_retried_and_its_failure_shows(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    down = mail_channel(free_port())  # nothing listens there
    with HttpRecorder() as server:
        engine, config = queue_one(store_url, [down, hook(server.url())])
        report = deliver_due(engine, config)  # returns normally: a dead server is an outcome
        assert (report.delivered, report.retrying) == (1, 1)
        assert len(server.requests) == 1  # the webhook still got its message
    assert "connection refused" in report.failures[0]
    path = tmp_path / "c.yaml"
    path.write_text(f"store:\n  url: {store_url}\n")
    assert main(["--config", str(path), "alerts", "notifications"]) == 0
    out = capsys.readouterr().out
    assert "1 retrying" in out and "connection refused" in out


def test_failing_channel_holds_back_the_rest_of_its_batch(store_url: str) -> None:
    config = make_config(
        store_url,
        channels=[mail_channel(free_port())],
        rules=[{"detection": "coverage_low", "raise_after": 1, "remind_every_hours": 0}],
    )
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, {"s1": {}, "s2": {}}, days=3)
    for step, key in enumerate(("s1", "s2")):  # two cycles, so two notifications
        apply_findings(engine, config, findings(engine, [{"series": key}]), step, NOW + step)
    deliver_due(engine, config)
    rows = outbox(engine)
    # Only the first was tried; the second was handed back without counting an attempt.
    assert rows["attempts"].tolist() == [1, 0]
    assert rows["claimed_by"].isna().all()


@pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS")
def test_refused_smtp_login_holds_the_channel_back_and_says_why(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with SmtpRecorder(logins={"alerts": "the-right-one"}) as smtp:
        wrong = mail_channel(smtp.port, username="alerts", password="not-the-right-one")
        with HttpRecorder() as server:
            config = make_config(
                store_url,
                channels=[wrong, hook(server.url())],
                rules=[{"detection": "coverage_low", "raise_after": 1, "remind_every_hours": 0}],
            )
            engine = make_engine(config.store.url)
            migrate(engine)
            seed(engine, config, {"s1": {}, "s2": {}, "s3": {}}, days=3)
            for step, key in enumerate(("s1", "s2", "s3")):  # three cycles: three per channel
                apply_findings(engine, config, findings(engine, [{"series": key}]), step, NOW)
            report = deliver_due(engine, config)
            assert len(server.requests) == 3  # the other channel is untouched
    assert smtp.messages == []
    mail = outbox(engine).query("channel == 'oncall-mail'")
    # One attempt told the reason; the other two wait unattempted, none is given up.
    assert sorted(mail["attempts"]) == [0, 0, 1] and set(mail["status"]) == {"pending"}
    assert (report.delivered, report.retrying, report.dead) == (3, 1, 0)
    path = tmp_path / "c.yaml"
    path.write_text(f"store:\n  url: {store_url}\n")
    assert main(["--config", str(path), "alerts", "notifications"]) == 0
    out = capsys.readouterr().out
    assert "refused the login of 'alerts' (535" in out and "username and password" in out


DELIVERER = """
import sys
from aftercast.config import load_config
from aftercast.notify.deliver import deliver_due
from aftercast.store.db import make_engine
config = load_config(sys.argv[1])
deliver_due(make_engine(config.store.url), config, worker="doomed")
"""


def test_deliverer_killed_between_send_and_mark_loses_nothing(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'aftercast.db'}"
    with HttpRecorder(hang_seconds=60) as server:
        path = tmp_path / "c.yaml"
        path.write_text(
            f"store:\n  url: {url}\nchannels:\n  - name: ops-hook\n    type: webhook\n"
            f"    url: {server.url()}\n    secret: {SECRET}\n    timeout_seconds: 120\n"
            "delivery:\n  lease_seconds: 30\n"
            "rules:\n  - detection: coverage_low\n    raise_after: 1\n"
        )
        config = load_config(str(path))
        engine, _ = queue_one(url, [hook(server.url())])
        env = {**os.environ, "PYTHONPATH": str(ROOT / "src")}
        child = subprocess.Popen([sys.executable, "-c", DELIVERER, str(path)], env=env)
        try:
            deadline = time.monotonic() + 60
            while not server.requests and time.monotonic() < deadline:
                time.sleep(0.05)
            assert server.requests, "the deliverer never sent"
            child.send_signal(signal.SIGKILL)  # sent, not yet marked
        finally:
            child.kill()
            child.wait(timeout=30)
        assert child.returncode == -signal.SIGKILL
        row = outbox(engine).iloc[0]
        assert (row["status"], row["claimed_by"]) == ("pending", "doomed")
        server.hang_seconds = 0
        assert deliver_due(engine, config).attempted == 0  # the lease still holds
        report = deliver_due(engine, config, now=int(row["claimed_until"]))
        assert report.delivered == 1
    first, second = server.requests
    # At worst a repeat, with the same id, so the receiver can drop it.
    assert first.headers["webhook-id"] == second.headers["webhook-id"] == row["notification_id"]
    assert json.loads(first.body) == json.loads(second.body)
    Webhook(SECRET).verify(second.body, second.headers)
    assert outbox(engine).iloc[0]["status"] == "delivered"


PASSWORD = "pw-Zq81-never-shown"
TOKEN = "tok-5f2c-never-shown"


@pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS")
def test_secrets_never_reach_logs_output_or_the_store(
    store_url: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("AC_SMTP_PASSWORD", PASSWORD)
    monkeypatch.setenv("AC_HOOK_SECRET", SECRET)
    monkeypatch.setenv("AC_HOOK_TOKEN", TOKEN)
    log = io.StringIO()
    handler = configure_logging("DEBUG", log)
    smtp = SmtpRecorder(logins={"alerts": "a-different-password"}).start()  # login refused
    try:
        with HttpRecorder(script=[503], reply_body=f"token {TOKEN} rejected") as server:
            path = tmp_path / "c.yaml"
            path.write_text(
                f"store:\n  url: {store_url}\nchannels:\n"
                f"  - {{name: mail, type: email, host: {LOOPBACK}, port: {smtp.port},"
                " security: none, sender: a@example.test, to: [b@example.test],"
                " username: alerts, password: '${AC_SMTP_PASSWORD}'}\n"
                f"  - {{name: hook, type: webhook, url: '{server.url()}',"
                " secret: '${AC_HOOK_SECRET}',"
                " headers: {Authorization: 'Bearer ${AC_HOOK_TOKEN}'}}\n"
                "rules:\n  - {detection: coverage_low, raise_after: 1}\n"
            )
            config = load_config(str(path))
            engine = make_engine(config.store.url)
            migrate(engine)
            seed(engine, config, {"store-17": {}}, days=3)
            apply_findings(engine, config, findings(engine, [{"series": "store-17"}]), 1, NOW)
            deliver_due(engine, config)
            deliver_due(engine, config, now=int(time.time()) + DAY)
            assert len(server.requests) == 2  # refused (503, echoing the token), then taken
            for args in (
                ["alerts", "notifications"],
                ["alerts", "notifications", "--json", "--delivered"],
                ["alerts", "history", "1"],
            ):
                assert main(["--config", str(path), *args]) == 0
            assert main(["--config", str(path), "rules", "check", "--json"]) == 0
    finally:
        smtp.stop()
        logging.getLogger().removeHandler(handler)
    rows = outbox(engine)
    assert set(rows["status"]) == {"pending", "delivered"}  # login refused (535), hook done
    seen = capsys.readouterr()
    stored = rows.to_json()
    for secret in (PASSWORD, SECRET, SECRET.removeprefix("whsec_"), TOKEN):
        for where, text in (("log", log.getvalue()), ("output", seen.out + seen.err)):
            assert secret not in text, where
        assert secret not in stored
    assert "token *** rejected" in log.getvalue()  # the receiver's echo, scrubbed


def test_dead_smtp_server_does_not_stop_the_cycle(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    port = free_port()  # nothing listens there
    engine, _ = queue_one(
        store_url,
        [mail_channel(port)],
    )
    path = tmp_path / "c.yaml"
    path.write_text(
        f"store:\n  url: {store_url}\nchannels:\n  - {{name: oncall-mail, type: email, "
        f"host: {LOOPBACK}, port: {port}, security: none, sender: aftercast@example.test, "
        "to: [oncall@example.test]}\n"
    )
    capsys.readouterr()
    now = pd.Timestamp(NOW + 3600, unit="s", tz="UTC").isoformat()
    assert main(["--config", str(path), "cycle", "--json", "--now", now]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["stages"]["notify"] >= 0  # the cycle ran to its last stage
    assert (report["delivery"]["attempted"], report["delivery"]["retrying"]) == (1, 1)
    assert "connection refused" in report["delivery"]["failures"][0]
    row = outbox(engine).iloc[0]
    assert (row["status"], int(row["attempts"])) == ("pending", 1)
