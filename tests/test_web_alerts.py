"""Alerts through the API and the pages: list, acknowledge, snooze, state column, history.

The alert rows are put in the store the way the alert stage stores them (its own tables and its
own `set_attention`), so this checks the web side only. Outside references: RFC 6750 section 3
(401 without the bearer token), RFC 9110 section 15.5.5 (404 for an unknown alert) and 15.5.21
(422 for a snooze that ends in the past); prometheus-client's parser reads `/metrics`.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import requests
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import text

from aftercast.periods import to_iso
from aftercast.store.db import write
from aftercast.store.schema_alerts import alerts
from aftercast.web.app import create_app
from tests.test_pages import overview, table
from tests.test_web import AUTH, NOW, Fleet, LiveServer, seeded_store


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Fleet]:
    folder = Path(tmp_path_factory.mktemp("alerts"))
    engine, config = seeded_store(folder)
    with engine.connect() as connection:
        series_id, key = connection.execute(
            text("SELECT id, key FROM series ORDER BY key LIMIT 1")
        ).one()
        model_id = connection.execute(
            text("SELECT id FROM models WHERE name = 'shop-planner'")
        ).scalar_one()
    now = int(time.time())
    with write(engine) as connection:
        connection.execute(alerts.delete())  # whatever the seeding cycle raised: start clean
        connection.execute(
            alerts.insert().values(
                fingerprint=f"coverage_low|{series_id}|{model_id}|1",
                rule="coverage_low",
                series_id=series_id,
                model_id=model_id,
                horizon="1",
                state="raised",
                severity="critical",
                met_streak=3,
                unmet_streak=0,
                episode=1,
                since_at=now - 3600,
                raised_at=now - 600,
                summary="The 80% interval covered 55% of the last 40 outcomes.",
                evidence='{"coverage": 0.55, "level": 80}',
                updated_at=now,
            )
        )
    with LiveServer(create_app(engine, config)) as live:
        yield Fleet(engine, config, folder, live.url, [str(key)])
    engine.dispose()


def test_alerts_are_listed_acknowledged_and_shown(site: Fleet) -> None:
    listed = requests.get(f"{site.url}/v1/alerts", timeout=10).json()
    assert listed["total"] == 1
    alert = listed["items"][0]
    assert (alert["series_id"], alert["state"], alert["rule"]) == (
        site.series[0],
        "raised",
        "coverage_low",
    )
    assert alert["evidence"]["coverage"] == 0.55
    url = f"{site.url}/v1/alerts/{alert['id']}"
    assert requests.post(f"{url}/acknowledge", json={}, timeout=10).status_code == 401
    assert (
        requests.post(
            f"{site.url}/v1/alerts/999/acknowledge", json={}, headers=AUTH, timeout=10
        ).status_code
        == 404
    )
    done = requests.post(
        f"{url}/acknowledge", json={"actor": "ana", "note": "on it"}, headers=AUTH, timeout=10
    )
    assert done.status_code == 200 and done.json()["changed"] == 1
    again = requests.get(f"{site.url}/v1/alerts", params={"state": "acknowledged"}, timeout=10)
    assert again.json()["items"][0]["acknowledged_by"] == "ana"

    row = next(
        r for r in overview(site, per_page=500, model="shop-planner") if r[0] == site.series[0]
    )
    assert row[-1].startswith("acknowledged")
    page = requests.get(
        f"{site.url}/series/{site.series[0]}",
        timeout=10,
        params={"now": NOW, "model": "shop-planner"},
    )
    history = table(page.text, "alert-history")
    assert history and history[0][-2:] == ["ana", "on it"]
    assert history[0][0] == f"#{alert['id']}"  # the id that `alerts ack ID` takes

    past = requests.post(
        f"{url}/snooze", json={"until": "2020-01-01T00:00:00Z"}, headers=AUTH, timeout=10
    )
    assert past.status_code == 422
    until = to_iso(int(time.time()) + 7200)
    snoozed = requests.post(
        f"{url}/snooze", json={"until": until, "actor": "ana"}, headers=AUTH, timeout=10
    )
    assert snoozed.status_code == 200 and snoozed.json()["until"] == until

    metrics = requests.get(f"{site.url}/metrics", timeout=10).text
    states = {
        s.labels["state"]: s.value
        for f in text_string_to_metric_families(metrics)
        for s in f.samples
        if s.name == "aftercast_alerts"
    }
    with site.engine.connect() as connection:
        stored = {
            str(s): n
            for s, n in connection.execute(
                text("SELECT state, COUNT(*) FROM alerts GROUP BY state")
            )
        }
    assert states == stored == {"acknowledged": 1}
