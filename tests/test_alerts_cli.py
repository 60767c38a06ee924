"""The on-call analyst's path on the command line: list alerts, act on them by id.

`aftercast alerts` lists the lifecycle alerts the store holds (not the raw detection findings),
each with the id that `alerts ack ID` and `alerts snooze ID` take, so what an analyst sees is
what they can act on. Alerts are raised through the real alert stage on a real store.
"""

from __future__ import annotations

import json
import re
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import Engine, text

from aftercast.alerts.listing import alert_rows
from aftercast.alerts.stage import apply_findings
from aftercast.alerts.store import ALERT_LOCK_KEY, set_attention
from aftercast.cli import main
from aftercast.config import Config
from aftercast.store.db import make_engine, migrate
from tests.conftest import make_config
from tests.test_alerts_support import DAY, START, alerts, findings, seed

NOW = START + 22 * DAY
SERIES = [f"shop-{i:02d}" for i in range(12)]


def raised(url: str, tmp_path: Path) -> tuple[Engine, Config, Path]:
    """Twelve raised coverage alerts (so ids reach two digits) and a config file for the CLI."""
    config = make_config(url, rules=[{"detection": "coverage_low", "raise_after": 1}])
    engine = make_engine(config.store.url)
    migrate(engine)
    seed(engine, config, {key: {} for key in SERIES}, days=3)
    apply_findings(engine, config, findings(engine, [{"series": s} for s in SERIES]), 1, NOW)
    path = tmp_path / "aftercast.yaml"
    path.write_text(
        f"store:\n  url: {url}\nrules:\n  - detection: coverage_low\n    raise_after: 1\n"
    )
    return engine, config, path


def test_alerts_lists_lifecycle_alerts_by_id_and_ack_takes_one(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    engine, _, path = raised(store_url, tmp_path)
    capsys.readouterr()
    assert main(["--config", str(path), "alerts"]) == 0
    lines = [line for line in capsys.readouterr().out.splitlines() if "#" in line.split()[0]]
    stored = alerts(engine)
    assert len(lines) == len(stored) == 12
    shown = [int(line.split()[0].lstrip("#")) for line in lines]
    assert sorted(shown) == sorted(stored["id"].astype(int))
    # The id column is right-aligned: every state word starts in the same column.
    assert len({line.index(" raised ") for line in lines}) == 1
    assert any(len(str(i)) == 1 for i in shown) and any(len(str(i)) == 2 for i in shown)
    # The analyst acts on an id read off the listing.
    picked = next(line for line in lines if "shop-07 " in line)
    alert_id = picked.split()[0].lstrip("#")
    assert main(["--config", str(path), "alerts", "ack", alert_id, "--by", "ana"]) == 0
    capsys.readouterr()
    assert main(["--config", str(path), "alerts", "--json"]) == 0
    rows = {row["id"]: row for row in json.loads(capsys.readouterr().out)}
    assert rows[int(alert_id)]["state"] == "acknowledged"
    assert rows[int(alert_id)]["series_id"] == "shop-07"
    assert rows[int(alert_id)]["acknowledged_by"] == "ana"
    assert sum(row["state"] == "raised" for row in rows.values()) == 11
    assert main(["--config", str(path), "alerts"]) == 0
    acked = [line for line in capsys.readouterr().out.splitlines() if "ack by ana" in line]
    assert len(acked) == 1 and re.match(rf"\s*#{alert_id} acknowledged ", acked[0])


def test_alerts_findings_lists_what_detection_flagged(
    sqlite_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _, _, path = raised(sqlite_url, tmp_path)  # no detection cycle ran: no findings stored
    capsys.readouterr()
    assert main(["--config", str(path), "alerts", "findings"]) == 0
    assert capsys.readouterr().out.strip() == "no active findings"


def test_ack_waits_for_a_running_alert_stage(pg_url: str, tmp_path: Path) -> None:
    """An ack given while a cycle's alert stage holds its lock acts on what the stage leaves.

    The stage is played by a transaction that takes the stage's advisory lock and clears the
    alert; PostgreSQL reports the waiting ack in `pg_stat_activity` (wait_event_type 'Lock',
    wait_event 'advisory'; PostgreSQL documentation, "The Cumulative Statistics System").
    """
    engine, _, _ = raised(pg_url, tmp_path)
    alert_id = int(alerts(engine)["id"].iloc[0])
    done: list[int] = []
    with engine.connect() as stage:
        transaction = stage.begin()
        stage.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": ALERT_LOCK_KEY})
        stage.execute(text("UPDATE alerts SET state = 'cleared' WHERE id = :i"), {"i": alert_id})
        ack = threading.Thread(
            target=lambda: done.append(
                set_attention(engine, [alert_id], "acknowledge", "ana", NOW + DAY)
            )
        )
        ack.start()
        try:
            assert _waits_on_advisory_lock(engine), "the ack did not wait for the stage's lock"
            assert done == []
        finally:
            transaction.commit()
        ack.join(timeout=30)
    assert done == [0]  # the alert had cleared by then: nothing to acknowledge
    row = alerts(engine).set_index("id").loc[alert_id]
    assert row["state"] == "cleared" and pd.isna(row["acknowledged_by"])


def _waits_on_advisory_lock(engine: Engine) -> bool:
    query = text(
        "SELECT COUNT(*) FROM pg_stat_activity WHERE wait_event_type = 'Lock' "
        "AND wait_event = 'advisory' AND datname = current_database()"
    )
    for _ in range(200):
        with engine.connect() as connection:
            if connection.execute(query).scalar_one():
                return True
        time.sleep(0.05)
    return False


def test_snooze_until_a_time_or_for_a_duration(
    sqlite_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    engine, _, path = raised(sqlite_url, tmp_path)
    first, second = (str(i) for i in alerts(engine)["id"].iloc[:2])
    before = int(time.time())
    target = (before // 3600 + 72) * 3600  # a whole hour three days ahead
    stamp = datetime.fromtimestamp(target, UTC)  # written with the standard library's calendar
    written = stamp.strftime("%Y-%m-%dT%H:%MZ")
    assert main(["--config", str(path), "alerts", "snooze", first, "--until", written]) == 0
    assert main(["--config", str(path), "alerts", "snooze", second, "--until", "90 minutes"]) == 0
    after = int(time.time())
    assert f"until {stamp.strftime('%Y-%m-%dT%H:%M:%SZ')}" in capsys.readouterr().out
    until = alerts(engine).set_index("id")["snoozed_until"]
    assert until[int(first)] == target
    assert before + 5400 <= until[int(second)] <= after + 5400
    assert main(["--config", str(path), "alerts", "--json"]) == 0
    rows = {str(row["id"]): row for row in json.loads(capsys.readouterr().out)}
    assert rows[first]["snoozed"] and rows[second]["snoozed"]
    with engine.connect() as connection:  # two hours on, the 90-minute snooze has run out
        later = {str(r["id"]): r for r in alert_rows(connection, now=after + 7200)}
    assert later[first]["snoozed"] and not later[second]["snoozed"]
    # The same rule as a cycle's: a snooze ending within the slack after now is already over.
    end = int(until[int(second)])
    with engine.connect() as connection:
        near = {str(r["id"]): r["snoozed"] for r in alert_rows(connection, now=end - 30)}
        early = {str(r["id"]): r["snoozed"] for r in alert_rows(connection, now=end - 61)}
    assert (near[second], early[second]) == (False, True)
    assert main(["--config", str(path), "alerts"]) == 0
    assert capsys.readouterr().out.count("[snoozed until ") == 2


@pytest.mark.parametrize(
    "value",
    ["tomorrow", "now", "", "0m", "4 fortnights", "2020-01-01T00:00Z", "2026-13-01", "99999d"],
)
def test_a_bad_snooze_time_is_one_clear_line(
    value: str, sqlite_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    engine, _, path = raised(sqlite_url, tmp_path)
    alert_id = str(alerts(engine)["id"].iloc[0])
    capsys.readouterr()
    assert main(["--config", str(path), "alerts", "snooze", alert_id, "--until", value]) != 0
    captured = capsys.readouterr()
    lines = [line for line in (captured.out + captured.err).splitlines() if line.strip()]
    assert len(lines) == 1 and f"--until {value!r}" in lines[0], lines
    assert alerts(engine)["snoozed_until"].isna().all()  # nothing was snoozed


def test_a_cleared_alert_is_not_snoozed(
    sqlite_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    engine, config, path = raised(sqlite_url, tmp_path)
    quiet = findings(engine, [{"series": s} for s in SERIES[1:]])  # shop-00 recovered
    for day in (1, 2, 3):  # coverage_low keeps its default clear_after of 3 (DEFAULT_RULES)
        apply_findings(engine, config, quiet, 1 + day, NOW + day * DAY)
    rows = alerts(engine)
    cleared = str(int(rows.loc[rows["state"] == "cleared", "id"].iloc[0]))
    capsys.readouterr()
    assert main(["--config", str(path), "alerts", "snooze", cleared, "--until", "4h"]) == 0
    out = capsys.readouterr().out
    assert "snoozed 0 of 1" in out and "only open (not cleared) alerts can be snoozed" in out
    assert alerts(engine)["snoozed_until"].isna().all()
