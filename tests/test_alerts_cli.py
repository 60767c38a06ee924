"""The on-call analyst's path on the command line: list alerts, act on them by id.

`aftercast alerts` lists the lifecycle alerts the store holds (not the raw detection findings),
each with the id that `alerts ack ID` and `alerts snooze ID` take, so what an analyst sees is
what they can act on. Alerts are raised through the real alert stage on a real store.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from sqlalchemy import Engine

from aftercast.alerts.stage import apply_findings
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
