"""Helpers shared by the alert, outbox and delivery tests (this module holds no tests).

`seed` puts labelled series, a model and a few weeks of forecasts with 80% intervals and
actuals into a real store through the ordinary ingest path, then matches them, so alerts have
series, models and pairs to chart. `findings` builds the frame the detect stage hands over
(input data, invented for the test, not check values): one row per (detection, series, model,
horizon bucket), with the integer ids looked up in the store.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import pandas as pd
from sqlalchemy import Engine

from aftercast.config import Config
from aftercast.ingest import ingest_records
from aftercast.matching import match
from aftercast.store.bulk import read_frame

DAY = 86_400
START = 1_714_521_600  # 2024-05-01T00:00:00Z
MODEL = "shop-planner"


def mail_channel(port: int, name: str = "oncall-mail", **changes: Any) -> dict[str, Any]:
    """An `email` channel entry for an SMTP server on loopback (plain SMTP, no login)."""
    return {
        "name": name,
        "type": "email",
        "host": "127.0.0.1",
        "port": port,
        "security": "none",
        "sender": "aftercast@example.test",
        "to": ["oncall@example.test"],
        "timeout_seconds": 5,
        **changes,
    }


def seed(engine: Engine, config: Config, labels: dict[str, dict[str, str]], days: int = 21) -> None:
    """Series with `labels` (key -> labels), daily forecasts issued a day ahead, and actuals."""
    ingest_records(
        engine,
        config,
        "series",
        [{"series_id": k, **{f"label_{n}": v for n, v in ls.items()}} for k, ls in labels.items()],
        "test series",
    )
    forecasts, actuals = [], []
    for index, key in enumerate(labels):
        for day in range(1, days + 1):
            target = START + day * DAY
            level = 100.0 + index
            forecasts.append(
                {
                    "series_id": key,
                    "model": MODEL,
                    "issued_at": pd.Timestamp(target - DAY, unit="s", tz="UTC").isoformat(),
                    "target_at": pd.Timestamp(target, unit="s", tz="UTC").isoformat(),
                    "point": level,
                    "lower_80": level - 5,
                    "upper_80": level + 5,
                }
            )
            # Every third actual falls outside the band, so charts have misses to mark.
            value = level + (9.0 if day % 3 == 0 else 1.0)
            actuals.append(
                {
                    "series_id": key,
                    "observed_at": pd.Timestamp(target, unit="s", tz="UTC").isoformat(),
                    "value": value,
                }
            )
    ingest_records(engine, config, "forecasts", forecasts, "test forecasts")
    ingest_records(engine, config, "actuals", actuals, "test actuals")
    match(engine, START + (days + 1) * DAY)


def ids(engine: Engine) -> tuple[dict[str, int], dict[str, int]]:
    with engine.connect() as connection:
        series = read_frame(connection, "SELECT id, key FROM series")
        models = read_frame(connection, "SELECT id, name FROM models")
    return (
        dict(zip(series["key"], series["id"].astype(int), strict=True)),
        dict(zip(models["name"], models["id"].astype(int), strict=True)),
    )


def findings(engine: Engine, rows: Iterable[dict[str, Any]]) -> pd.DataFrame:
    """Findings as the detect stage hands them over; `rows` give series keys, not ids.

    Each row: series (key), and optionally detection (coverage_low), model, horizon ("1"),
    flagged (True), severity ("critical"), statistic, p_value, n and evidence.
    """
    series_ids, model_ids = ids(engine)
    records = []
    for row in rows:
        evidence = row.get("evidence", {"coverage": 0.55, "level": 80, "n": 40})
        records.append(
            {
                "detection": row.get("detection", "coverage_low"),
                "series_id": series_ids[row["series"]],
                "model_id": model_ids[row.get("model", MODEL)],
                "horizon": row.get("horizon", "1"),
                "flagged": row.get("flagged", True),
                "severity": row.get("severity", "critical"),
                "statistic": row.get("statistic", 3.1),
                "p_value": row.get("p_value", 1e-4),
                "n": evidence.get("n", row.get("n")),
                "evidence": evidence,
            }
        )
    return pd.DataFrame(records)


def outbox(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(connection, "SELECT * FROM notification_outbox ORDER BY id")


def transitions(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(connection, "SELECT * FROM alert_transitions ORDER BY id")


def alerts(engine: Engine) -> pd.DataFrame:
    with engine.connect() as connection:
        return read_frame(connection, "SELECT * FROM alerts ORDER BY id")
